//! The rule layer: rules from a reviewed TOML file, evaluation against a scored claim, and the
//! combination of model probability, outlier score and rules into one queue and a priority.
//!
//! Conditions are data, not code: each rule is a list of comparisons (`all`, every one must
//! hold, or `any`, one is enough) between a named value and a number. The names are the
//! feature catalogue plus `probability`, `outlier_score`, `claimed_amount` and
//! `expected_value`. A structured form needs no parser of its own, so it cannot be
//! mis-parsed, and an unknown name is found when the file is loaded, with its line.
//!
//! Combination, in order:
//! 1. An `exempt` rule that fires sends the claim to no review, whatever else fired.
//! 2. The model proposes: `investigate` when the probability reaches
//!    `routing.investigate_probability` and the expected value is positive; `desk_check` when the
//!    probability reaches the model's own threshold or the outlier score reaches
//!    `routing.outlier_desk_check`; else no review.
//! 3. A `queue` forced by a firing rule is a floor, not a cap: the claim goes to the more
//!    serious of the forced queue and the model's proposal (investigate > desk check).
//! 4. A claim left with no review joins the audit sample with probability
//!    `routing.audit_share`, drawn from a hash of its id (stable across replays, independent
//!    of its features), so precision and recall can be estimated without selection bias.
//!
//! Priority = probability × exposure × the fired rules' `priority_factor`s − review cost,
//! plus their `add_priority`, in currency units (a factor scales the expected saving, never the
//! cost, so it cannot push a claim down). Exposure is the claimed amount plus the amounts
//! of other claimants' claims linked to it (features `linked_log_amount_365d`), so a ring's
//! members count with the ring's exposure. Audit claims have priority 0: they were drawn at
//! random, and their order means nothing.

use crate::features::{self, FeatureVector};
use serde::{Deserialize, Serialize};
use std::fmt;

/// Queues a decision can place a claim in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Queue {
    NoReview,
    Audit,
    DeskCheck,
    Investigate,
}

impl Queue {
    pub const ALL: [Queue; 4] = [
        Queue::NoReview,
        Queue::Audit,
        Queue::DeskCheck,
        Queue::Investigate,
    ];
    /// Queues that hold work for people.
    pub const WORKED: [Queue; 3] = [Queue::Investigate, Queue::DeskCheck, Queue::Audit];

    pub fn as_str(self) -> &'static str {
        match self {
            Queue::NoReview => "no_review",
            Queue::Audit => "audit",
            Queue::DeskCheck => "desk_check",
            Queue::Investigate => "investigate",
        }
    }

    pub fn parse(s: &str) -> Option<Queue> {
        Queue::ALL.into_iter().find(|q| q.as_str() == s)
    }
}

impl fmt::Display for Queue {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum Op {
    #[serde(rename = "<")]
    Lt,
    #[serde(rename = "<=")]
    Le,
    #[serde(rename = ">")]
    Gt,
    #[serde(rename = ">=")]
    Ge,
    #[serde(rename = "==")]
    Eq,
    #[serde(rename = "!=")]
    Ne,
}

impl Op {
    fn holds(self, a: f64, b: f64) -> bool {
        match self {
            Op::Lt => a < b,
            Op::Le => a <= b,
            Op::Gt => a > b,
            Op::Ge => a >= b,
            Op::Eq => a == b,
            Op::Ne => a != b,
        }
    }
}

/// Values a condition may name besides the feature catalogue.
pub const SCORE_NAMES: [&str; 4] = [
    "probability",
    "outlier_score",
    "claimed_amount",
    "expected_value",
];

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCondition {
    value: toml::Spanned<String>,
    op: Op,
    than: f64,
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRule {
    id: toml::Spanned<String>,
    reason: String,
    #[serde(default)]
    all: Vec<RawCondition>,
    #[serde(default)]
    any: Vec<RawCondition>,
    #[serde(default)]
    add_priority: f64,
    #[serde(default = "one")]
    priority_factor: f64,
    #[serde(default)]
    queue: Option<toml::Spanned<String>>,
    #[serde(default)]
    exempt: bool,
}

fn one() -> f64 {
    1.0
}

#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRuleSet {
    version: String,
    #[serde(default, rename = "rule")]
    rules: Vec<RawRule>,
}

/// What a condition reads.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Operand {
    Feature(usize),
    Probability,
    Outlier,
    Amount,
    ExpectedValue,
}

