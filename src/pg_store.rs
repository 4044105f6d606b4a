//! The shared store: PostgreSQL, for several weir instances on one database.
//!
//! Same records as [`crate::store::SledStore`], in the tables of `migrations/` (applied on
//! start-up, in order, each in its own transaction, under an advisory lock so that instances
//! starting together do not race). How it stays right when instances work at the same time:
//!
//! - **Intake and entity history**: the service takes [`Backend::lock`] on the claim's own key
//!   and every entity it names before it reads history, and keeps it until the decision is
//!   committed. Here that is a set of session advisory locks (sorted, so no two sessions wait
//!   on each other in a cycle), held on a connection of their own. Two claims that share a
//!   party are decided one after the other, each seeing the other if it came first; claims
//!   that share nothing go in parallel.
//! - **Idempotence**: a revision row has a unique key (claim, revision) and is inserted with
//!   `ON CONFLICT DO NOTHING`; a second writer of the same revision gets
//!   [`StoreError::Conflict`] and its transaction is rolled back whole.
//! - **Leases**: `FOR UPDATE SKIP LOCKED` picks the best item no other session is leasing.
//! - **Outcomes**: one row per (claim, outcome revision), inserted the same way.
//! - **Durability**: a write is acknowledged after `COMMIT` returns, which with PostgreSQL's
//!   default `synchronous_commit = on` means it is in the write-ahead log on disk.
//!
//! The client is the blocking `postgres` crate. Calls made on a tokio worker thread go
//! through `block_in_place`, so `weir serve` (multi-threaded runtime) can use it directly.

use crate::claim::Claim;
use crate::features::{DAY, HistoryEvent, HistoryView, LONG_WINDOW_DAYS, events_of, stable_hash};
use crate::feedback::OutcomeRecord;
use crate::rules::Queue;
use crate::store::{
    Backend, ClaimHead, DecisionRecord, Held, HistoryRow, Hold, QueueItem, StoreError,
};
use postgres::fallible_iterator::FallibleIterator;
use postgres::{Client, NoTls, Row, Statement};
use std::collections::HashMap;
use std::sync::{Condvar, Mutex};

/// Migrations, in order. A shipped migration is never edited: add the next one.
pub const MIGRATIONS: &[(i32, &str, &str)] = &[
    (1, "initial", include_str!("../migrations/0001_initial.sql")),
    (2, "graph", include_str!("../migrations/0002_graph.sql")),
];

/// Advisory lock key that serialises migrations across instances (any fixed number).
const MIGRATION_LOCK: i64 = 0x7765_6972_6d69_6772;

fn pg(e: postgres::Error) -> StoreError {
    StoreError::Postgres(e.to_string())
}

fn decode<T: serde::de::DeserializeOwned>(what: &str, text: &str) -> Result<T, StoreError> {
    serde_json::from_str(text).map_err(|e| StoreError::Corrupt {
        what: what.to_string(),
        detail: e.to_string(),
    })
}

fn encode<T: serde::Serialize>(v: &T) -> String {
    serde_json::to_string(v).unwrap_or_default()
}

/// Run blocking database work without stalling the async runtime.
fn blocking<T>(f: impl FnOnce() -> T) -> T {
    match tokio::runtime::Handle::try_current() {
        Ok(h) if h.runtime_flavor() == tokio::runtime::RuntimeFlavor::MultiThread => {
            tokio::task::block_in_place(f)
        }
        _ => f(),
    }
}

type Params<'a> = &'a [&'a (dyn postgres::types::ToSql + Sync)];

/// One connection with the statements it has prepared: each statement is parsed and planned
/// once per connection, not on every call (and costs one round trip instead of two).
struct Session {
    client: Client,
    cache: HashMap<&'static str, Statement>,
}

fn cached(
    cache: &mut HashMap<&'static str, Statement>,
    sql: &'static str,
    prepare: impl FnOnce(&str) -> Result<Statement, postgres::Error>,
) -> Result<Statement, postgres::Error> {
    if let Some(s) = cache.get(sql) {
        return Ok(s.clone());
    }
    let s = prepare(sql)?;
    cache.insert(sql, s.clone());
    Ok(s)
}

impl Session {
    fn st(&mut self, sql: &'static str) -> Result<Statement, postgres::Error> {
        let client = &mut self.client;
        cached(&mut self.cache, sql, |q| client.prepare(q))
    }
    fn query(&mut self, sql: &'static str, p: Params) -> Result<Vec<Row>, postgres::Error> {
        let s = self.st(sql)?;
        self.client.query(&s, p)
    }
    fn query_opt(&mut self, sql: &'static str, p: Params) -> Result<Option<Row>, postgres::Error> {
        let s = self.st(sql)?;
        self.client.query_opt(&s, p)
    }
    fn query_one(&mut self, sql: &'static str, p: Params) -> Result<Row, postgres::Error> {
        let s = self.st(sql)?;
        self.client.query_one(&s, p)
    }
    fn execute(&mut self, sql: &'static str, p: Params) -> Result<u64, postgres::Error> {
        let s = self.st(sql)?;
        self.client.execute(&s, p)
    }
    fn batch_execute(&mut self, sql: &str) -> Result<(), postgres::Error> {
        self.client.batch_execute(sql)
    }
    fn transaction(&mut self) -> Result<Tx<'_>, postgres::Error> {
        Ok(Tx {
            tx: self.client.transaction()?,
            cache: &mut self.cache,
        })
    }
}

