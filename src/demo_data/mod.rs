//! Demo data: an invented scenario for trying weir, never for testing its computations.
//!
//! Fernlow Mutual, an invented motor and home insurer, writes business in four invented
//! regions (Aldermoor, Brackenhythe, Carrow Sound, Dunmere). It receives about 36 claims a day
//! from 2025-01-01 (over six to eighteen months, depending on how many are asked for); its claims
//! are mostly genuine, with four planted fraud mechanisms, each with a ground-truth outcome:
//!
//! * `ring`: groups of claimants, active for a few weeks, who share one repairer, one medical
//!   provider, one attorney, witnesses and (mostly) one payee bank account; injury claims.
//! * `early_loss`: a theft or total loss days after a new policy starts, for most of the sum
//!   insured.
//! * `inflated`: a genuine loss whose amount was blown up two to four times.
//! * `staged_theft`: a night-time theft with no police report, reported weeks late.
//!
//! Genuine claims also show each indicator at realistic rates (new policies have genuine
//! losses too; some genuine thefts are reported late), so no single indicator is proof. Outcomes
//! include `not_proven` and `withdrawn` where an investigation would not have settled the case.
//! All ids are made up (`K-` claimants, `P-` policies, `R-` repairers, `M-` medical providers,
//! `A-` attorneys, `B-` bank accounts, `W-` witnesses, `H-` addresses).

use crate::claim::{Circumstances, Claim, Line, Party, Role};
use crate::feedback::Outcome;
use chrono::{Duration, NaiveDate, NaiveTime, TimeZone, Utc};
use rand::Rng;
use rand::SeedableRng;
use rand_xoshiro::Xoshiro256Plus;
use serde::Serialize;

mod second;
pub use second::generate as generate_second;

/// Which invented world to generate.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum World {
    /// Fernlow Mutual: the demo's world, the only one any choice of the project was made on.
    Fernlow,
    /// Osterby Mutual: written to be different, and used only to evaluate (never to choose).
    Osterby,
}

impl World {
    pub fn generate(self, n: usize, seed: u64) -> Vec<DemoClaim> {
        match self {
            World::Fernlow => generate(n, seed),
            World::Osterby => generate_second(n, seed),
        }
    }

    pub fn insurer(self) -> &'static str {
        match self {
            World::Fernlow => "Fernlow Mutual",
            World::Osterby => "Osterby Mutual",
        }
    }
}

pub const REGIONS: [&str; 4] = ["Aldermoor", "Brackenhythe", "Carrow Sound", "Dunmere"];
/// Claims a day the invented insurer receives; the period covered grows with the claim count
/// (from 180 days up to 545) so a small demo file still has a realistic daily volume.
const CLAIMS_PER_DAY: f64 = 36.0;
const N_REPAIRERS: usize = 90;
const N_MEDICAL: usize = 45;
const N_ATTORNEYS: usize = 30;

/// Which planted mechanism produced a claim (`genuine` for none).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Mechanism {
    Genuine,
    Ring,
    EarlyLoss,
    Inflated,
    StagedTheft,
    // The second world's (see `second`).
    StagedCollision,
    BillingMill,
    MulePayout,
    PhantomDamage,
    /// A genuine claim of the second world's weather surge.
    Surge,
}

impl Mechanism {
    pub fn as_str(self) -> &'static str {
        match self {
            Mechanism::Genuine => "genuine",
            Mechanism::Ring => "ring",
            Mechanism::EarlyLoss => "early_loss",
            Mechanism::Inflated => "inflated",
            Mechanism::StagedTheft => "staged_theft",
            Mechanism::StagedCollision => "staged_collision",
            Mechanism::BillingMill => "billing_mill",
            Mechanism::MulePayout => "mule_payout",
            Mechanism::PhantomDamage => "phantom_damage",
            Mechanism::Surge => "surge",
        }
    }
}

#[derive(Debug, Clone)]
pub struct DemoClaim {
    pub claim: Claim,
    pub outcome: Outcome,
    pub mechanism: Mechanism,
}

impl DemoClaim {
    /// The training-file line: the claim in the intake schema plus its `outcome`.
    pub fn to_training_json(&self) -> String {
        crate::train::training_line(&self.claim, Some(self.outcome))
    }
}

/// How a world's genuine claims name parties: id prefix, chances (repairer for motor and
/// home, attorney on an injury, witness, third party on motor) and firm pool sizes.
struct PartyMix {
    prefix: &'static str,
    repairer: (f64, f64),
    attorney: f64,
    witness: f64,
    third_party: f64,
    pools: (usize, usize, usize),
}