#[derive(Debug, Clone, PartialEq)]
struct Condition {
    operand: Operand,
    op: Op,
    than: f64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Rule {
    pub id: String,
    pub reason: String,
    all: Vec<Condition>,
    any: Vec<Condition>,
    /// Currency units added to the priority.
    pub add_priority: f64,
    /// Multiplies the expected saving in the priority (1 leaves it).
    pub priority_factor: f64,
    pub queue: Option<Queue>,
    pub exempt: bool,
}

/// A checked rule set.
#[derive(Debug, Clone, PartialEq)]
pub struct RuleSet {
    pub version: String,
    pub rules: Vec<Rule>,
}

/// A rule-file problem, with the line it is on.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RuleProblem {
    pub line: usize,
    pub problem: String,
}

#[derive(Debug, thiserror::Error)]
#[error("rule file {source_name}: {}", .problems.iter().map(|p| format!("line {}: {}", p.line, p.problem)).collect::<Vec<_>>().join("; "))]
pub struct RuleError {
    pub source_name: String,
    pub problems: Vec<RuleProblem>,
}

fn line_of(text: &str, offset: usize) -> usize {
    text.get(..offset.min(text.len()))
        .map_or(1, |s| s.bytes().filter(|&b| b == b'\n').count() + 1)
}

impl RuleSet {
    pub fn from_toml(text: &str, source_name: &str) -> Result<RuleSet, RuleError> {
        let fail = |problems| RuleError {
            source_name: source_name.to_string(),
            problems,
        };
        let raw: RawRuleSet = toml::from_str(text).map_err(|e: toml::de::Error| {
            let line = e.span().map_or(1, |s| line_of(text, s.start));
            fail(vec![RuleProblem {
                line,
                problem: e.message().to_string(),
            }])
        })?;
        let mut problems = Vec::new();
        let mut rules = Vec::new();
        let mut seen = std::collections::HashSet::new();
        for r in raw.rules {
            let line = line_of(text, r.id.span().start);
            let id = r.id.into_inner();
            if id.is_empty()
                || !id
                    .chars()
                    .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_')
            {
                problems.push(RuleProblem {
                    line,
                    problem: format!("rule id {id:?} must be letters, digits, '-' or '_'"),
                });
            }
            if !seen.insert(id.clone()) {
                problems.push(RuleProblem {
                    line,
                    problem: format!("rule id {id:?} is used twice"),
                });
            }
            if r.reason.trim().is_empty() {
                problems.push(RuleProblem {
                    line,
                    problem: format!("rule {id:?} needs a plain-language reason"),
                });
            }
            if r.all.is_empty() && r.any.is_empty() {
                problems.push(RuleProblem {
                    line,
                    problem: format!("rule {id:?} has no conditions (give `all` or `any`)"),
                });
            }
            if !r.add_priority.is_finite() {
                problems.push(RuleProblem {
                    line,
                    problem: format!("rule {id:?}: add_priority must be a finite number"),
                });
            }
            if !(r.priority_factor.is_finite()
                && r.priority_factor > 0.0
                && r.priority_factor <= 100.0)
            {
                problems.push(RuleProblem {
                    line,
                    problem: format!(
                        "rule {id:?}: priority_factor must be a number above 0 and at most 100"
                    ),
                });
            }
            let mut convert = |c: RawCondition| -> Option<Condition> {
                let cline = line_of(text, c.value.span().start);
                let name = c.value.into_inner();
                let operand = match name.as_str() {
                    "probability" => Some(Operand::Probability),
                    "outlier_score" => Some(Operand::Outlier),
                    "claimed_amount" => Some(Operand::Amount),
                    "expected_value" => Some(Operand::ExpectedValue),
                    other => features::index_of(other).map(Operand::Feature),
                };
                if !c.than.is_finite() {
                    problems.push(RuleProblem {
                        line: cline,
                        problem: format!("rule {id:?}: `than` must be a finite number"),
                    });
                }
                match operand {
                    Some(operand) => Some(Condition {
                        operand,
                        op: c.op,
                        than: c.than,
                    }),
                    None => {
                        problems.push(RuleProblem {
                            line: cline,
                            problem: format!(
                                "rule {id:?} names unknown value {name:?}; known: {}, {}",
                                SCORE_NAMES.join(", "),
                                features::names().join(", ")
                            ),
                        });
                        None
                    }
                }
            };
            let all: Vec<Condition> = r.all.into_iter().filter_map(&mut convert).collect();
            let any: Vec<Condition> = r.any.into_iter().filter_map(&mut convert).collect();
            let queue = match r.queue {
                None => None,
                Some(q) => {
                    let qline = line_of(text, q.span().start);
                    let name = q.into_inner();
                    match Queue::parse(&name) {
                        Some(Queue::Investigate) => Some(Queue::Investigate),
                        Some(Queue::DeskCheck) => Some(Queue::DeskCheck),
                        _ => {
                            problems.push(RuleProblem {
                                line: qline,
                                problem: format!(
                                    "rule {id:?}: queue {name:?} cannot be forced; use \"investigate\" or \"desk_check\" (or exempt = true)"
                                ),
                            });
                            None
                        }
                    }
                }
            };
            rules.push(Rule {
                id,
                reason: r.reason,
                all,
                any,
                add_priority: r.add_priority,
                priority_factor: r.priority_factor,
                queue,
                exempt: r.exempt,
            });
        }
        if raw.version.trim().is_empty() {
            problems.push(RuleProblem {
                line: 1,
                problem: "version must not be empty".into(),
            });
        }
        if problems.is_empty() {
            Ok(RuleSet {
                version: raw.version,
                rules,
            })
        } else {
            Err(fail(problems))
        }
    }