/// A transaction that uses (and fills) its session's statement cache.
struct Tx<'a> {
    tx: postgres::Transaction<'a>,
    cache: &'a mut HashMap<&'static str, Statement>,
}

impl Tx<'_> {
    fn st(&mut self, sql: &'static str) -> Result<Statement, postgres::Error> {
        let tx = &mut self.tx;
        cached(self.cache, sql, |q| tx.prepare(q))
    }
    fn query_opt(&mut self, sql: &'static str, p: Params) -> Result<Option<Row>, postgres::Error> {
        let s = self.st(sql)?;
        self.tx.query_opt(&s, p)
    }
    fn execute(&mut self, sql: &'static str, p: Params) -> Result<u64, postgres::Error> {
        let s = self.st(sql)?;
        self.tx.execute(&s, p)
    }
    fn commit(self) -> Result<(), postgres::Error> {
        self.tx.commit()
    }
}

/// A small connection pool: at most `max` connections, reconnecting when one breaks.
struct Pool {
    config: postgres::Config,
    /// Run once on each new connection.
    setup: &'static str,
    state: Mutex<(Vec<Session>, usize)>,
    freed: Condvar,
    max: usize,
}

struct Conn<'a> {
    pool: &'a Pool,
    client: Option<Session>,
}

impl Pool {
    fn get(&self) -> Result<Conn<'_>, StoreError> {
        let mut st = self.state.lock().unwrap_or_else(|p| p.into_inner());
        loop {
            if let Some(c) = st.0.pop() {
                if c.client.is_closed() {
                    st.1 -= 1;
                    continue;
                }
                return Ok(Conn {
                    pool: self,
                    client: Some(c),
                });
            }
            if st.1 < self.max {
                st.1 += 1;
                drop(st);
                let connected = self.config.connect(NoTls).and_then(|mut c| {
                    c.batch_execute(self.setup)?;
                    Ok(c)
                });
                return match connected {
                    Ok(c) => Ok(Conn {
                        pool: self,
                        client: Some(Session {
                            client: c,
                            cache: HashMap::new(),
                        }),
                    }),
                    Err(e) => {
                        let mut st = self.state.lock().unwrap_or_else(|p| p.into_inner());
                        st.1 -= 1;
                        self.freed.notify_one();
                        Err(pg(e))
                    }
                };
            }
            st = self.freed.wait(st).unwrap_or_else(|p| p.into_inner());
        }
    }
}

impl Conn<'_> {
    fn client(&mut self) -> &mut Session {
        self.client
            .as_mut()
            .unwrap_or_else(|| unreachable!("a connection is only emptied when dropped"))
    }

    /// Close instead of returning to the pool (its session state is unknown).
    fn discard(&mut self) {
        self.client = None;
    }
}

impl Drop for Conn<'_> {
    fn drop(&mut self) {
        let mut st = self.pool.state.lock().unwrap_or_else(|p| p.into_inner());
        match self.client.take() {
            Some(c) if !c.client.is_closed() => st.0.push(c),
            _ => st.1 -= 1,
        }
        self.pool.freed.notify_one();
    }
}

/// Advisory locks held by one session; released (or the session closed) when dropped.
struct KeyLocks<'a> {
    conn: Conn<'a>,
}

impl Drop for KeyLocks<'_> {
    fn drop(&mut self) {
        let ok = blocking(|| {
            self.conn
                .client()
                .batch_execute("SELECT pg_advisory_unlock_all()")
                .is_ok()
        });
        if !ok {
            // Closing the session releases its locks on the server.
            self.conn.discard();
        }
    }
}

/// History prefetched for one claim: every entity it names, the long window before it.
struct Prefetched(HashMap<String, Vec<HistoryEvent>>);

impl HistoryView for Prefetched {
    fn for_each_event(&self, entity: &str, from: i64, to: i64, f: &mut dyn FnMut(&HistoryEvent)) {
        for e in self.0.get(entity).into_iter().flatten() {
            if e.at >= from && e.at < to {
                f(e);
            }
        }
    }
}

