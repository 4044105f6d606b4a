-- weir's PostgreSQL schema, version 1: the same records as the sled trees (see src/store.rs).
-- Records are kept as the JSON the service writes (text, so numbers round-trip exactly);
-- columns beside them are what queries filter and sort on. Ids compare bytewise (COLLATE "C"),
-- as in sled, so both back ends list claims and queues in the same order.

CREATE TABLE claims (
    claim_id     text COLLATE "C" PRIMARY KEY,
    revision     integer NOT NULL,
    content_hash text NOT NULL,
    queue        text NOT NULL
);

CREATE TABLE revisions (
    claim_id  text COLLATE "C" NOT NULL,
    revision  integer NOT NULL,
    -- Order in which decisions were stored across every instance (for audits and tests).
    stored_seq bigint GENERATED ALWAYS AS IDENTITY,
    record    text NOT NULL,
    PRIMARY KEY (claim_id, revision)
);

-- The entity history index: one row per (entity, claim), read by the features.
CREATE TABLE history (
    entity     text COLLATE "C" NOT NULL,
    at         bigint NOT NULL,
    claim_hash bigint NOT NULL,
    claimant   bigint NOT NULL,
    amount     double precision NOT NULL,
    claim_id   text COLLATE "C" NOT NULL,
    PRIMARY KEY (entity, at, claim_hash)
);

CREATE TABLE queue_items (
    queue       text NOT NULL,
    claim_id    text COLLATE "C" NOT NULL,
    priority    double precision NOT NULL,
    lease_until bigint,
    item        text NOT NULL,
    PRIMARY KEY (queue, claim_id)
);
CREATE INDEX queue_items_rank ON queue_items (queue, priority DESC, claim_id);

CREATE TABLE outcomes (
    claim_id text COLLATE "C" PRIMARY KEY,
    record   text NOT NULL
);

CREATE TABLE outcome_revisions (
    claim_id text COLLATE "C" NOT NULL,
    revision integer NOT NULL,
    record   text NOT NULL,
    PRIMARY KEY (claim_id, revision)
);

CREATE TABLE holds (
    claim_id text COLLATE "C" PRIMARY KEY,
    record   text NOT NULL
);

-- Take session advisory locks on every key, in the order given (the caller sorts them, so two
-- sessions never wait on each other in a cycle). One round trip for any number of keys.
CREATE FUNCTION weir_lock_keys(keys bigint[]) RETURNS void AS $$
DECLARE
    k bigint;
BEGIN
    FOREACH k IN ARRAY keys LOOP
        PERFORM pg_advisory_lock(k);
    END LOOP;
END
$$ LANGUAGE plpgsql;
