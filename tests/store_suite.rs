//! One behaviour suite, run against every store back end: the embedded sled store always, and
//! PostgreSQL when `POSTGRES_TEST_URL` names a server (`.ci/run` starts one; each test gets a
//! database of its own). With `STORE_SUITE_REQUIRE_POSTGRES=1` a missing server fails the
//! PostgreSQL half instead of skipping it.
//!
//! The expected values come from outside the store: features are compared with
//! `features::compute` over an in-memory history built claim by claim (the same function
//! training uses, which never touches a store), and counts with what the test itself did.

use chrono::{NaiveDate, TimeZone, Utc};
use std::collections::{BTreeMap, BTreeSet, HashSet};
use std::path::Path;
use std::sync::{Arc, Mutex};
use weir::features::{self, MemoryHistory};
use weir::feedback::{Outcome, OutcomeReport};
use weir::model::Model;
use weir::rules::{Queue, Routing, RuleSet};
use weir::service::Service;
use weir::store::{IntakeStatus, Store, StoreError};

mod common;
use common::{artifact, fresh_database, tempdir};

fn service_on(store: Store) -> Service {
    let model = Model::new(artifact().clone()).unwrap();
    let rules =
        RuleSet::read(&Path::new(env!("CARGO_MANIFEST_DIR")).join("config/rules.toml")).unwrap();
    Service::new(store, model, rules, Routing::default(), 3600)
}

fn sled_store() -> Option<Store> {
    Some(Store::open(&tempdir("sled").join("store"), 16 << 20).unwrap())
}

/// A fresh PostgreSQL database for one test, or `None` (skipped) without a server.
fn pg_store() -> Option<Store> {
    let Ok(url) = std::env::var("POSTGRES_TEST_URL") else {
        assert!(
            std::env::var("STORE_SUITE_REQUIRE_POSTGRES").as_deref() != Ok("1"),
            "STORE_SUITE_REQUIRE_POSTGRES=1 but POSTGRES_TEST_URL is not set"
        );
        eprintln!("skipped: POSTGRES_TEST_URL not set (no PostgreSQL to test against)");
        return None;
    };
    Some(fresh_pg(&url))
}

/// Create an empty database for this test and open a store on it (migrations applied).
fn fresh_pg(url: &str) -> Store {
    let store = weir::pg_store::PgStore::connect(&fresh_database(url), 6).expect("connect");
    assert_eq!(store.schema_versions().unwrap(), vec![1, 2]);
    // A second start applies nothing (migrations are recorded).
    assert!(store.migrate().unwrap().is_empty());
    Store::from_backend(Arc::new(store))
}

fn now() -> chrono::DateTime<Utc> {
    Utc.with_ymd_and_hms(2026, 6, 1, 12, 0, 0).unwrap()
}

fn report(outcome: Outcome) -> OutcomeReport {
    OutcomeReport {
        outcome,
        amount_saved: 100.0,
        amount_recovered: 0.0,
        adjudicated_on: NaiveDate::from_ymd_opt(2026, 6, 1).unwrap(),
        decided_by: "inv-7".into(),
    }
}

fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap()
}