impl crate::graph::GraphSource for PgStore {
    /// One query per call: every key with its own limit (a lateral join), in the order sled
    /// reads (time, then claim hash as unsigned).
    fn events(
        &self,
        keys: &[(String, usize)],
        from: i64,
        to: i64,
    ) -> Result<Vec<Vec<HistoryEvent>>, crate::graph::SourceError> {
        if keys.is_empty() {
            return Ok(Vec::new());
        }
        let names: Vec<&str> = keys.iter().map(|(k, _)| k.as_str()).collect();
        let limits: Vec<i64> = keys.iter().map(|(_, l)| *l as i64).collect();
        let mut out: Vec<Vec<HistoryEvent>> = vec![Vec::new(); keys.len()];
        let rows = self
            .with(|c| {
                c.query(
                    "SELECT k.i::bigint, h.at, h.claim_hash, h.claimant, h.amount
                     FROM unnest($1::text[], $2::bigint[]) WITH ORDINALITY AS k(entity, lim, i)
                     CROSS JOIN LATERAL (
                        SELECT at, claim_hash, claimant, amount FROM history
                        WHERE entity = k.entity AND at >= $3 AND at < $4
                        ORDER BY at, claim_hash
                        LIMIT k.lim) h",
                    &[&names, &limits, &from, &to],
                )
            })
            .map_err(|e| crate::graph::SourceError(e.to_string()))?;
        for r in rows {
            let i = r.get::<_, i64>(0) as usize - 1;
            out[i].push(HistoryEvent {
                at: r.get(1),
                claim: r.get::<_, i64>(2) as u64,
                claimant: r.get::<_, i64>(3) as u64,
                amount: r.get(4),
            });
        }
        for v in &mut out {
            v.sort_by_key(|e| (e.at, e.claim));
        }
        Ok(out)
    }

    fn nodes(
        &self,
        claims: &[u64],
    ) -> Result<Vec<Option<crate::graph::ClaimNode>>, crate::graph::SourceError> {
        if claims.is_empty() {
            return Ok(Vec::new());
        }
        let hashes: Vec<i64> = claims.iter().map(|&h| h as i64).collect();
        let rows = self
            .with(|c| {
                c.query(
                    "SELECT claim_hash, claim_id, at, claimant, amount, keys FROM claim_nodes
                     WHERE claim_hash = ANY($1)",
                    &[&hashes],
                )
            })
            .map_err(|e| crate::graph::SourceError(e.to_string()))?;
        let mut found: HashMap<u64, crate::graph::ClaimNode> = HashMap::new();
        for r in rows {
            let h = r.get::<_, i64>(0) as u64;
            found.insert(
                h,
                crate::graph::ClaimNode {
                    claim: h,
                    claim_id: r.get(1),
                    at: r.get(2),
                    claimant: r.get::<_, i64>(3) as u64,
                    amount: r.get(4),
                    keys: r.get(5),
                },
            );
        }
        Ok(claims.iter().map(|h| found.remove(h)).collect())
    }
}

/// Stable lock key of a string (the same on every instance).
fn lock_key(s: &str) -> i64 {
    stable_hash(s) as i64
}

pub struct PgStore {
    /// Connections for reads and writes: each is held for one statement or transaction.
    work: Pool,
    /// Connections that hold advisory locks while their owner works on `work` connections
    /// (a separate pool, so lock holders can never use up the connections they need).
    locks: Pool,
    flush_seconds: prometheus::Histogram,
}

impl PgStore {
    /// Connect, apply pending migrations, and keep up to `pool` connections for work (and as
    /// many for locks).
    pub fn connect(url: &str, pool: usize) -> Result<PgStore, StoreError> {
        let mut config: postgres::Config = url.parse().map_err(|e: postgres::Error| {
            StoreError::Postgres(format!("store.postgres_url: {e}"))
        })?;
        // Notice a peer that vanished (a partition, a dead instance) in about a minute, not
        // after the two-hour keepalive default, unless the URL says otherwise.
        if config.get_keepalives_idle() == std::time::Duration::from_secs(2 * 60 * 60) {
            config.keepalives_idle(std::time::Duration::from_secs(30));
        }
        let mk = |max, setup| Pool {
            config: config.clone(),
            setup,
            state: Mutex::new((Vec::new(), 0)),
            freed: Condvar::new(),
            max,
        };
        let store = PgStore {
            work: mk(pool.max(1), "SET application_name = 'weir'"),
            // A claim waits at most this long for another's locks; then its intake fails
            // with a retryable error instead of holding a thread without end.
            locks: mk(
                pool.max(1),
                "SET application_name = 'weir-locks'; SET lock_timeout = '30s'",
            ),
            flush_seconds: prometheus::Histogram::with_opts(
                prometheus::HistogramOpts::new(
                    "weir_store_flush_seconds",
                    "Time to make a write durable (PostgreSQL: the committing transaction)",
                )
                .buckets(vec![
                    0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 1.0,
                ]),
            )
            .unwrap_or_else(|_| unreachable!("static histogram options are valid")),
        };
        blocking(|| store.migrate())?;
        Ok(store)
    }

