//! Property-based fuzzing (proptest) of the two places hostile input reaches first: claim
//! parsing and validation, and the rule layer (rule files and routing). `cargo fuzz` needs a
//! nightly toolchain, which CI does not have; proptest runs on stable, shrinks failures to a
//! small case, and records them in `tests/fuzz.proptest-regressions` so they are replayed.
//!
//! More cases: `PROPTEST_CASES=100000 cargo test --release --test fuzz`.

use proptest::prelude::*;
use serde_json::{Value, json};
use weir::claim::{Claim, ClaimError};
use weir::features::{N_FEATURES, names};
use weir::rules::{self, Inputs, Queue, Routing, RuleSet};

fn valid_claim() -> Value {
    json!({
        "claim_id": "F-1", "policy_id": "P-1", "claimant_id": "K-1", "line": "motor",
        "loss_date": "2025-03-10", "loss_time": "23:15", "reported_at": "2025-03-12T08:00:00Z",
        "policy_start": "2025-03-01", "claimed_amount": 9000.0, "sum_insured": 10000,
        "currency": "EUR", "region": "north", "address_id": "A-1",
        "parties": [{"role": "repairer", "id": "R-9"}, {"role": "payee_account", "id": "B-3"}],
        "circumstances": {"police_report": false, "injury": false, "theft": true}
    })
}

/// Any JSON value, a few levels deep, with the awkward cases over-represented.
fn any_json() -> impl Strategy<Value = Value> {
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        any::<i64>().prop_map(|n| json!(n)),
        any::<f64>()
            .prop_filter("JSON has no NaN or infinity", |f| f.is_finite())
            .prop_map(|f| json!(f)),
        prop_oneof![Just(-1.0), Just(0.0), Just(1e308), Just(-0.0), Just(5e-324)]
            .prop_map(|f: f64| json!(f)),
        ".{0,40}".prop_map(Value::String),
        prop_oneof![
            Just("2025-02-30"),
            Just("1899-12-31"),
            Just("2101-01-01"),
            Just("2025-03-12T08:00:00+14:00"),
            Just("motor"),
            Just("witness"),
            Just("../../etc/passwd"),
            Just("\u{0}"),
            Just("\u{202e}")
        ]
        .prop_map(|s: &str| Value::String(s.into())),
    ];
    leaf.prop_recursive(3, 24, 4, |inner| {
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..4).prop_map(Value::Array),
            prop::collection::btree_map("[a-z_]{1,12}", inner, 0..4)
                .prop_map(|m| Value::Object(m.into_iter().collect())),
        ]
    })
}

const FIELDS: [&str; 16] = [
    "claim_id",
    "policy_id",
    "claimant_id",
    "line",
    "loss_date",
    "loss_time",
    "reported_at",
    "policy_start",
    "claimed_amount",
    "sum_insured",
    "currency",
    "region",
    "address_id",
    "parties",
    "circumstances",
    "unexpected",
];

#[derive(Debug, Clone)]
enum Mutation {
    Set(usize, Value),
    Remove(usize),
    SetParty(usize, Value),
    SetCircumstance(String, Value),
}

fn mutation() -> impl Strategy<Value = Mutation> {
    prop_oneof![
        (0..FIELDS.len(), any_json()).prop_map(|(i, v)| Mutation::Set(i, v)),
        (0..FIELDS.len()).prop_map(Mutation::Remove),
        (0..3usize, any_json()).prop_map(|(i, v)| Mutation::SetParty(i, v)),
        ("[a-z_]{1,16}", any_json()).prop_map(|(k, v)| Mutation::SetCircumstance(k, v)),
    ]
}

fn apply(v: &mut Value, m: &Mutation) {
    match m {
        Mutation::Set(i, x) => {
            v[FIELDS[*i]] = x.clone();
        }
        Mutation::Remove(i) => {
            v.as_object_mut().unwrap().remove(FIELDS[*i]);
        }
        Mutation::SetParty(i, x) => {
            if let Some(a) = v.get_mut("parties").and_then(|p| p.as_array_mut()) {
                if *i < a.len() {
                    a[*i] = x.clone();
                } else {
                    a.push(x.clone());
                }
            }
        }
        Mutation::SetCircumstance(k, x) => {
            if let Some(o) = v.get_mut("circumstances").and_then(|c| c.as_object_mut()) {
                o.insert(k.clone(), x.clone());
            }
        }
    }
}