/// Every decision's features equal the store-free computation over the claims before it, and
/// the history index holds exactly one row per (entity, claim).
fn features_match_store_free_history(store: Store) {
    let svc = service_on(store);
    let claims = weir::demo_data::generate(400, 5);
    let mut reference = MemoryHistory::new();
    let mut expected_rows = BTreeSet::new();
    let graph = svc.model().artifact.graph.clone();
    for d in &claims {
        let want = features::compute_in_memory(&d.claim, &reference, &graph);
        // The claim's component as the decision records it, from the same history in memory.
        let want_component = weir::graph::component_of_new(&reference, &graph, &d.claim)
            .unwrap()
            .reference(d.claim.event_time());
        reference.record(&d.claim);
        for (entity, e) in features::events_of(&d.claim) {
            expected_rows.insert((entity, e.at, e.claim));
        }
        let (rec, status) = svc.decide(d.claim.clone(), now()).unwrap();
        assert_eq!(status, IntakeStatus::New);
        let got: Vec<f64> = features::CATALOGUE
            .iter()
            .map(|f| rec.features[f.name])
            .collect();
        assert_eq!(got, want.to_vec(), "claim {}", d.claim.claim_id);
        assert_eq!(
            rec.component.as_ref(),
            Some(&want_component),
            "component of {}",
            d.claim.claim_id
        );
    }
    // Rings read back: each is the component in memory of its members, as of the same instant.
    let (as_of, rings) = svc.rings(now().timestamp(), 50).unwrap();
    assert!(
        !rings.is_empty(),
        "400 demo claims hold components of 2+ claimants"
    );
    let from = as_of - graph.window_days * features::DAY;
    for r in &rings {
        let first = &r.members[0].claim_id;
        let seed = weir::graph::GraphSource::nodes(&reference, &[features::stable_hash(first)])
            .unwrap()
            .pop()
            .flatten()
            .unwrap();
        let want = weir::graph::component(&reference, &graph, seed, from, i64::MAX, true).unwrap();
        let got: Vec<&str> = r.members.iter().map(|m| m.claim_id.as_str()).collect();
        let expected: Vec<&str> = want.members.iter().map(|m| m.claim_id.as_str()).collect();
        assert_eq!(got, expected, "ring {}", r.id);
        assert_eq!(r.id, want.id);
        assert!(r.facts.claimants >= 2);
    }
    assert!(
        rings.windows(2).all(|w| w[0].score >= w[1].score),
        "ranked by score"
    );
    let rows: BTreeSet<_> = svc
        .store
        .history_dump()
        .unwrap()
        .into_iter()
        .map(|r| (r.entity, r.at, r.claim))
        .collect();
    assert_eq!(rows, expected_rows);
    assert_eq!(svc.store.claim_count(), claims.len());
    for q in Queue::ALL {
        assert_eq!(svc.store.queue_depth(q), svc.store.count_queue(q));
    }
}

/// Same content: the stored decision, nothing written. New content: a revision whose history
/// replaces the old one. A second writer of an existing revision: refused whole.
fn duplicates_revisions_and_conflicts(store: Store) {
    let svc = service_on(store);
    let mut claim = weir::demo_data::generate(1, 3).remove(0).claim;
    let (first, s1) = svc.decide(claim.clone(), now()).unwrap();
    assert_eq!(s1, IntakeStatus::New);
    let sizes = svc.store.tree_sizes();
    let (again, s2) = svc.decide(claim.clone(), now()).unwrap();
    assert_eq!((s2, &again), (IntakeStatus::Duplicate, &first));
    assert_eq!(svc.store.tree_sizes(), sizes);

    claim.claimed_amount += 1234.0;
    let (second, s3) = svc.decide(claim.clone(), now()).unwrap();
    assert_eq!((s3, second.revision), (IntakeStatus::Revised, 2));
    assert_eq!(svc.store.revisions(&claim.claim_id).unwrap().len(), 2);
    let amounts: HashSet<u64> = svc
        .store
        .history_dump()
        .unwrap()
        .iter()
        .map(|r| r.amount.to_bits())
        .collect();
    assert_eq!(amounts, HashSet::from([claim.claimed_amount.to_bits()]));

    // From the stream: a version from an earlier message, arriving after a later one (a late
    // redelivery, or two instances racing), is answered with the stored decision.
    let mut older = weir::demo_data::generate(2, 4).remove(1).claim;
    older.claim_id = "STREAMED-1".into();
    let mut newer = older.clone();
    newer.claimed_amount += 10.0;
    let (n, s) = svc.decide_from_stream(newer.clone(), now(), 12).unwrap();
    assert_eq!(
        (s, n.revision, n.stream_sequence),
        (IntakeStatus::New, 1, Some(12))
    );
    let (o, s) = svc.decide_from_stream(older.clone(), now(), 11).unwrap();
    assert_eq!((s, &o), (IntakeStatus::Duplicate, &n));
    assert_eq!(svc.store.revisions(&older.claim_id).unwrap().len(), 1);
    newer.claimed_amount += 10.0;
    let (r, s) = svc.decide_from_stream(newer, now(), 13).unwrap();
    assert_eq!((s, r.revision), (IntakeStatus::Revised, 2));

    let sizes = svc.store.tree_sizes();
    let again = svc.store.record(&second, Some(&first), None);
    match (svc.store.kind(), again) {
        ("postgres", Err(StoreError::Conflict(_))) => {}
        // sled has one process per folder, serialised by its lock: a rewrite of the same
        // revision can only come from that process, and replaces it.
        ("sled", Ok(())) => {}
        (k, r) => panic!("{k}: expected a conflict, got {r:?}"),
    }
    if svc.store.kind() == "postgres" {
        assert_eq!(svc.store.tree_sizes(), sizes, "nothing half-written");
    }
}