    /// Apply every migration not yet recorded in `weir_migrations`. Returns those applied.
    pub fn migrate(&self) -> Result<Vec<i32>, StoreError> {
        let mut conn = self.work.get()?;
        let c = &mut conn.client().client;
        c.execute("SELECT pg_advisory_lock($1)", &[&MIGRATION_LOCK])
            .map_err(pg)?;
        let result = (|| {
            c.batch_execute(
                "CREATE TABLE IF NOT EXISTS weir_migrations (
                    version integer PRIMARY KEY,
                    name text NOT NULL,
                    applied_at timestamptz NOT NULL DEFAULT now())",
            )?;
            let done: Vec<i32> = c
                .query("SELECT version FROM weir_migrations", &[])?
                .iter()
                .map(|r| r.get(0))
                .collect();
            let mut applied = Vec::new();
            for (version, name, sql) in MIGRATIONS {
                if done.contains(version) {
                    continue;
                }
                let mut tx = c.transaction()?;
                tx.batch_execute(sql)?;
                tx.execute(
                    "INSERT INTO weir_migrations (version, name) VALUES ($1, $2)",
                    &[version, name],
                )?;
                tx.commit()?;
                tracing::info!(version, name, "applied store migration");
                applied.push(*version);
            }
            Ok::<_, postgres::Error>(applied)
        })();
        let unlocked = c.execute("SELECT pg_advisory_unlock($1)", &[&MIGRATION_LOCK]);
        let applied = result.map_err(pg)?;
        unlocked.map_err(pg)?;
        Ok(applied)
    }

    /// Versions recorded as applied.
    pub fn schema_versions(&self) -> Result<Vec<i32>, StoreError> {
        self.with(|c| {
            Ok(
                c.query("SELECT version FROM weir_migrations ORDER BY version", &[])?
                    .iter()
                    .map(|r| r.get(0))
                    .collect(),
            )
        })
    }

    /// Every stored decision as (claim id, revision, order in which it was stored).
    pub fn stored_order(&self) -> Result<Vec<(String, u32, i64)>, StoreError> {
        self.with(|c| {
            Ok(c.query(
                "SELECT claim_id, revision, stored_seq FROM revisions ORDER BY stored_seq",
                &[],
            )?
            .iter()
            .map(|r| (r.get(0), r.get::<_, i32>(1) as u32, r.get(2)))
            .collect())
        })
    }

    /// Drop every weir table (tests and `weir` operators starting over; never called by the
    /// service itself).
    pub fn drop_everything(&self) -> Result<(), StoreError> {
        self.with(|c| {
            c.batch_execute(
                "DROP TABLE IF EXISTS claims, revisions, history, queue_items, outcomes,
                    outcome_revisions, holds, weir_migrations;
                 DROP FUNCTION IF EXISTS weir_lock_keys(bigint[]);",
            )
        })
    }

    fn with<T>(
        &self,
        f: impl FnOnce(&mut Session) -> Result<T, postgres::Error>,
    ) -> Result<T, StoreError> {
        blocking(|| {
            let mut conn = self.work.get()?;
            f(conn.client()).map_err(pg)
        })
    }

    /// As [`PgStore::with`] for closures that return store errors of their own.
    fn with_store<T>(
        &self,
        f: impl FnOnce(&mut Session) -> Result<T, StoreError>,
    ) -> Result<T, StoreError> {
        blocking(|| {
            let mut conn = self.work.get()?;
            f(conn.client())
        })
    }

    fn count(&self, sql: &'static str, params: Params) -> usize {
        match self.with(|c| c.query_one(sql, params).map(|r| r.get::<_, i64>(0))) {
            Ok(n) => n.max(0) as usize,
            Err(e) => {
                tracing::error!(error = %e, "store count failed");
                0
            }
        }
    }

    fn set_item_lease(
        &self,
        queue: Queue,
        pick: &'static str,
        params: Params,
        lease: Option<crate::store::Lease>,
    ) -> Result<Option<QueueItem>, StoreError> {
        self.with_store(|c| {
            let mut tx = c.transaction().map_err(pg)?;
            let Some(row) = tx.query_opt(pick, params).map_err(pg)? else {
                return Ok(None);
            };
            let claim_id: String = row.get(0);
            let mut item: QueueItem = decode("queue item", &row.get::<_, String>(1))?;
            item.lease = lease;
            let until = item.lease.as_ref().map(|l| l.until);
            tx.execute(
                "UPDATE queue_items SET item = $3, lease_until = $4 WHERE queue = $1 AND claim_id = $2",
                &[&queue.as_str(), &claim_id, &encode(&item), &until],
            )
            .map_err(pg)?;
            tx.commit().map_err(pg)?;
            Ok(Some(item))
        })
    }
}