/// What every accepted claim must satisfy, whatever the input was.
fn check_invariants(c: &Claim) -> Result<(), TestCaseError> {
    prop_assert!(c.claimed_amount.is_finite() && c.claimed_amount > 0.0);
    prop_assert!(c.sum_insured.is_finite() && c.sum_insured > 0.0);
    prop_assert!(!c.claim_id.is_empty() && c.claim_id.len() <= weir::claim::MAX_STRING_BYTES);
    prop_assert!(!c.claim_id.chars().any(char::is_control));
    for p in &c.parties {
        prop_assert!(!p.id.is_empty() && !p.id.chars().any(char::is_control));
    }
    // Accepted claims survive their own serialisation unchanged (what the store relies on).
    let again = Claim::from_json(&serde_json::to_vec(c).unwrap());
    prop_assert_eq!(again.as_ref().ok(), Some(c));
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    /// Arbitrary bytes: an answer, never a panic; "not JSON" names a line and column.
    #[test]
    fn claim_parser_takes_any_bytes(bytes in prop::collection::vec(any::<u8>(), 0..600)) {
        match Claim::from_json(&bytes) {
            Ok(c) => check_invariants(&c)?,
            Err(ClaimError::NotJson { line, column, .. }) => prop_assert!(line >= 1 && column <= bytes.len() + 1),
            Err(ClaimError::Invalid(errs)) => prop_assert!(!errs.is_empty()),
        }
    }

    /// A valid claim with up to four random mutations: accepted claims keep every invariant;
    /// refused ones name at least one field, and every problem has a text.
    #[test]
    fn mutated_claims_are_accepted_whole_or_refused_with_fields(
        muts in prop::collection::vec(mutation(), 1..5)
    ) {
        let mut v = valid_claim();
        for m in &muts {
            apply(&mut v, m);
        }
        let bytes = serde_json::to_vec(&v).unwrap();
        match Claim::from_json(&bytes) {
            Ok(c) => check_invariants(&c)?,
            Err(ClaimError::Invalid(errs)) => {
                prop_assert!(!errs.is_empty());
                for e in &errs {
                    prop_assert!(!e.problem.is_empty());
                }
                prop_assert!(errs.iter().any(|e| !e.field.is_empty()), "{:?}", errs);
            }
            Err(e) => prop_assert!(false, "serialised JSON reported as not JSON: {}", e),
        }
    }

    /// Deep nesting and long strings are refused or accepted without exhausting the stack.
    #[test]
    fn deep_or_long_inputs_do_not_crash(depth in 1usize..5000, len in 0usize..70_000) {
        let deep = format!("{}{}", "[".repeat(depth), "]".repeat(depth));
        let _ = Claim::from_json(deep.as_bytes());
        let mut v = valid_claim();
        v["claim_id"] = json!("x".repeat(len));
        let r = Claim::from_json(&serde_json::to_vec(&v).unwrap());
        prop_assert_eq!(r.is_ok(), (1..=weir::claim::MAX_STRING_BYTES).contains(&len));
    }
}

fn operand_name() -> impl Strategy<Value = String> {
    let known: Vec<String> = names()
        .into_iter()
        .map(String::from)
        .chain(rules::SCORE_NAMES.iter().map(|s| s.to_string()))
        .collect();
    prop_oneof![
        60 => prop::sample::select(known),
        1 => "[a-z_]{1,12}",
    ]
}

fn number_text() -> impl Strategy<Value = String> {
    prop_oneof![
        60 => (-1e6f64..1e6).prop_map(|f| format!("{f:?}")),
        10 => Just("0".to_string()),
        1 => Just("nan".to_string()),
        1 => Just("inf".to_string()),
        1 => Just("-inf".to_string()),
        1 => Just("\"text\"".to_string()),
    ]
}

fn condition() -> impl Strategy<Value = String> {
    (
        operand_name(),
        prop_oneof![
            80 => prop::sample::select(vec!["<", "<=", ">", ">=", "==", "!="]),
            1 => Just("=~"),
        ],
        number_text(),
    )
        .prop_map(|(n, op, t)| format!("{{ value = \"{n}\", op = \"{op}\", than = {t} }}"))
}