/// Many workers leasing from one queue at once never get the same item; a lapsed lease is
/// offered again; a released item can be leased again.
fn leases_are_never_shared(store: Store) {
    let svc = service_on(store);
    for d in weir::demo_data::generate(600, 9) {
        svc.decide(d.claim, now()).unwrap();
    }
    let q = Queue::DeskCheck;
    let depth = svc.store.queue_depth(q);
    assert!(depth >= 20, "only {depth} items to lease");
    let t = now().timestamp();
    let taken = Mutex::new(Vec::new());
    std::thread::scope(|s| {
        for w in 0..4 {
            let (store, taken) = (&svc.store, &taken);
            s.spawn(move || {
                while let Some(item) = store.lease_next(q, &format!("inv-{w}"), t, 600).unwrap() {
                    taken.lock().unwrap().push(item.claim_id);
                }
            });
        }
    });
    let taken = taken.into_inner().unwrap();
    let distinct: HashSet<_> = taken.iter().collect();
    assert_eq!((taken.len(), distinct.len()), (depth, depth));
    assert!(
        svc.store
            .lease_next(q, "late", t + 1, 600)
            .unwrap()
            .is_none()
    );
    // Highest priority first, for a fresh lease after the others lapse.
    let page = svc.store.queue_page(q, 0, depth).unwrap();
    assert!(page.windows(2).all(|w| w[0].priority >= w[1].priority));
    let lapsed = svc.store.lease_next(q, "next-day", t + 601, 600).unwrap();
    assert_eq!(lapsed.map(|i| i.claim_id), Some(page[0].claim_id.clone()));
    assert!(svc.store.release(q, &page[1].claim_id).unwrap());
    let again = svc
        .store
        .lease_next(q, "inv-9", t + 2, 600)
        .unwrap()
        .unwrap();
    assert_eq!(again.claim_id, page[1].claim_id);
    assert!(!svc.store.release(q, "no-such-claim").unwrap());
}