impl Backend for PgStore {
    fn kind(&self) -> &'static str {
        "postgres"
    }

    fn remote(&self) -> bool {
        true
    }

    fn start(&self) {}

    fn durable(&self) -> std::pin::Pin<Box<dyn std::future::Future<Output = ()> + Send + '_>> {
        // Every write returned after its COMMIT: nothing left to wait for.
        Box::pin(std::future::ready(()))
    }

    fn flush_seconds(&self) -> &prometheus::Histogram {
        &self.flush_seconds
    }

    fn ready(&self) -> Result<(), StoreError> {
        self.with(|c| c.batch_execute("SELECT 1"))
    }

    fn lock<'a>(&'a self, keys: &[String]) -> Result<Box<dyn Held + 'a>, StoreError> {
        let mut ks: Vec<i64> = keys.iter().map(|k| lock_key(k)).collect();
        ks.sort_unstable();
        ks.dedup();
        blocking(|| {
            let mut conn = self.locks.get()?;
            if let Err(e) = conn.client().execute("SELECT weir_lock_keys($1)", &[&ks]) {
                conn.discard();
                return Err(pg(e));
            }
            Ok(Box::new(KeyLocks { conn }) as Box<dyn Held + 'a>)
        })
    }

    fn count_queue(&self, queue: Queue) -> usize {
        self.count(
            "SELECT count(*) FROM queue_items WHERE queue = $1",
            &[&queue.as_str()],
        )
    }

    fn flush(&self) -> Result<(), StoreError> {
        Ok(())
    }

    fn head(&self, claim_id: &str) -> Result<Option<ClaimHead>, StoreError> {
        self.with_store(|c| {
            let row = c
                .query_opt(
                    "SELECT revision, content_hash, queue FROM claims WHERE claim_id = $1",
                    &[&claim_id],
                )
                .map_err(pg)?;
            row.map(|r| {
                let queue: String = r.get(2);
                Ok(ClaimHead {
                    revision: r.get::<_, i32>(0) as u32,
                    content_hash: r.get(1),
                    queue: Queue::parse(&queue).ok_or_else(|| StoreError::Corrupt {
                        what: "claim head".into(),
                        detail: format!("unknown queue {queue:?}"),
                    })?,
                })
            })
            .transpose()
        })
    }

    fn decision(&self, claim_id: &str, rev: u32) -> Result<Option<DecisionRecord>, StoreError> {
        let rev = rev as i32;
        self.with_store(|c| {
            c.query_opt(
                "SELECT record FROM revisions WHERE claim_id = $1 AND revision = $2",
                &[&claim_id, &rev],
            )
            .map_err(pg)?
            .map(|r| decode("decision record", &r.get::<_, String>(0)))
            .transpose()
        })
    }

    fn revisions(&self, claim_id: &str) -> Result<Vec<DecisionRecord>, StoreError> {
        self.with_store(|c| {
            c.query(
                "SELECT record FROM revisions WHERE claim_id = $1 ORDER BY revision",
                &[&claim_id],
            )
            .map_err(pg)?
            .iter()
            .map(|r| decode("decision record", &r.get::<_, String>(0)))
            .collect()
        })
    }

    fn record(
        &self,
        rec: &DecisionRecord,
        previous: Option<&DecisionRecord>,
        item: Option<&QueueItem>,
    ) -> Result<(), StoreError> {
        let new_events = events_of(&rec.claim);
        let old_events = previous.map(|p| events_of(&p.claim)).unwrap_or_default();
        let t0 = std::time::Instant::now();
        self.with_store(|c| {
            let mut tx = c.transaction().map_err(pg)?;
            if !old_events.is_empty() {
                let (ents, ats, hs) = columns(&old_events);
                tx.execute(
                    "DELETE FROM history h USING unnest($1::text[], $2::bigint[], $3::bigint[]) AS d(e, a, c)
                     WHERE h.entity = d.e AND h.at = d.a AND h.claim_hash = d.c",
                    &[&ents, &ats, &hs],
                )
                .map_err(pg)?;
            }
            if let Some(p) = previous {
                tx.execute(
                    "DELETE FROM queue_items WHERE queue = $1 AND claim_id = $2",
                    &[&p.queue.as_str(), &p.claim_id],
                )
                .map_err(pg)?;
            }
            let (ents, ats, hs) = columns(&new_events);
            let claimants: Vec<i64> = new_events.iter().map(|(_, e)| e.claimant as i64).collect();
            let amounts: Vec<f64> = new_events.iter().map(|(_, e)| e.amount).collect();
            tx.execute(
                "INSERT INTO history (entity, at, claim_hash, claimant, amount, claim_id)
                 SELECT e, a, c, cl, am, $6 FROM unnest($1::text[], $2::bigint[], $3::bigint[], $4::bigint[], $5::float8[]) AS n(e, a, c, cl, am)
                 ON CONFLICT (entity, at, claim_hash) DO UPDATE
                 SET claimant = EXCLUDED.claimant, amount = EXCLUDED.amount, claim_id = EXCLUDED.claim_id",
                &[&ents, &ats, &hs, &claimants, &amounts, &rec.claim_id],
            )
            .map_err(pg)?;
            let node = crate::graph::ClaimNode::of(&rec.claim);
            tx.execute(
                "INSERT INTO claim_nodes (claim_hash, claim_id, at, claimant, amount, keys)
                 VALUES ($1, $2, $3, $4, $5, $6)
                 ON CONFLICT (claim_hash) DO UPDATE
                 SET claim_id = EXCLUDED.claim_id, at = EXCLUDED.at, claimant = EXCLUDED.claimant,
                     amount = EXCLUDED.amount, keys = EXCLUDED.keys",
                &[
                    &(node.claim as i64),
                    &node.claim_id,
                    &node.at,
                    &(node.claimant as i64),
                    &node.amount,
                    &node.keys,
                ],
            )
            .map_err(pg)?;
            if let Some(c) = rec.component.as_ref().filter(|c| c.claims >= 2) {
                let ring = crate::graph::RingRecord {
                    seed: rec.claim_id.clone(),
                    component: c.clone(),
                };
                tx.execute(
                    "INSERT INTO rings (id, last_at, record) VALUES ($1, $2, $3)
                     ON CONFLICT (id) DO UPDATE SET last_at = EXCLUDED.last_at, record = EXCLUDED.record",
                    &[&c.id, &c.last_at, &encode(&ring)],
                )
                .map_err(pg)?;
            }
            let rev = rec.revision as i32;
            let inserted = tx
                .execute(
                    "INSERT INTO revisions (claim_id, revision, record) VALUES ($1, $2, $3)
                     ON CONFLICT (claim_id, revision) DO NOTHING",
                    &[&rec.claim_id, &rev, &encode(rec)],
                )
                .map_err(pg)?;
            if inserted == 0 {
                // Dropping the transaction rolls every statement above back.
                return Err(StoreError::Conflict(format!(
                    "claim {} revision {} was stored by another writer",
                    rec.claim_id, rec.revision
                )));
            }
            tx.execute(
                "INSERT INTO claims (claim_id, revision, content_hash, queue) VALUES ($1, $2, $3, $4)
                 ON CONFLICT (claim_id) DO UPDATE
                 SET revision = EXCLUDED.revision, content_hash = EXCLUDED.content_hash, queue = EXCLUDED.queue",
                &[&rec.claim_id, &rev, &rec.content_hash, &rec.queue.as_str()],
            )
            .map_err(pg)?;
            if let Some(it) = item {
                let until = it.lease.as_ref().map(|l| l.until);
                tx.execute(
                    "INSERT INTO queue_items (queue, claim_id, priority, lease_until, item) VALUES ($1, $2, $3, $4, $5)
                     ON CONFLICT (queue, claim_id) DO UPDATE
                     SET priority = EXCLUDED.priority, lease_until = EXCLUDED.lease_until, item = EXCLUDED.item",
                    &[&it.queue.as_str(), &it.claim_id, &it.priority, &until, &encode(it)],
                )
                .map_err(pg)?;
            }
            tx.commit().map_err(pg)?;
            self.flush_seconds.observe(t0.elapsed().as_secs_f64());
            Ok(())
        })
    }

    fn queue_item(&self, queue: Queue, claim_id: &str) -> Result<Option<QueueItem>, StoreError> {
        self.with_store(|c| {
            c.query_opt(
                "SELECT item FROM queue_items WHERE queue = $1 AND claim_id = $2",
                &[&queue.as_str(), &claim_id],
            )
            .map_err(pg)?
            .map(|r| decode("queue item", &r.get::<_, String>(0)))
            .transpose()
        })
    }

    fn queue_depth(&self, queue: Queue) -> usize {
        self.count_queue(queue)
    }

    fn queue_page(
        &self,
        queue: Queue,
        offset: usize,
        limit: usize,
    ) -> Result<Vec<QueueItem>, StoreError> {
        let (offset, limit) = (offset as i64, limit as i64);
        self.with_store(|c| {
            c.query(
                "SELECT item FROM queue_items WHERE queue = $1
                 ORDER BY priority DESC, claim_id OFFSET $2 LIMIT $3",
                &[&queue.as_str(), &offset, &limit],
            )
            .map_err(pg)?
            .iter()
            .map(|r| decode("queue item", &r.get::<_, String>(0)))
            .collect()
        })
    }

    fn lease_next(
        &self,
        queue: Queue,
        holder: &str,
        now: i64,
        lease_seconds: i64,
    ) -> Result<Option<QueueItem>, StoreError> {
        self.set_item_lease(
            queue,
            "SELECT claim_id, item FROM queue_items
             WHERE queue = $1 AND (lease_until IS NULL OR lease_until <= $2)
             ORDER BY priority DESC, claim_id LIMIT 1
             FOR UPDATE SKIP LOCKED",
            &[&queue.as_str(), &now],
            Some(crate::store::Lease {
                holder: holder.to_string(),
                until: now + lease_seconds,
            }),
        )
    }

    fn release(&self, queue: Queue, claim_id: &str) -> Result<bool, StoreError> {
        Ok(self
            .set_item_lease(
                queue,
                "SELECT claim_id, item FROM queue_items WHERE queue = $1 AND claim_id = $2 FOR UPDATE",
                &[&queue.as_str(), &claim_id],
                None,
            )?
            .is_some())
    }

    fn claim_count(&self) -> usize {
        self.count("SELECT count(*) FROM claims", &[])
    }

    fn tree_sizes(&self) -> [usize; 8] {
        let n = |sql| self.count(sql, &[]);
        let items = n("SELECT count(*) FROM queue_items");
        [
            n("SELECT count(*) FROM claims"),
            n("SELECT count(*) FROM revisions"),
            n("SELECT count(*) FROM history"),
            items,
            // sled keeps a separate rank tree; here the rank is an index on the same rows.
            items,
            n("SELECT count(*) FROM outcomes"),
            n("SELECT count(*) FROM outcome_revisions"),
            n("SELECT count(*) FROM holds"),
        ]
    }

    fn outcome(&self, claim_id: &str) -> Result<Option<OutcomeRecord>, StoreError> {
        self.with_store(|c| {
            c.query_opt(
                "SELECT record FROM outcomes WHERE claim_id = $1",
                &[&claim_id],
            )
            .map_err(pg)?
            .map(|r| decode("outcome", &r.get::<_, String>(0)))
            .transpose()
        })
    }

    fn outcome_history(&self, claim_id: &str) -> Result<Vec<OutcomeRecord>, StoreError> {
        self.with_store(|c| {
            c.query(
                "SELECT record FROM outcome_revisions WHERE claim_id = $1 ORDER BY revision",
                &[&claim_id],
            )
            .map_err(pg)?
            .iter()
            .map(|r| decode("outcome", &r.get::<_, String>(0)))
            .collect()
        })
    }

    fn record_outcome(
        &self,
        rec: &OutcomeRecord,
        decision: &DecisionRecord,
    ) -> Result<(), StoreError> {
        let bytes = encode(rec);
        let rev = rec.revision as i32;
        self.with_store(|c| {
            let mut tx = c.transaction().map_err(pg)?;
            let inserted = tx
                .execute(
                    "INSERT INTO outcome_revisions (claim_id, revision, record) VALUES ($1, $2, $3)
                     ON CONFLICT (claim_id, revision) DO NOTHING",
                    &[&rec.claim_id, &rev, &bytes],
                )
                .map_err(pg)?;
            if inserted == 0 {
                return Err(StoreError::Conflict(format!(
                    "outcome {} of claim {} was stored by another writer",
                    rec.revision, rec.claim_id
                )));
            }
            tx.execute(
                "INSERT INTO outcomes (claim_id, record) VALUES ($1, $2)
                 ON CONFLICT (claim_id) DO UPDATE SET record = EXCLUDED.record",
                &[&rec.claim_id, &bytes],
            )
            .map_err(pg)?;
            tx.execute(
                "DELETE FROM queue_items WHERE queue = $1 AND claim_id = $2",
                &[&decision.queue.as_str(), &decision.claim_id],
            )
            .map_err(pg)?;
            tx.commit().map_err(pg)
        })
    }

    fn for_each_latest(
        &self,
        f: &mut dyn FnMut(&DecisionRecord, Option<&OutcomeRecord>),
    ) -> Result<(), StoreError> {
        self.with_store(|c| {
            let params: [&(dyn postgres::types::ToSql + Sync); 0] = [];
            let mut rows = c
                .client
                .query_raw(
                    "SELECT r.record, o.record FROM claims c
                     JOIN revisions r ON r.claim_id = c.claim_id AND r.revision = c.revision
                     LEFT JOIN outcomes o ON o.claim_id = c.claim_id
                     ORDER BY c.claim_id",
                    params,
                )
                .map_err(pg)?;
            while let Some(row) = rows.next().map_err(pg)? {
                let rec: DecisionRecord = decode("decision record", &row.get::<_, String>(0))?;
                let outcome: Option<OutcomeRecord> = row
                    .get::<_, Option<String>>(1)
                    .map(|t| decode("outcome", &t))
                    .transpose()?;
                f(&rec, outcome.as_ref());
            }
            Ok(())
        })
    }

    fn hold(&self, claim_id: &str) -> Result<Option<Hold>, StoreError> {
        self.with_store(|c| {
            c.query_opt("SELECT record FROM holds WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?
                .map(|r| decode("hold", &r.get::<_, String>(0)))
                .transpose()
        })
    }

    fn set_hold(&self, claim_id: &str, hold: Option<&Hold>) -> Result<(), StoreError> {
        self.with(|c| {
            match hold {
                Some(h) => c.execute(
                    "INSERT INTO holds (claim_id, record) VALUES ($1, $2)
                     ON CONFLICT (claim_id) DO UPDATE SET record = EXCLUDED.record",
                    &[&claim_id, &encode(h)],
                )?,
                None => c.execute("DELETE FROM holds WHERE claim_id = $1", &[&claim_id])?,
            };
            Ok(())
        })
    }

    fn hold_count(&self) -> usize {
        self.count("SELECT count(*) FROM holds", &[])
    }

    fn purge_claim(&self, claim_id: &str) -> Result<Option<usize>, StoreError> {
        self.with_store(|c| {
            let mut tx = c.transaction().map_err(pg)?;
            // Lock the head row: an intake of the same claim waits for this purge.
            let Some(head) = tx
                .query_opt(
                    "SELECT revision FROM claims WHERE claim_id = $1 FOR UPDATE",
                    &[&claim_id],
                )
                .map_err(pg)?
            else {
                return Ok(None);
            };
            if tx
                .query_opt("SELECT 1 FROM holds WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?
                .is_some()
            {
                return Ok(None);
            }
            let rev: i32 = head.get(0);
            let latest: Option<DecisionRecord> = tx
                .query_opt(
                    "SELECT record FROM revisions WHERE claim_id = $1 AND revision = $2",
                    &[&claim_id, &rev],
                )
                .map_err(pg)?
                .map(|r| decode("decision record", &r.get::<_, String>(0)))
                .transpose()?;
            let revs = tx
                .execute("DELETE FROM revisions WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?;
            let outs = tx
                .execute(
                    "DELETE FROM outcome_revisions WHERE claim_id = $1",
                    &[&claim_id],
                )
                .map_err(pg)?;
            tx.execute("DELETE FROM outcomes WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?;
            tx.execute("DELETE FROM queue_items WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?;
            tx.execute(
                "DELETE FROM claim_nodes WHERE claim_hash = $1",
                &[&(stable_hash(claim_id) as i64)],
            )
            .map_err(pg)?;
            let mut events = 0;
            if let Some(r) = &latest {
                let ev = events_of(&r.claim);
                events = ev.len();
                let (ents, ats, hs) = columns(&ev);
                tx.execute(
                    "DELETE FROM history h USING unnest($1::text[], $2::bigint[], $3::bigint[]) AS d(e, a, c)
                     WHERE h.entity = d.e AND h.at = d.a AND h.claim_hash = d.c",
                    &[&ents, &ats, &hs],
                )
                .map_err(pg)?;
            }
            tx.execute("DELETE FROM claims WHERE claim_id = $1", &[&claim_id])
                .map_err(pg)?;
            tx.commit().map_err(pg)?;
            Ok(Some(1 + revs as usize + outs as usize + events))
        })
    }

    fn history_view<'a>(&'a self, claim: &Claim) -> Result<Box<dyn HistoryView + 'a>, StoreError> {
        // A region's list is long and features read only its last weeks: fetch those alone.
        let (regions, keys): (Vec<String>, Vec<String>) =
            claim.entity_keys().into_iter().partition(|k| {
                k.strip_prefix(crate::claim::REGION_KIND)
                    .is_some_and(|rest| rest.starts_with(':'))
            });
        let t = claim.event_time();
        let from = t - LONG_WINDOW_DAYS * DAY;
        let region_from = t - crate::features::REGION_WINDOW_DAYS * DAY;
        self.with(|c| {
            let mut map: HashMap<String, Vec<HistoryEvent>> = HashMap::new();
            for r in c.query(
                "SELECT entity, at, claim_hash, claimant, amount FROM history
                 WHERE ((entity = ANY($1) AND at >= $2) OR (entity = ANY($4) AND at >= $5))
                   AND at < $3
                 ORDER BY entity, at, claim_hash",
                &[&keys, &from, &t, &regions, &region_from],
            )? {
                map.entry(r.get(0)).or_default().push(HistoryEvent {
                    at: r.get(1),
                    claim: r.get::<_, i64>(2) as u64,
                    claimant: r.get::<_, i64>(3) as u64,
                    amount: r.get(4),
                });
            }
            // The order sled reads in: time, then claim hash as unsigned.
            for v in map.values_mut() {
                v.sort_by_key(|e| (e.at, e.claim));
            }
            Ok(Box::new(Prefetched(map)) as Box<dyn HistoryView + 'a>)
        })
    }

    fn graph(&self) -> &dyn crate::graph::GraphSource {
        self
    }

    fn rings(&self, from: i64) -> Result<Vec<crate::graph::RingRecord>, StoreError> {
        self.with_store(|c| {
            c.query(
                "SELECT record FROM rings WHERE last_at >= $1 ORDER BY id",
                &[&from],
            )
            .map_err(pg)?
            .iter()
            .map(|r| decode("ring record", &r.get::<_, String>(0)))
            .collect()
        })
    }

    fn ring(&self, id: &str) -> Result<Option<crate::graph::RingRecord>, StoreError> {
        self.with_store(|c| {
            c.query_opt("SELECT record FROM rings WHERE id = $1", &[&id])
                .map_err(pg)?
                .map(|r| decode("ring record", &r.get::<_, String>(0)))
                .transpose()
        })
    }

    fn history_claim_ids(
        &self,
        entity: &str,
        from: i64,
        to: i64,
    ) -> Result<Vec<String>, StoreError> {
        let mut rows: Vec<(i64, u64, String)> = self.with(|c| {
            Ok(c.query(
                "SELECT at, claim_hash, claim_id FROM history
                 WHERE entity = $1 AND at >= $2 AND (at < $3 OR $3 = 9223372036854775807)",
                &[&entity, &from, &to],
            )?
            .iter()
            .map(|r| (r.get(0), r.get::<_, i64>(1) as u64, r.get(2)))
            .collect())
        })?;
        // sled's order: time, then claim hash as unsigned.
        rows.sort_unstable();
        Ok(rows.into_iter().map(|(_, _, id)| id).collect())
    }

    fn history_dump(&self) -> Result<Vec<HistoryRow>, StoreError> {
        let mut rows = self.with(|c| {
            Ok(c.query(
                "SELECT entity, at, claim_hash, claimant, amount, claim_id FROM history",
                &[],
            )?
            .iter()
            .map(|r| HistoryRow {
                entity: r.get(0),
                at: r.get(1),
                claim: r.get::<_, i64>(2) as u64,
                claimant: r.get::<_, i64>(3) as u64,
                amount: r.get(4),
                claim_id: r.get(5),
            })
            .collect::<Vec<_>>())
        })?;
        rows.sort_by(|a, b| a.partial_cmp(b).unwrap_or(std::cmp::Ordering::Equal));
        Ok(rows)
    }
}

/// Entity, time and claim-hash columns of history events, for `unnest`.
fn columns(events: &[(String, HistoryEvent)]) -> (Vec<String>, Vec<i64>, Vec<i64>) {
    (
        events.iter().map(|(k, _)| k.clone()).collect(),
        events.iter().map(|(_, e)| e.at).collect(),
        events.iter().map(|(_, e)| e.claim as i64).collect(),
    )
}