const FERNLOW_PARTIES: PartyMix = PartyMix {
    prefix: "",
    repairer: (0.8, 0.55),
    attorney: 0.3,
    witness: 0.3,
    third_party: 0.5,
    pools: (N_REPAIRERS, N_MEDICAL, N_ATTORNEYS),
};

struct Person {
    id: usize,
    line: Line,
    policy_start: NaiveDate,
    region: usize,
}

/// The generator both worlds share: people, their claims, and the draws.
struct Gen {
    rng: Xoshiro256Plus,
    start: NaiveDate,
    days: i64,
    people: Vec<Person>,
    next_claim: usize,
    next_person: usize,
    next_witness: usize,
    out: Vec<DemoClaim>,
    regions: &'static [&'static str],
    currency: &'static str,
    /// Catastrophe code put on the next claims pushed (the second world's storm).
    catastrophe: Option<String>,
}

fn round2(x: f64) -> f64 {
    (x * 100.0).round() / 100.0
}

impl Gen {
    fn normal(&mut self) -> f64 {
        // Box–Muller; one of the pair is enough here.
        let u1: f64 = self.rng.r#gen::<f64>().max(1e-300);
        let u2: f64 = self.rng.r#gen();
        (-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()
    }

    fn lognormal(&mut self, median: f64, sigma: f64) -> f64 {
        median * (sigma * self.normal()).exp()
    }

    fn chance(&mut self, p: f64) -> bool {
        self.rng.r#gen::<f64>() < p
    }

    /// Popular firms get more work: index drawn with weight 1/(i+1).
    fn firm(&mut self, n: usize) -> usize {
        let u: f64 = self.rng.r#gen();
        ((n as f64 + 1.0).powf(u) - 1.0).floor().min(n as f64 - 1.0) as usize
    }

    fn new_person(&mut self, line: Line, policy_start: NaiveDate) -> usize {
        let id = self.next_person;
        self.next_person += 1;
        let region = self.rng.gen_range(0..self.regions.len());
        self.people.push(Person {
            id,
            line,
            policy_start,
            region,
        });
        self.people.len() - 1
    }

    fn day(&mut self, d: i64) -> NaiveDate {
        self.start + Duration::days(d)
    }

    fn sum_insured(&mut self, line: Line) -> f64 {
        let si = match line {
            Line::Motor => self.rng.gen_range(6_000.0..45_000.0),
            Line::Home => self.rng.gen_range(80_000.0..450_000.0),
        };
        (si / 500.0f64).round() * 500.0
    }

    fn loss_time(&mut self, night: bool) -> Option<NaiveTime> {
        let hour = if night {
            *[22u32, 23, 0, 1, 2, 3, 4, 5]
                .get(self.rng.gen_range(0..8))
                .unwrap_or(&23)
        } else {
            self.rng.gen_range(6..22)
        };
        NaiveTime::from_hms_opt(hour, self.rng.gen_range(0..60), 0)
    }

    #[allow(clippy::too_many_arguments)]
    fn push(
        &mut self,
        person: usize,
        loss: NaiveDate,
        report_delay_days: i64,
        loss_time: Option<NaiveTime>,
        amount: f64,
        sum_insured: f64,
        parties: Vec<Party>,
        circumstances: Circumstances,
        outcome: Outcome,
        mechanism: Mechanism,
    ) {
        let p = &self.people[person];
        let claim_id = format!("C-{:06}", self.next_claim);
        self.next_claim += 1;
        let report_day = loss + Duration::days(report_delay_days);
        let secs = self.rng.gen_range(7 * 3600..19 * 3600);
        let reported_at = Utc.from_utc_datetime(
            &report_day
                .and_hms_opt(0, 0, 0)
                .unwrap_or_default()
                .checked_add_signed(Duration::seconds(secs))
                .unwrap_or_default(),
        );
        let home_address = p.line == Line::Home || self.rng.gen_bool(0.5);
        let claim = Claim {
            claim_id,
            policy_id: format!("P-{:06}", p.id),
            claimant_id: format!("K-{:06}", p.id),
            line: p.line,
            loss_date: loss,
            loss_time,
            reported_at,
            policy_start: p.policy_start,
            claimed_amount: round2(amount.max(50.0)),
            sum_insured,
            currency: self.currency.into(),
            region: Some(self.regions[p.region].to_string()),
            address_id: home_address.then(|| format!("H-{:06}", p.id)),
            catastrophe_code: self.catastrophe.clone(),
            parties,
            circumstances,
        };
        self.out.push(DemoClaim {
            claim,
            outcome,
            mechanism,
        });
    }

    fn party(role: Role, id: String) -> Party {
        Party { role, id }
    }

    /// The parties of a genuine claim: the claimant's own account, a repairer, for an injury a
    /// medical provider and perhaps an attorney, a witness, and for motor a third party.
    fn genuine_parties(
        &mut self,
        account: Party,
        line: Line,
        injury: bool,
        mix: &PartyMix,
    ) -> Vec<Party> {
        let mut parties = vec![account];
        let prefix = mix.prefix;
        if self.chance(match line {
            Line::Motor => mix.repairer.0,
            Line::Home => mix.repairer.1,
        }) {
            let r = self.firm(mix.pools.0);
            parties.push(Self::party(Role::Repairer, format!("{prefix}R-{r:03}")));
        }
        if injury {
            let m = self.firm(mix.pools.1);
            parties.push(Self::party(
                Role::MedicalProvider,
                format!("{prefix}M-{m:03}"),
            ));
            if self.chance(mix.attorney) {
                let a = self.firm(mix.pools.2);
                parties.push(Self::party(Role::Attorney, format!("{prefix}A-{a:03}")));
            }
        }
        if self.chance(mix.witness) {
            self.next_witness += 1;
            parties.push(Self::party(
                Role::Witness,
                format!("{prefix}W-{:06}", self.next_witness),
            ));
        }
        if line == Line::Motor && self.chance(mix.third_party) {
            self.next_witness += 1;
            parties.push(Self::party(
                Role::ThirdParty,
                format!("{prefix}T-{:06}", self.next_witness),
            ));
        }
        parties
    }

    fn genuine(&mut self, inflate: bool) {
        // Reuse an existing claimant now and then (repeat claimants are mostly genuine).
        let person = if !self.people.is_empty() && self.chance(0.12) {
            self.rng.gen_range(0..self.people.len())
        } else {
            let line = if self.chance(0.7) {
                Line::Motor
            } else {
                Line::Home
            };
            let start = {
                let d = self.rng.gen_range(-4 * 365..self.days - 20);
                self.day(d)
            };
            self.new_person(line, start)
        };
        let (line, pstart) = (self.people[person].line, self.people[person].policy_start);
        let first = (pstart - self.start).num_days().max(0) + 1;
        if first >= self.days {
            return;
        }
        let loss = {
            let d = self.rng.gen_range(first..self.days);
            self.day(d)
        };
        let si = self.sum_insured(line);
        let theft = self.chance(if line == Line::Motor { 0.06 } else { 0.15 });
        let injury = self.chance(if line == Line::Motor { 0.12 } else { 0.02 });
        let total_loss = self.chance(if line == Line::Motor { 0.05 } else { 0.02 });
        let police = self.chance(match (line, theft) {
            (_, true) => 0.9,
            (Line::Motor, false) => 0.55,
            (Line::Home, false) => 0.2,
        });
        let mut amount = match line {
            Line::Motor => self.lognormal(2_200.0, 0.8),
            Line::Home => self.lognormal(3_500.0, 1.0),
        };
        if total_loss {
            amount = si * self.rng.gen_range(0.5..1.0);
        }
        let mut outcome = Outcome::Genuine;
        let mut mechanism = Mechanism::Genuine;
        if inflate {
            amount *= self.rng.gen_range(2.5..4.0);
            mechanism = Mechanism::Inflated;
            outcome = if self.chance(0.85) {
                Outcome::Inflated
            } else {
                Outcome::Genuine
            };
        } else if self.chance(0.015) {
            outcome = Outcome::Withdrawn;
        } else if self.chance(0.015) {
            outcome = Outcome::NotProven;
        }
        amount = amount.min(si);
        let delay = if self.chance(0.05) {
            self.rng.gen_range(10..60)
        } else {
            (-2.5 * self.rng.r#gen::<f64>().max(1e-9).ln()).floor() as i64
        };
        let known = self.chance(0.85);
        let night = self.chance(0.12);
        let time = if known { self.loss_time(night) } else { None };
        let account = Self::party(
            Role::PayeeAccount,
            format!("B-{:06}", self.people[person].id),
        );
        let parties = self.genuine_parties(account, line, injury, &FERNLOW_PARTIES);
        let c = Circumstances {
            police_report: police,
            injury,
            total_loss,
            theft,
        };
        self.push(
            person, loss, delay, time, amount, si, parties, c, outcome, mechanism,
        );
    }

    fn ring(&mut self, members: usize) {
        let ring_no = self.next_person; // unique enough to name the ring's firms
        let repairer = format!("R-{:03}", 500 + ring_no % 500);
        let medical = format!("M-{:03}", 500 + ring_no % 500);
        let attorney = format!("A-{:03}", 500 + ring_no % 500);
        let mule = format!("B-9{:05}", ring_no % 100_000);
        let witnesses: Vec<String> = (0..3)
            .map(|i| format!("W-9{:05}", (ring_no * 3 + i) % 100_000))
            .collect();
        let begin = self.rng.gen_range(30..self.days - 70);
        for _ in 0..members {
            let pstart = {
                let d = begin - self.rng.gen_range(60..400);
                self.day(d)
            };
            let person = self.new_person(Line::Motor, pstart);
            let claims = if self.chance(0.3) { 2 } else { 1 };
            for _ in 0..claims {
                let loss = {
                    let d = begin + self.rng.gen_range(0..60);
                    self.day(d)
                };
                let si = self.sum_insured(Line::Motor);
                let amount = self.lognormal(6_000.0, 0.45).min(si);
                let payee = if self.chance(0.7) {
                    mule.clone()
                } else {
                    format!("B-{:06}", self.people[person].id)
                };
                let mut parties = vec![
                    Self::party(Role::PayeeAccount, payee),
                    Self::party(Role::Repairer, repairer.clone()),
                    Self::party(Role::MedicalProvider, medical.clone()),
                ];
                if self.chance(0.8) {
                    parties.push(Self::party(Role::Attorney, attorney.clone()));
                }
                if self.chance(0.6) {
                    let w = witnesses[self.rng.gen_range(0..witnesses.len())].clone();
                    parties.push(Self::party(Role::Witness, w));
                }
                let outcome = if self.chance(0.85) {
                    Outcome::FraudConfirmed
                } else {
                    Outcome::NotProven
                };
                let delay = self.rng.gen_range(1..12);
                let time = {
                    let night = self.chance(0.3);
                    self.loss_time(night)
                };
                let c = Circumstances {
                    police_report: self.chance(0.3),
                    injury: true,
                    total_loss: false,
                    theft: false,
                };
                self.push(
                    person,
                    loss,
                    delay,
                    time,
                    amount,
                    si,
                    parties,
                    c,
                    outcome,
                    Mechanism::Ring,
                );
            }
        }
    }

    fn early_loss(&mut self) {
        let line = if self.chance(0.6) {
            Line::Motor
        } else {
            Line::Home
        };
        let loss_day = self.rng.gen_range(25..self.days);
        let pstart = {
            let d = loss_day - self.rng.gen_range(1..21);
            self.day(d)
        };
        let person = self.new_person(line, pstart);
        let si = self.sum_insured(line);
        let amount = si * self.rng.gen_range(0.7..1.0);
        let theft = self.chance(0.6);
        let c = Circumstances {
            police_report: self.chance(0.6),
            injury: false,
            total_loss: !theft,
            theft,
        };
        let outcome = match self.rng.gen_range(0..10) {
            0 => Outcome::NotProven,
            1 => Outcome::Withdrawn,
            _ => Outcome::FraudConfirmed,
        };
        let parties = vec![Self::party(
            Role::PayeeAccount,
            format!("B-{:06}", self.people[person].id),
        )];
        let delay = self.rng.gen_range(0..5);
        let time = {
            let night = self.chance(0.4);
            self.loss_time(night)
        };
        let loss = self.day(loss_day);
        self.push(
            person,
            loss,
            delay,
            time,
            amount,
            si,
            parties,
            c,
            outcome,
            Mechanism::EarlyLoss,
        );
    }

    fn staged_theft(&mut self) {
        let line = if self.chance(0.7) {
            Line::Motor
        } else {
            Line::Home
        };
        let pstart = {
            let d = self.rng.gen_range(-3 * 365..self.days - 200);
            self.day(d)
        };
        let person = self.new_person(line, pstart);
        let first = (pstart - self.start).num_days().max(0) + 30;
        let loss_day = self.rng.gen_range(first..self.days - 10);
        let si = self.sum_insured(line);
        let amount = match line {
            Line::Motor => si * self.rng.gen_range(0.6..1.0),
            Line::Home => self.lognormal(9_000.0, 0.5).min(si),
        };
        let c = Circumstances {
            police_report: false,
            injury: false,
            total_loss: line == Line::Motor,
            theft: true,
        };
        let outcome = if self.chance(0.75) {
            Outcome::FraudConfirmed
        } else {
            Outcome::NotProven
        };
        let parties = vec![Self::party(
            Role::PayeeAccount,
            format!("B-{:06}", self.people[person].id),
        )];
        let delay = self.rng.gen_range(20..75);
        let time = self.loss_time(true);
        let loss = self.day(loss_day);
        self.push(
            person,
            loss,
            delay,
            time,
            amount,
            si,
            parties,
            c,
            outcome,
            Mechanism::StagedTheft,
        );
    }
}

/// Generate about `n` claims, sorted by report time, deterministically from `seed`.
pub fn generate(n: usize, seed: u64) -> Vec<DemoClaim> {
    let mut g = Gen {
        rng: Xoshiro256Plus::seed_from_u64(seed),
        start: NaiveDate::from_ymd_opt(2025, 1, 1).unwrap_or_default(),
        days: ((n as f64 / CLAIMS_PER_DAY).round() as i64).clamp(180, 545),
        people: Vec::new(),
        next_claim: 1,
        next_person: 1,
        next_witness: 0,
        out: Vec::with_capacity(n + 64),
        regions: &REGIONS,
        currency: "EUR",
        catastrophe: None,
    };
    let ring_claims = (n as f64 * 0.015).round() as usize;
    let mut left = ring_claims;
    while left > 0 {
        let members = g.rng.gen_range(10..16).min(left.max(1));
        g.ring(members);
        left = left.saturating_sub(members + members / 3);
    }
    for _ in 0..(n as f64 * 0.010).round() as usize {
        g.early_loss();
    }
    for _ in 0..(n as f64 * 0.006).round() as usize {
        g.staged_theft();
    }
    for _ in 0..(n as f64 * 0.012).round() as usize {
        g.genuine(true);
    }
    while g.out.len() < n {
        g.genuine(false);
    }
    g.out.truncate(n);
    sorted(g.out)
}

/// Claims in report order (claim id breaks ties), as a claims system would send them.
fn sorted(mut out: Vec<DemoClaim>) -> Vec<DemoClaim> {
    out.sort_by(|a, b| {
        a.claim
            .reported_at
            .cmp(&b.claim.reported_at)
            .then_with(|| a.claim.claim_id.cmp(&b.claim.claim_id))
    });
    out
}

/// Periods of [`generate`] kept at its usual density: the demo generator fits any number of
/// claims into at most 545 days, so a million claims would put thousands of claims a year on
/// each invented repairer, which no book of that size has. For scale benchmarks this joins
/// 18,000-claim periods end to end (each with its own seed, and claim, claimant and policy ids
/// prefixed by the period), so the book grows in time, not in density. Repairers, providers
/// and the other shared parties stay the same pool across periods.
pub fn generate_long(n: usize, seed: u64) -> Vec<DemoClaim> {
    const PERIOD: usize = 18_000;
    let mut out = Vec::with_capacity(n);
    let mut i = 0u64;
    while out.len() < n {
        let mut part = generate(PERIOD.min(n - out.len()).max(1000), seed + i);
        let shift = chrono::Days::new(i * 545);
        for d in &mut part {
            let c = &mut d.claim;
            c.claim_id = format!("{i}-{}", c.claim_id);
            c.claimant_id = format!("{i}-{}", c.claimant_id);
            c.policy_id = format!("{i}-{}", c.policy_id);
            c.loss_date = c.loss_date + shift;
            c.policy_start = c.policy_start + shift;
            c.reported_at = c.reported_at + shift;
        }
        part.truncate(n - out.len());
        out.extend(part);
        i += 1;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn demo_claims_validate_and_have_realistic_base_rates() {
        let claims = generate(3000, 7);
        assert!(claims.len() >= 3000);
        let mut positives = 0;
        for d in &claims {
            let line = d.to_training_json();
            let v: serde_json::Value = serde_json::from_str(&line).unwrap();
            let c = Claim::from_value_allowing(&v, &["outcome"]).unwrap_or_else(|e| {
                panic!("{line}: {e:?}");
            });
            assert_eq!(c, d.claim);
            positives += usize::from(d.outcome.label() == Some(true));
        }
        let rate = positives as f64 / claims.len() as f64;
        assert!((0.02..0.06).contains(&rate), "positive rate {rate}");
        assert!(
            claims
                .windows(2)
                .all(|w| w[0].claim.reported_at <= w[1].claim.reported_at)
        );
        // Same seed, same data.
        let again = generate(3000, 7);
        assert_eq!(again[1234].claim, claims[1234].claim);
    }
}