/// An outcome takes the claim out of its queue once; posting it again changes nothing; a
/// different outcome is a second revision, never a second count.
fn outcomes_are_counted_once(store: Store) {
    let rt = runtime();
    let svc = service_on(store);
    // sled's group-commit loop runs on the runtime that awaits durability.
    rt.block_on(async { svc.store.start() });
    let mut queued = None;
    for d in weir::demo_data::generate(300, 21) {
        let (rec, _) = svc.decide(d.claim, now()).unwrap();
        if rec.queue != Queue::NoReview && queued.is_none() {
            queued = Some(rec);
        }
    }
    let rec = queued.expect("a queued claim");
    let depth = svc.store.queue_depth(rec.queue);
    let (o1, created) = rt
        .block_on(svc.record_outcome(&rec.claim_id, report(Outcome::Genuine), now()))
        .unwrap()
        .unwrap();
    assert!(created);
    assert_eq!(svc.store.queue_depth(rec.queue), depth - 1);
    let (o2, created) = rt
        .block_on(svc.record_outcome(&rec.claim_id, report(Outcome::Genuine), now()))
        .unwrap()
        .unwrap();
    assert!(!created);
    assert_eq!(o1, o2);
    rt.block_on(svc.record_outcome(&rec.claim_id, report(Outcome::Inflated), now()))
        .unwrap();
    let hist = svc.store.outcome_history(&rec.claim_id).unwrap();
    assert_eq!(hist.iter().map(|o| o.revision).collect::<Vec<_>>(), [1, 2]);
    let mut labelled = 0;
    svc.store
        .for_each_latest(&mut |_, o| labelled += usize::from(o.is_some()))
        .unwrap();
    assert_eq!(labelled, 1);
    assert!(
        rt.block_on(svc.record_outcome("unknown", report(Outcome::Genuine), now()))
            .unwrap()
            .is_none()
    );
}

/// Retention: a held claim stays whole, every other claim leaves every table; lifting the
/// hold and purging again empties the store. Person records and the export agree with what
/// was filed.
fn holds_purges_and_person_records(store: Store) {
    let rt = runtime();
    let svc = service_on(store);
    // sled's group-commit loop runs on the runtime that awaits durability.
    rt.block_on(async { svc.store.start() });
    let claims = weir::demo_data::generate(120, 33);
    for d in &claims {
        svc.decide(d.claim.clone(), now()).unwrap();
    }
    // Export: every claim once, in claim id order.
    let mut buf = Vec::new();
    let (n, with_outcome) = svc.store.export_training(&mut buf).unwrap();
    assert_eq!((n, with_outcome), (claims.len(), 0));
    let mut order = Vec::new();
    svc.store
        .for_each_latest(&mut |r, _| order.push(r.claim_id.clone()))
        .unwrap();
    let mut sorted = order.clone();
    sorted.sort();
    assert_eq!(order, sorted);

    // Person records: exactly the claims naming the claimant.
    let person = claims[0].claim.claimant_id.clone();
    let want: BTreeSet<String> = claims
        .iter()
        .filter(|d| d.claim.claimant_id == person || d.claim.parties.iter().any(|p| p.id == person))
        .map(|d| d.claim.claim_id.clone())
        .collect();
    let got: BTreeSet<String> = svc
        .store
        .person_records(&person)
        .unwrap()
        .claims
        .into_iter()
        .map(|c| c.claim_id)
        .collect();
    assert_eq!(got, want);

    let kept = claims[5].claim.claim_id.clone();
    let hold = weir::store::Hold {
        claim_id: kept.clone(),
        reason: "litigation".into(),
        set_at: now().to_rfc3339(),
        set_by: "admin".into(),
    };
    assert!(rt.block_on(svc.set_hold(&kept, Some(hold))).unwrap());
    let later = now() + chrono::Duration::days(400);
    let r = rt.block_on(svc.purge(30, later)).unwrap();
    assert_eq!((r.purged_claims, r.kept_on_hold), (claims.len() - 1, 1));
    assert_eq!(svc.store.claim_count(), 1);
    assert_eq!(svc.store.revisions(&kept).unwrap().len(), 1);
    let rows = svc.store.history_dump().unwrap();
    assert!(rows.iter().all(|r| r.claim_id == kept));
    assert_eq!(rows.len(), claims[5].claim.entity_keys().len());
    rt.block_on(svc.set_hold(&kept, None)).unwrap();
    rt.block_on(svc.purge(30, later)).unwrap();
    assert_eq!(svc.store.tree_sizes(), [0; 8]);
}