fn rule_text() -> impl Strategy<Value = String> {
    (
        "[a-z-]{1,10}",
        prop::collection::vec(condition(), 1..3),
        prop::collection::vec(condition(), 0..2),
        prop::option::of(number_text()),
        prop::option::of(prop_oneof![
            20 => prop::sample::select(vec!["investigate", "desk_check"]),
            1 => prop::sample::select(vec!["audit", "no_review", "nowhere"]),
        ]),
        any::<bool>(),
    )
        .prop_map(|(id, all, any, points, queue, exempt)| {
            let mut s = format!("[[rule]]\nid = \"{id}\"\nreason = \"r\"\n");
            s += &format!("all = [{}]\nany = [{}]\n", all.join(", "), any.join(", "));
            if let Some(p) = points {
                s += &format!("add_priority = {p}\n");
            }
            if let Some(q) = queue {
                s += &format!("queue = \"{q}\"\n");
            }
            if exempt {
                s += "exempt = true\n";
            }
            s
        })
}

fn routing_inputs() -> impl Strategy<Value = (Vec<f64>, f64, f64, f64, String)> {
    (
        prop::collection::vec(
            prop_oneof![0.0f64..1.0, Just(0.0), Just(1.0), 0.0f64..1e5],
            N_FEATURES,
        ),
        0.0f64..=1.0,
        0.0f64..=1.0,
        1.0f64..1e7,
        "[A-Z]-[0-9]{1,6}",
    )
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 1000, ..ProptestConfig::default() })]

    /// Random rule files: parsed or refused with a line, never a panic. Parsed rule sets route
    /// any claim to a queue no lower than any fired rule forces (unless a fired rule exempts
    /// it), with a finite priority; the audit queue only takes claims nothing else wanted.
    #[test]
    fn rule_files_and_routing_hold_their_promises(
        rules_text in prop::collection::vec(rule_text(), 0..6),
        inputs in prop::collection::vec(routing_inputs(), 1..8),
    ) {
        let text = format!("version = \"fuzz\"\n{}", rules_text.join("\n"));
        let set = match RuleSet::from_toml(&text, "fuzz") {
            Err(e) => {
                prop_assert!(!e.problems.is_empty());
                for p in &e.problems {
                    prop_assert!(p.line >= 1 && p.line <= text.lines().count() + 1, "{:?}", p);
                }
                return Ok(());
            }
            Ok(s) => s,
        };
        for r in &set.rules {
            prop_assert!(r.add_priority.is_finite(), "a non-finite priority was accepted");
        }
        let routing = Routing::default();
        for (fv, p, outlier, amount, id) in inputs {
            let features: [f64; N_FEATURES] = fv.try_into().unwrap();
            let x = Inputs {
                claim_id: &id,
                features: &features,
                probability: p,
                outlier_score: outlier,
                claimed_amount: amount,
                model_threshold: 0.2,
            };
            let routed = rules::route(&set, &routing, &x);
            prop_assert!(routed.priority.is_finite());
            let fired: Vec<_> = set.rules.iter().filter(|r| routed.fired.contains(&r.id)).collect();
            let exempt = fired.iter().any(|r| r.exempt);
            if exempt {
                prop_assert_eq!(routed.queue, Queue::NoReview);
            } else {
                for r in &fired {
                    if let Some(q) = r.queue {
                        prop_assert!(routed.queue >= q, "{:?} below forced {:?}", routed.queue, q);
                    }
                }
            }
            if routed.queue == Queue::Audit {
                prop_assert!(fired.iter().all(|r| r.queue.is_none_or(|q| q == Queue::NoReview)));
                prop_assert_eq!(routed.priority, 0.0);
            }
        }
    }
}

/// The routing property above only means something if many generated rule files parse: check
/// that at least a quarter of them do.
#[test]
fn generated_rule_files_often_parse() {
    use proptest::strategy::ValueTree;
    use proptest::test_runner::TestRunner;
    let mut runner = TestRunner::deterministic();
    let strategy = prop::collection::vec(rule_text(), 1..4);
    let n = 2000;
    let mut ok = 0;
    for _ in 0..n {
        let rules = strategy.new_tree(&mut runner).unwrap().current();
        let text = format!("version = \"fuzz\"\n{}", rules.join("\n"));
        match RuleSet::from_toml(&text, "fuzz") {
            Ok(_) => ok += 1,
            Err(e) if std::env::var("SHOW").is_ok() => println!("{e}"),
            Err(_) => {}
        }
    }
    println!("{ok} of {n} generated rule files parse");
    assert!(ok * 4 >= n, "only {ok} of {n} generated rule files parse");
}
