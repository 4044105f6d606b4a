-- weir's PostgreSQL schema, version 2: the claims graph (see src/graph.rs).

-- Each claim's links, by claim hash: what a component is followed through.
CREATE TABLE claim_nodes (
    claim_hash bigint PRIMARY KEY,
    claim_id   text COLLATE "C" NOT NULL,
    at         bigint NOT NULL,
    claimant   bigint NOT NULL,
    amount     double precision NOT NULL,
    keys       text[] NOT NULL
);

-- Components decided into, by id: the latest claim decided in each and its figures then.
CREATE TABLE rings (
    id      text COLLATE "C" PRIMARY KEY,
    last_at bigint NOT NULL,
    record  text NOT NULL
);
CREATE INDEX rings_last_at ON rings (last_at);