/// Writers naming a common key wait for each other; on PostgreSQL, writers with no key in
/// common do not.
fn locks_serialise_shared_keys(store: Store) {
    let log = Mutex::new(Vec::new());
    let key = |s: &str| vec![s.to_string()];
    std::thread::scope(|s| {
        let first = store.lock(&[key("repairer:R-1"), key("claimant:K-1")].concat());
        let first = first.unwrap();
        let (st, log2) = (&store, &log);
        let waiter = s.spawn(move || {
            let _g = st
                .lock(&[key("repairer:R-1"), key("policy:P-9")].concat())
                .unwrap();
            log2.lock().unwrap().push("second");
        });
        std::thread::sleep(std::time::Duration::from_millis(300));
        log.lock().unwrap().push("first done");
        drop(first);
        waiter.join().unwrap();
    });
    assert_eq!(*log.lock().unwrap(), ["first done", "second"]);
    if store.kind() == "postgres" {
        let _a = store.lock(&key("repairer:R-1")).unwrap();
        let t0 = std::time::Instant::now();
        let b = std::thread::scope(|s| s.spawn(|| store.lock(&key("repairer:R-2")).is_ok()).join());
        assert!(b.unwrap());
        assert!(t0.elapsed() < std::time::Duration::from_secs(5));
    }
}

/// Linked claims (the claim page's view) name the claims sharing a party within the window.
fn linked_claims_by_party(store: Store) {
    let svc = service_on(store);
    let claims = weir::demo_data::generate(300, 44);
    for d in &claims {
        svc.decide(d.claim.clone(), now()).unwrap();
    }
    let window = 90 * 86_400;
    for d in claims.iter().step_by(37) {
        let keys: BTreeSet<String> = d
            .claim
            .link_keys()
            .into_iter()
            .filter(|k| !k.starts_with("claimant:"))
            .collect();
        let mut want = BTreeMap::<String, BTreeSet<String>>::new();
        for o in &claims {
            if o.claim.claim_id == d.claim.claim_id
                || (o.claim.event_time() - d.claim.event_time()).abs() > window
            {
                continue;
            }
            for k in o.claim.link_keys() {
                if keys.contains(&k) {
                    want.entry(k).or_default().insert(o.claim.claim_id.clone());
                }
            }
        }
        let mut got = BTreeMap::<String, BTreeSet<String>>::new();
        for (k, id) in svc.store.linked_claims(&d.claim, window).unwrap() {
            got.entry(k).or_default().insert(id);
        }
        // The view includes the claimant key only through parties; compare the others.
        got.retain(|k, _| keys.contains(k));
        assert_eq!(got, want, "claim {}", d.claim.claim_id);
    }
}

/// A reason that links claims names them: four claimants paid into one bank account, and the
/// next claim's referral (the shipped rule on shared payee accounts) lists their four claims,
/// and not its own claimant's earlier claim into the same account.
fn link_reasons_name_the_linked_claims(store: Store) {
    let svc = service_on(store);
    let mut base = weir::demo_data::generate(1, 3).remove(0).claim;
    base.parties = vec![weir::claim::Party {
        role: weir::claim::Role::PayeeAccount,
        id: "B-SHARED".into(),
    }];
    base.address_id = None;
    let mut ids = Vec::new();
    for i in 0..6 {
        let mut c = base.clone();
        c.claim_id = format!("C-LINK-{i}");
        c.claimant_id = format!("K-LINK-{i}");
        c.policy_id = format!("P-LINK-{i}");
        c.reported_at = base.reported_at + chrono::Duration::days(i);
        if i == 4 {
            // The last claimant's own earlier claim into the same account: not a link.
            c.claimant_id = "K-LINK-5".into();
            c.policy_id = "P-LINK-5".into();
        }
        ids.push(c.claim_id.clone());
        let (rec, _) = svc.decide(c, now()).unwrap();
        if i == 5 {
            let reason = rec
                .reasons
                .iter()
                .find(|r| r.code == "rule.shared-payee-account")
                .unwrap_or_else(|| panic!("no shared-account reason: {:?}", rec.reasons));
            for id in &ids[..4] {
                assert!(
                    reason.text.contains(id.as_str()),
                    "{id} missing: {}",
                    reason.text
                );
            }
            assert!(!reason.text.contains("C-LINK-4"), "{}", reason.text);
            assert!(
                !reason.text.contains("C-LINK-5"),
                "names itself: {}",
                reason.text
            );
        }
    }
}