    pub fn read(path: &std::path::Path) -> Result<RuleSet, RuleError> {
        let text = std::fs::read_to_string(path).map_err(|e| RuleError {
            source_name: path.display().to_string(),
            problems: vec![RuleProblem {
                line: 0,
                problem: format!("cannot read: {e}"),
            }],
        })?;
        RuleSet::from_toml(&text, &path.display().to_string())
    }
}

/// Routing settings (from configuration).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Routing {
    /// Probability at or above which a claim with positive expected value goes to investigation.
    pub investigate_probability: f64,
    /// Probability for a desk check; absent means the model artifact's own threshold.
    pub desk_check_probability: Option<f64>,
    /// Outlier score at or above which a claim gets a desk check.
    pub outlier_desk_check: f64,
    /// Share of otherwise unreviewed claims sampled into the audit queue.
    pub audit_share: f64,
    /// Cost of one review (currency units), subtracted in the expected value.
    pub review_cost: f64,
}

impl Default for Routing {
    fn default() -> Self {
        Routing {
            investigate_probability: 0.5,
            desk_check_probability: None,
            outlier_desk_check: 0.995,
            audit_share: 0.02,
            review_cost: 300.0,
        }
    }
}

/// Everything the rule layer reads about one claim.
pub struct Inputs<'a> {
    pub claim_id: &'a str,
    pub features: &'a FeatureVector,
    pub probability: f64,
    pub outlier_score: f64,
    pub claimed_amount: f64,
    /// The model's own referral threshold (from its artifact).
    pub model_threshold: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Routed {
    pub queue: Queue,
    pub priority: f64,
    pub expected_value: f64,
    /// Ids of rules that fired, in file order.
    pub fired: Vec<String>,
}

impl Condition {
    fn holds(&self, x: &Inputs, ev: f64) -> bool {
        let v = match self.operand {
            Operand::Feature(i) => x.features[i],
            Operand::Probability => x.probability,
            Operand::Outlier => x.outlier_score,
            Operand::Amount => x.claimed_amount,
            Operand::ExpectedValue => ev,
        };
        self.op.holds(v, self.than)
    }
}

impl Rule {
    /// Catalogue indices of the features the rule's conditions read.
    pub fn features(&self) -> impl Iterator<Item = usize> + '_ {
        self.all
            .iter()
            .chain(&self.any)
            .filter_map(|c| match c.operand {
                Operand::Feature(i) => Some(i),
                _ => None,
            })
    }

    fn fires(&self, x: &Inputs, ev: f64) -> bool {
        self.all.iter().all(|c| c.holds(x, ev))
            && (self.any.is_empty() || self.any.iter().any(|c| c.holds(x, ev)))
    }
}