/// Claims for the graph tests: each its own claimant and policy, no address, the parties
/// given, reported a day apart.
fn graph_claims(
    prefix: &str,
    n: usize,
    start_hour: i64,
    parties: &dyn Fn(usize) -> Vec<(weir::claim::Role, String)>,
) -> Vec<weir::claim::Claim> {
    let base = weir::demo_data::generate(1, 3).remove(0).claim;
    (0..n)
        .map(|i| {
            let mut c = base.clone();
            c.claim_id = format!("C-{prefix}-{i}");
            c.claimant_id = format!("K-{prefix}-{i}");
            c.policy_id = format!("P-{prefix}-{i}");
            c.address_id = None;
            c.reported_at = base.reported_at + chrono::Duration::hours(start_hour + i as i64);
            c.parties = parties(i)
                .into_iter()
                .map(|(role, id)| weir::claim::Party { role, id })
                .collect();
            c
        })
        .collect()
}

/// A payee account naming more claims than its kind's cap (a leasing company's account, say)
/// links nothing: two unrelated pairs that both use it stay apart, and the hub is reported.
/// Below the cap, the same account does link them (the check can fail).
fn a_hub_does_not_merge_unrelated_claims(store: Store) {
    use weir::claim::Role::{PayeeAccount, Witness};
    let svc = service_on(store);
    let cap = svc.model().artifact.graph.cap("payee_account") as usize;
    let hub = |prefix: &str, n: usize| {
        let mut claims = graph_claims(prefix, n, 0, &|_| {
            vec![(PayeeAccount, format!("B-{prefix}"))]
        });
        // Two pairs, each tied by a witness of its own, each with one claim paid into the account.
        let pairs = graph_claims(&format!("{prefix}P"), 4, n as i64, &|i| {
            let mut p = vec![(Witness, format!("W-{prefix}-{}", i / 2))];
            if i % 2 == 0 {
                p.push((PayeeAccount, format!("B-{prefix}")));
            }
            p
        });
        claims.extend(pairs);
        claims
    };
    for c in hub("HUB", cap + 5) {
        svc.decide(c, now()).unwrap();
    }
    let last = svc.store.head("C-HUBP-3").unwrap().unwrap();
    let rec = svc
        .store
        .decision("C-HUBP-3", last.revision)
        .unwrap()
        .unwrap();
    let c = rec.component.unwrap();
    assert_eq!(c.claims, 2, "the pair alone: {c:?}");
    let as_of = svc.rings_as_of(now().timestamp()).unwrap();
    let comp = svc.component_of("C-HUBP-2", as_of).unwrap().unwrap();
    let ids: Vec<&str> = comp.members.iter().map(|m| m.claim_id.as_str()).collect();
    assert_eq!(ids, ["C-HUBP-2", "C-HUBP-3"]);
    assert!(
        comp.hubs
            .iter()
            .any(|h| h.key == "payee_account:B-HUB" && h.claims > cap),
        "hub reported: {:?}",
        comp.hubs
    );
    // Below the cap the account links everything that names it.
    for c in hub("LOW", 3) {
        svc.decide(c, now()).unwrap();
    }
    let comp = svc
        .component_of(
            "C-LOWP-2",
            as_of.max(svc.rings_as_of(now().timestamp()).unwrap()),
        )
        .unwrap()
        .unwrap();
    assert_eq!(comp.members.len(), 3 + 4, "{:?}", comp.members);
    assert!(comp.hubs.is_empty());
}

/// A confirmed fraud raises the open referred claims of its component, by the stated share per
/// confirmed claim and no further than the stated bound, with a reason naming the party and an
/// audit revision saying why; posting the same outcome again changes nothing.
fn confirmed_fraud_raises_linked_open_claims(store: Store) {
    use weir::claim::Role::PayeeAccount;
    let svc = service_on(store);
    let rt = runtime();
    // sled's group-commit loop runs on the runtime that awaits durability.
    rt.block_on(async { svc.store.start() });
    let claims = graph_claims("RING", 7, 0, &|_| vec![(PayeeAccount, "B-RING".into())]);
    let mut base = BTreeMap::new();
    for c in claims {
        let (rec, _) = svc.decide(c, now()).unwrap();
        base.insert(rec.claim_id.clone(), rec);
    }
    // Claims 3 to 6 share the account with three or more others: referred by the shipped rule.
    let open: Vec<String> = (3..7).map(|i| format!("C-RING-{i}")).collect();
    for id in &open {
        assert_eq!(base[id].queue, Queue::Investigate, "{id}");
    }
    let latest = |id: &str| {
        let h = svc.store.head(id).unwrap().unwrap();
        svc.store.decision(id, h.revision).unwrap().unwrap()
    };
    rt.block_on(svc.record_outcome("C-RING-0", report(Outcome::FraudConfirmed), now()))
        .unwrap()
        .unwrap();
    for id in &open {
        let rec = latest(id);
        assert_eq!(rec.revision, 2, "{id}");
        let want = base[id].priority * (1.0 + weir::rings::RING_RAISE_PER_CONFIRMED);
        assert!(
            (rec.priority - want).abs() < 1e-6 * want,
            "{id}: {} vs {want}",
            rec.priority
        );
        let reason = &rec.reasons[0];
        assert_eq!(reason.code, "ring.confirmed");
        assert!(
            reason.text.contains("payee account B-RING")
                && reason.text.contains("1 claim confirmed as fraud")
                && reason.text.contains("C-RING-0"),
            "{}",
            reason.text
        );
        assert!(rec.revised_because.as_deref().unwrap().contains("C-RING-0"));
        let item = svc
            .store
            .queue_item(Queue::Investigate, id)
            .unwrap()
            .unwrap();
        assert_eq!(item.priority, rec.priority);
    }
    // The same post again: nothing new.
    rt.block_on(svc.record_outcome("C-RING-0", report(Outcome::FraudConfirmed), now()))
        .unwrap();
    assert_eq!(latest(&open[0]).revision, 2);
    // Two more confirmed: 1 + 3 x 0.5 = 2.5, held at the bound.
    for id in ["C-RING-1", "C-RING-2"] {
        rt.block_on(svc.record_outcome(id, report(Outcome::FraudConfirmed), now()))
            .unwrap();
    }
    for id in &open {
        let rec = latest(id);
        let want = base[id].priority * weir::rings::RING_RAISE_MAX;
        assert!(
            (rec.priority - want).abs() < 1e-6 * want,
            "{id}: {} vs {want}",
            rec.priority
        );
        assert!(
            rec.reasons[0].text.contains("3 claims confirmed as fraud"),
            "{}",
            rec.reasons[0].text
        );
        assert_eq!(
            rec.reasons
                .iter()
                .filter(|r| r.code == "ring.confirmed")
                .count(),
            1
        );
    }
}

macro_rules! suite {
    ($($name:ident),* $(,)?) => {
        mod sled_backend {
            $(#[test]
            fn $name() {
                if let Some(s) = super::sled_store() {
                    super::$name(s);
                }
            })*
        }
        mod postgres_backend {
            $(#[test]
            fn $name() {
                if let Some(s) = super::pg_store() {
                    super::$name(s);
                }
            })*
        }
    };
}

suite!(
    features_match_store_free_history,
    duplicates_revisions_and_conflicts,
    leases_are_never_shared,
    outcomes_are_counted_once,
    holds_purges_and_person_records,
    locks_serialise_shared_keys,
    linked_claims_by_party,
    link_reasons_name_the_linked_claims,
    a_hub_does_not_merge_unrelated_claims,
    confirmed_fraud_raises_linked_open_claims,
);