/// A uniform draw in [0, 1) from the claim id: SHA-256, because FNV's high bits barely move
/// when only the last characters of similar ids differ (C-000123, C-000124, ...). Salted so
/// the audit sample is not the same claims as any other hash-based split.
fn audit_draw(claim_id: &str) -> f64 {
    use sha2::Digest;
    let d = sha2::Sha256::digest(format!("weir-audit:{claim_id}").as_bytes());
    let mut b = [0u8; 8];
    b.copy_from_slice(&d[..8]);
    (u64::from_be_bytes(b) >> 11) as f64 / (1u64 << 53) as f64
}

/// Combine scores and rules into a queue and a priority.
pub fn route(rules: &RuleSet, routing: &Routing, x: &Inputs) -> Routed {
    let ev = x.probability * x.claimed_amount - routing.review_cost;
    let mut fired = Vec::new();
    let mut points = 0.0;
    let mut factor = 1.0;
    let mut exempt = false;
    let mut forced: Option<Queue> = None;
    for r in &rules.rules {
        if r.fires(x, ev) {
            fired.push(r.id.clone());
            points += r.add_priority;
            factor *= r.priority_factor;
            exempt |= r.exempt;
            if let Some(q) = r.queue {
                forced = Some(forced.map_or(q, |f| f.max(q)));
            }
        }
    }
    let desk = routing.desk_check_probability.unwrap_or(x.model_threshold);
    let proposed = if x.probability >= routing.investigate_probability && ev > 0.0 {
        Queue::Investigate
    } else if x.probability >= desk || x.outlier_score >= routing.outlier_desk_check {
        Queue::DeskCheck
    } else {
        Queue::NoReview
    };
    let queue = if exempt {
        Queue::NoReview
    } else {
        forced.map_or(proposed, |f| f.max(proposed))
    };
    let queue =
        if queue == Queue::NoReview && !exempt && audit_draw(x.claim_id) < routing.audit_share {
            Queue::Audit
        } else {
            queue
        };
    // The expected saving of a review counts what it opens: the claim and the other
    // claimants' claims linked to it (a ring's members count with the ring's exposure).
    let exposure = x.claimed_amount + features::linked_amount(x.features);
    let priority = if queue == Queue::Audit {
        0.0
    } else {
        x.probability * exposure * factor - routing.review_cost + points
    };
    Routed {
        queue,
        priority,
        expected_value: ev,
        fired,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const RULES: &str = r#"
version = "test-1"

[[rule]]
id = "early-large"
reason = "Large loss soon after the policy started"
all = [
  { value = "loss_within_30_days_of_start", op = "==", than = 1 },
  { value = "amount_to_sum_insured", op = ">=", than = 0.6 },
]
queue = "investigate"
add_priority = 500

[[rule]]
id = "small"
reason = "Too small to review"
all = [{ value = "claimed_amount", op = "<", than = 100 }]
exempt = true
"#;

    fn inputs<'a>(fv: &'a FeatureVector, p: f64, amount: f64) -> Inputs<'a> {
        Inputs {
            claim_id: "C-1",
            features: fv,
            probability: p,
            outlier_score: 0.5,
            claimed_amount: amount,
            model_threshold: 0.1,
        }
    }

    #[test]
    fn forced_queue_and_points() {
        let rs = RuleSet::from_toml(RULES, "t").unwrap();
        let mut fv = [0.0; features::N_FEATURES];
        fv[features::index_of("loss_within_30_days_of_start").unwrap()] = 1.0;
        fv[features::index_of("amount_to_sum_insured").unwrap()] = 0.9;
        let r = route(&rs, &Routing::default(), &inputs(&fv, 0.05, 10_000.0));
        assert_eq!(r.queue, Queue::Investigate);
        assert_eq!(r.fired, vec!["early-large"]);
        // 0.05 * 10000 - 300 + 500
        assert!((r.priority - 700.0).abs() < 1e-9);
    }

    #[test]
    fn priority_counts_linked_exposure_and_multiplies_by_rule_factors() {
        let text = r#"
version = "t"
[[rule]]
id = "shared-account"
reason = "Bank account shared"
all = [{ value = "payee_account_claimants_365d", op = ">=", than = 3 }]
priority_factor = 3
add_priority = 100
"#;
        let rs = RuleSet::from_toml(text, "t").unwrap();
        let mut fv = [0.0; features::N_FEATURES];
        fv[features::index_of("payee_account_claimants_365d").unwrap()] = 4.0;
        fv[features::index_of("linked_log_amount_365d").unwrap()] = 20_000f64.ln_1p();
        let r = route(&rs, &Routing::default(), &inputs(&fv, 0.5, 10_000.0));
        // 0.5 x (10,000 + 20,000) x 3 - 300 + 100, by hand.
        assert!((r.priority - 44_800.0).abs() < 1e-6, "{}", r.priority);
        // The expected value that routes the claim is the claim's own.
        assert!((r.expected_value - 4_700.0).abs() < 1e-9);
        let bad = RuleSet::from_toml(&text.replace("= 3\n", "= 0\n"), "t").unwrap_err();
        assert!(bad.to_string().contains("priority_factor"), "{bad}");
    }

    #[test]
    fn exempt_beats_everything_and_model_routes_the_rest() {
        let rs = RuleSet::from_toml(RULES, "t").unwrap();
        let fv = [0.0; features::N_FEATURES];
        let r = route(&rs, &Routing::default(), &inputs(&fv, 0.99, 50.0));
        assert_eq!(r.queue, Queue::NoReview);
        let r = route(&rs, &Routing::default(), &inputs(&fv, 0.6, 5_000.0));
        assert_eq!(r.queue, Queue::Investigate);
        let r = route(&rs, &Routing::default(), &inputs(&fv, 0.2, 5_000.0));
        assert_eq!(r.queue, Queue::DeskCheck);
    }

    #[test]
    fn a_forced_queue_is_a_floor_not_a_cap() {
        let text = RULES.replace("queue = \"investigate\"", "queue = \"desk_check\"");
        let rs = RuleSet::from_toml(&text, "t").unwrap();
        let mut fv = [0.0; features::N_FEATURES];
        fv[features::index_of("loss_within_30_days_of_start").unwrap()] = 1.0;
        fv[features::index_of("amount_to_sum_insured").unwrap()] = 0.9;
        let low = route(&rs, &Routing::default(), &inputs(&fv, 0.01, 10_000.0));
        assert_eq!(low.queue, Queue::DeskCheck);
        let high = route(&rs, &Routing::default(), &inputs(&fv, 0.9, 10_000.0));
        assert_eq!(high.queue, Queue::Investigate);
    }

    #[test]
    fn audit_sample_is_close_to_the_configured_share() {
        let rs = RuleSet::from_toml("version = \"x\"", "t").unwrap();
        let fv = [0.0; features::N_FEATURES];
        let routing = Routing::default();
        let n = 20_000;
        let audited = (0..n)
            .filter(|i| {
                let id = format!("C-{i:06}");
                let mut x = inputs(&fv, 0.01, 1000.0);
                x.claim_id = &id;
                route(&rs, &routing, &x).queue == Queue::Audit
            })
            .count();
        let share = audited as f64 / n as f64;
        // Binomial sd at p=0.02, n=20000 is 0.001; allow five of them.
        assert!((share - 0.02).abs() < 0.005, "{share}");
    }

    #[test]
    fn unknown_names_and_bad_syntax_are_refused_with_their_line() {
        let bad = RULES.replace("amount_to_sum_insured", "amount_to_shoe_size");
        let err = RuleSet::from_toml(&bad, "t").unwrap_err();
        assert_eq!(err.problems.len(), 1, "{err}");
        assert_eq!(err.problems[0].line, 9);
        assert!(err.problems[0].problem.contains("amount_to_shoe_size"));
        let err = RuleSet::from_toml("version = \"x\"\n[[rule]]\nid = \"a\"\nreason = \"r\"\nall = [{ value = \"theft\", op = \"=>\", than = 1 }]\n", "t").unwrap_err();
        assert_eq!(err.problems[0].line, 5, "{err}");
        let err =
            RuleSet::from_toml(&RULES.replace("\"investigate\"", "\"audit\""), "t").unwrap_err();
        assert!(err.to_string().contains("cannot be forced"), "{err}");
    }
}