/// The sled store's in-memory entity histories answer exactly as its index does, through
/// revisions that move a claim's events, purges, and a budget so small that entries are
/// dropped all the time. Three stores get the same writes: no cache, a tiny cache, the
/// default cache; every decision's features agree, and so do features of claims never stored
/// against the history built in memory from the surviving claims (the store-free oracle).
#[test]
fn sled_history_cache_answers_like_the_index() {
    let open = |name: &str, cache: u64| {
        let s = weir::store::SledStore::open(&tempdir(name).join("store"), 8 << 20, cache).unwrap();
        service_on(Store::from_backend(Arc::new(s)))
    };
    let stores = [
        open("cache-off", 0),
        open("cache-tiny", 16 << 10),
        open("cache-default", weir::store::DEFAULT_HISTORY_CACHE_BYTES),
    ];
    // Spread over about two and a half years (claim i moved i days on), so that the trailing
    // year of the latest claims leaves out history the earliest claims' year holds.
    let mut claims = weir::demo_data::generate(900, 8);
    for (i, d) in claims.iter_mut().enumerate() {
        let days = chrono::Days::new(i as u64);
        let c = &mut d.claim;
        c.reported_at += chrono::Duration::days(i as i64);
        c.loss_date = c.loss_date + days;
        c.policy_start = c.policy_start + days;
    }
    let (stored, probes) = claims.split_at(700);
    let mut latest: BTreeMap<String, weir::claim::Claim> = BTreeMap::new();
    let step = |c: &weir::claim::Claim, latest: &mut BTreeMap<String, weir::claim::Claim>| {
        let feats: Vec<Vec<f64>> = stores
            .iter()
            .map(|svc| {
                let (rec, _) = svc.decide(c.clone(), now()).unwrap();
                features::CATALOGUE
                    .iter()
                    .map(|f| rec.features[f.name])
                    .collect()
            })
            .collect();
        assert_eq!(feats[0], feats[1], "tiny cache, claim {}", c.claim_id);
        assert_eq!(feats[0], feats[2], "default cache, claim {}", c.claim_id);
        latest.insert(c.claim_id.clone(), c.clone());
    };
    for (i, d) in stored.iter().enumerate() {
        step(&d.claim, &mut latest);
        if i % 7 == 3 {
            // A revision naming another repairer and amount: its old events must leave.
            let mut r = d.claim.clone();
            r.claimed_amount += 10.0;
            for p in &mut r.parties {
                p.id = format!("{}-rev", p.id);
            }
            step(&r, &mut latest);
        }
        if i % 11 == 5 {
            let gone = &stored[i / 2].claim.claim_id;
            if latest.remove(gone).is_some() {
                for svc in &stores {
                    assert!(
                        svc.store.purge_claim(gone).unwrap().is_some(),
                        "purge {gone}"
                    );
                }
            }
        }
    }
    let mut reference = MemoryHistory::new();
    for c in latest.values() {
        reference.record(c);
    }
    // New claims after the stored ones, then the stored claims again from the latest back to
    // the earliest: windows before the cached lists' bounds (which moved on as time passed)
    // must be read from the index, not answered from a list that no longer holds them.
    for c in probes
        .iter()
        .map(|d| &d.claim)
        .chain(latest.values().rev())
        .chain(latest.values())
    {
        let settings = stores[0].model().artifact.graph.clone();
        let want = features::compute_in_memory(c, &reference, &settings);
        for svc in &stores {
            let ring = weir::graph::component_of_new(svc.store.graph(), &settings, c)
                .unwrap()
                .summary(features::stable_hash(&c.claim_id), c.event_time());
            let got = features::compute(c, &*svc.store.history_view(c).unwrap(), &ring);
            assert_eq!(got.to_vec(), want.to_vec(), "probe {}", c.claim_id);
        }
    }
}
