//! The second invented world, Osterby Mutual: written to be different from the first, and used
//! only to evaluate. No feature, threshold or rule of weir was chosen by looking at it.
//!
//! Osterby Mutual writes mostly home business (six in ten claims) in five invented regions
//! (Wrenfield, Calder Reach, Marrowby, Stoke Tarrant, Ashcombe), in pounds, at about 55
//! claims a day from 2024-03-01. Its genuine claims have other amounts, delays and indicator
//! rates than the first world's, bigger firm pools, and more repeat claimants. Its planted
//! mechanisms are none of the first world's:
//!
//! * `staged_collision`: pairs of recent policyholders who name each other as third party on
//!   the same loss date, both injured, sent to one clinic and one solicitor shared by a group
//!   of such pairs over a couple of months.
//! * `billing_mill`: a clinic whose injury claims from unrelated claimants rise steeply for a
//!   few months, with amounts bunched just under 5,000 or at round figures, paid partly as
//!   inflation of genuine injuries.
//! * `mule_payout`: ordinary-looking theft and damage claims from unrelated claimants whose
//!   payouts go to a handful of shared bank accounts; one such group files inside the storm
//!   below, under its catastrophe code.
//! * `phantom_damage`: home damage claims at an address that several short-lived policies
//!   share, round amounts, no police report.
//! * `inflated`: a genuine loss with an inflated amount, as insurers meet everywhere.
//!
//! And a legitimate `surge`: a hailstorm over Wrenfield brings about 6% of the period's claims
//! within four days, repaired by five storm contractors, three quarters of them tagged with
//! the catastrophe code `CAT-HAIL-1`: genuine claims that a model must not send to
//! investigation for arriving together.

use super::{DemoClaim, Gen, Mechanism, PartyMix, sorted};
use crate::claim::{Circumstances, Claim, Line, Party, Role};
use crate::feedback::Outcome;
use chrono::{Duration, NaiveDate, TimeZone, Utc};
use rand::{Rng, SeedableRng};
use rand_xoshiro::Xoshiro256Plus;

pub const REGIONS: [&str; 5] = [
    "Wrenfield",
    "Calder Reach",
    "Marrowby",
    "Stoke Tarrant",
    "Ashcombe",
];
const CLAIMS_PER_DAY: f64 = 55.0;
const N_REPAIRERS: usize = 140;
const N_MEDICAL: usize = 70;
const N_ATTORNEYS: usize = 40;
const STORM_CODE: &str = "CAT-HAIL-1";
const OSTERBY_PARTIES: PartyMix = PartyMix {
    prefix: "O",
    repairer: (0.7, 0.45),
    attorney: 0.45,
    witness: 0.2,
    third_party: 0.6,
    pools: (N_REPAIRERS, N_MEDICAL, N_ATTORNEYS),
};

/// One claim as the second world builds it (ids carry an `O` for Osterby).
struct Draft {
    person: usize,
    loss: NaiveDate,
    delay_days: i64,
    night: Option<bool>,
    amount: f64,
    sum_insured: f64,
    parties: Vec<Party>,
    circumstances: Circumstances,
    address: Option<String>,
    catastrophe: bool,
}

impl Gen {
    fn osterby_push(&mut self, d: Draft, outcome: Outcome, mechanism: Mechanism) {
        let p = &self.people[d.person];
        let (pid, line, pstart, region) = (p.id, p.line, p.policy_start, p.region);
        let claim_id = format!("OC-{:06}", self.next_claim);
        self.next_claim += 1;
        let report_day = d.loss + Duration::days(d.delay_days.max(0));
        let secs = self.rng.gen_range(8 * 3600..20 * 3600);
        let reported_at = Utc.from_utc_datetime(
            &report_day
                .and_hms_opt(0, 0, 0)
                .unwrap_or_default()
                .checked_add_signed(Duration::seconds(secs))
                .unwrap_or_default(),
        );
        let loss_time = d.night.and_then(|n| self.loss_time(n));
        let claim = Claim {
            claim_id,
            policy_id: format!("OP-{pid:06}"),
            claimant_id: format!("OK-{pid:06}"),
            line,
            loss_date: d.loss,
            loss_time,
            reported_at,
            policy_start: pstart,
            claimed_amount: super::round2(d.amount.clamp(60.0, d.sum_insured)),
            sum_insured: d.sum_insured,
            currency: self.currency.into(),
            region: Some(self.regions[region].to_string()),
            address_id: d.address,
            catastrophe_code: d.catastrophe.then(|| STORM_CODE.to_string()),
            parties: d.parties,
            circumstances: d.circumstances,
        };
        self.out.push(DemoClaim {
            claim,
            outcome,
            mechanism,
        });
    }

    fn osterby_person(&mut self, line: Line, ages: std::ops::Range<i64>, at_day: i64) -> usize {
        let age = self.rng.gen_range(ages);
        let start = self.day(at_day - age);
        self.new_person(line, start)
    }

    fn own_account(&self, person: usize) -> Party {
        Gen::party(
            Role::PayeeAccount,
            format!("OB-{:06}", self.people[person].id),
        )
    }

    fn home_of(&self, person: usize) -> String {
        format!("OH-{:06}", self.people[person].id)
    }

    fn osterby_genuine(&mut self, inflate: bool) {
        let person = if !self.people.is_empty() && self.chance(0.2) {
            self.rng.gen_range(0..self.people.len())
        } else {
            let line = if self.chance(0.4) {
                Line::Motor
            } else {
                Line::Home
            };
            let d = self.rng.gen_range(-6 * 365..self.days - 30);
            let start = self.day(d);
            self.new_person(line, start)
        };
        let (line, pstart) = (self.people[person].line, self.people[person].policy_start);
        let first = (pstart - self.start).num_days().max(0) + 1;
        if first >= self.days {
            return;
        }
        let loss_day = self.rng.gen_range(first..self.days);
        let loss = self.day(loss_day);
        let si = match line {
            Line::Motor => (self.rng.gen_range(4_000.0..60_000.0f64) / 250.0).round() * 250.0,
            Line::Home => (self.rng.gen_range(120_000.0..700_000.0f64) / 1000.0).round() * 1000.0,
        };
        let theft = self.chance(match line {
            Line::Motor => 0.09,
            Line::Home => 0.10,
        });
        let injury = self.chance(match line {
            Line::Motor => 0.18,
            Line::Home => 0.01,
        });
        let total_loss = self.chance(match line {
            Line::Motor => 0.07,
            Line::Home => 0.01,
        });
        let police = self.chance(if theft { 0.8 } else { 0.4 });
        let mut amount = match line {
            Line::Motor => self.lognormal(3_100.0, 0.9),
            Line::Home => self.lognormal(2_600.0, 1.1),
        };
        if total_loss {
            amount = si * self.rng.gen_range(0.4..1.0);
        }
        let (mut outcome, mut mechanism) = (Outcome::Genuine, Mechanism::Genuine);
        if inflate {
            amount *= self.rng.gen_range(1.8..3.5);
            mechanism = Mechanism::Inflated;
            outcome = if self.chance(0.8) {
                Outcome::Inflated
            } else {
                Outcome::NotProven
            };
        } else if self.chance(0.02) {
            outcome = Outcome::Withdrawn;
        } else if self.chance(0.01) {
            outcome = Outcome::NotProven;
        }
        let delay = if self.chance(0.08) {
            self.rng.gen_range(15..90)
        } else {
            (-4.0 * self.rng.r#gen::<f64>().max(1e-9).ln()).floor() as i64
        };
        let night = if self.chance(0.75) {
            Some(self.chance(0.15))
        } else {
            None
        };
        let account = self.own_account(person);
        let parties = self.genuine_parties(account, line, injury, &OSTERBY_PARTIES);
        let address = (line == Line::Home || self.chance(0.7)).then(|| self.home_of(person));
        let circumstances = Circumstances {
            police_report: police,
            injury,
            total_loss,
            theft,
        };
        self.osterby_push(
            Draft {
                person,
                loss,
                delay_days: delay,
                night,
                amount,
                sum_insured: si,
                parties,
                circumstances,
                address,
                catastrophe: false,
            },
            outcome,
            mechanism,
        );
    }

    /// A group of staged collisions: pairs naming each other, one clinic and one solicitor.
    fn staged_collisions(&mut self, pairs: usize) {
        let g = self.next_person;
        let clinic = format!("OM-7{:02}", g % 100);
        let solicitor = format!("OA-7{:02}", g % 100);
        let begin = self.rng.gen_range(20..self.days - 70);
        for _ in 0..pairs {
            let loss_day = begin + self.rng.gen_range(0..60);
            let a = self.osterby_person(Line::Motor, 40..240, loss_day);
            let b = self.osterby_person(Line::Motor, 40..240, loss_day);
            let loss = self.day(loss_day);
            let night = Some(self.chance(0.35));
            for (me, other) in [(a, b), (b, a)] {
                let si = (self.rng.gen_range(5_000.0..30_000.0f64) / 250.0).round() * 250.0;
                let mut parties = vec![
                    self.own_account(me),
                    Gen::party(Role::ThirdParty, format!("OK-{:06}", self.people[other].id)),
                    Gen::party(Role::MedicalProvider, clinic.clone()),
                ];
                if self.chance(0.85) {
                    parties.push(Gen::party(Role::Attorney, solicitor.clone()));
                }
                let amount = self.rng.gen_range(6_500.0..15_000.0);
                let outcome = if self.chance(0.8) {
                    Outcome::FraudConfirmed
                } else {
                    Outcome::NotProven
                };
                let delay = self.rng.gen_range(1..9);
                let address = self.chance(0.5).then(|| self.home_of(me));
                let draw1 = self.chance(0.25);
                self.osterby_push(
                    Draft {
                        person: me,
                        loss,
                        delay_days: delay,
                        night,
                        amount,
                        sum_insured: si,
                        parties,
                        circumstances: Circumstances {
                            police_report: draw1,
                            injury: true,
                            total_loss: false,
                            theft: false,
                        },
                        address,
                        catastrophe: false,
                    },
                    outcome,
                    Mechanism::StagedCollision,
                );
            }
        }
    }

    /// A clinic whose injury billing rises steeply: unrelated claimants, amounts under 5,000.
    fn billing_mill(&mut self, claims: usize) {
        let clinic = format!("OM-8{:02}", self.next_person % 100);
        let begin = self.rng.gen_range(30..self.days - 100);
        for i in 0..claims {
            // Volume rises through the period: later days are more likely.
            let u: f64 = self.rng.r#gen();
            let loss_day = begin + (u.sqrt() * 90.0) as i64;
            let line = Line::Motor;
            let person = self.osterby_person(line, 200..2000, loss_day);
            let loss = self.day(loss_day);
            let si = (self.rng.gen_range(6_000.0..40_000.0f64) / 250.0).round() * 250.0;
            let amount = if i % 3 == 0 {
                2_500.0
            } else {
                self.rng.gen_range(4_700.0..4_995.0)
            };
            let mut parties = vec![
                self.own_account(person),
                Gen::party(Role::MedicalProvider, clinic.clone()),
            ];
            if self.chance(0.5) {
                let a = self.firm(N_ATTORNEYS);
                parties.push(Gen::party(Role::Attorney, format!("OA-{a:03}")));
            }
            if self.chance(0.6) {
                let r = self.firm(N_REPAIRERS);
                parties.push(Gen::party(Role::Repairer, format!("OR-{r:03}")));
            }
            let outcome = match self.rng.gen_range(0..20) {
                0..=11 => Outcome::Inflated,
                12..=16 => Outcome::FraudConfirmed,
                _ => Outcome::NotProven,
            };
            let delay = self.rng.gen_range(2..25);
            let draw1 = self.chance(0.5);
            self.osterby_push(
                Draft {
                    person,
                    loss,
                    delay_days: delay,
                    night: Some(false),
                    amount,
                    sum_insured: si,
                    parties,
                    circumstances: Circumstances {
                        police_report: draw1,
                        injury: true,
                        total_loss: false,
                        theft: false,
                    },
                    address: None,
                    catastrophe: false,
                },
                outcome,
                Mechanism::BillingMill,
            );
        }
    }

    /// Unrelated claimants paid into a handful of shared accounts. `storm` puts the group in
    /// the storm's region and days, under its code.
    fn mule_group(&mut self, claims: usize, storm: Option<(usize, i64)>) {
        let g = self.next_person;
        let accounts: Vec<String> = (0..self.rng.gen_range(2..5))
            .map(|i| format!("OB-9{:05}", (g * 7 + i) % 100_000))
            .collect();
        let begin = match storm {
            Some((_, day)) => day,
            None => self.rng.gen_range(20..self.days - 50),
        };
        for _ in 0..claims {
            let (loss_day, span) = match storm {
                Some(_) => (begin + self.rng.gen_range(0..4), 0),
                None => (begin + self.rng.gen_range(0..42), 1),
            };
            let line = if storm.is_some() || self.chance(0.5) {
                Line::Home
            } else {
                Line::Motor
            };
            let person = self.osterby_person(line, 90..1500, loss_day);
            if let Some((region, _)) = storm {
                self.people[person].region = region;
            }
            let loss = self.day(loss_day);
            let si = match line {
                Line::Motor => (self.rng.gen_range(8_000.0..50_000.0f64) / 250.0).round() * 250.0,
                Line::Home => {
                    (self.rng.gen_range(150_000.0..600_000.0f64) / 1000.0).round() * 1000.0
                }
            };
            let theft = storm.is_none() && self.chance(0.6);
            let amount = if storm.is_some() {
                self.lognormal(6_500.0, 0.3)
            } else {
                self.lognormal(5_500.0, 0.5)
            };
            let account = accounts[self.rng.gen_range(0..accounts.len())].clone();
            let mut parties = vec![Gen::party(Role::PayeeAccount, account)];
            if self.chance(0.5) {
                let r = self.firm(N_REPAIRERS);
                parties.push(Gen::party(Role::Repairer, format!("OR-{r:03}")));
            }
            let outcome = if self.chance(0.8) {
                Outcome::FraudConfirmed
            } else {
                Outcome::NotProven
            };
            let delay = self.rng.gen_range(0..10) + span;
            let address = Some(self.home_of(person));
            let draw1 = self.chance(0.2);
            let draw2 = self.chance(0.7);
            let draw3 = self.chance(0.8);
            self.osterby_push(
                Draft {
                    person,
                    loss,
                    delay_days: delay,
                    night: Some(draw1),
                    amount,
                    sum_insured: si,
                    parties,
                    circumstances: Circumstances {
                        police_report: theft && draw2,
                        injury: false,
                        total_loss: false,
                        theft,
                    },
                    address,
                    catastrophe: storm.is_some() && draw3,
                },
                outcome,
                Mechanism::MulePayout,
            );
        }
    }

    /// Home damage claimed again and again at one address under short-lived policies.
    fn phantom_address(&mut self, claims: usize) {
        let address = format!("OH-9{:05}", self.next_person % 100_000);
        let begin = self.rng.gen_range(20..self.days - 120);
        for _ in 0..claims {
            let loss_day = begin + self.rng.gen_range(0..120);
            let person = self.osterby_person(Line::Home, 20..100, loss_day);
            let loss = self.day(loss_day);
            let si = (self.rng.gen_range(100_000.0..300_000.0f64) / 1000.0).round() * 1000.0;
            let amount = 500.0 * f64::from(self.rng.gen_range(4..24));
            let outcome = if self.chance(0.7) {
                Outcome::FraudConfirmed
            } else {
                Outcome::NotProven
            };
            let delay = self.rng.gen_range(3..30);
            let parties = vec![self.own_account(person)];
            let draw1 = self.chance(0.3);
            self.osterby_push(
                Draft {
                    person,
                    loss,
                    delay_days: delay,
                    night: None,
                    amount,
                    sum_insured: si,
                    parties,
                    circumstances: Circumstances {
                        police_report: false,
                        injury: false,
                        total_loss: false,
                        theft: draw1,
                    },
                    address: Some(address.clone()),
                    catastrophe: false,
                },
                outcome,
                Mechanism::PhantomDamage,
            );
        }
    }

    /// The hailstorm: genuine home and motor damage in one region within four days.
    fn storm(&mut self, claims: usize, region: usize, day: i64) {
        let contractors: Vec<String> = (0..5).map(|i| format!("OR-{:03}", 600 + i)).collect();
        for _ in 0..claims {
            let loss_day = day + self.rng.gen_range(0..4);
            let line = if self.chance(0.7) {
                Line::Home
            } else {
                Line::Motor
            };
            let person = if !self.people.is_empty() && self.chance(0.15) {
                self.rng.gen_range(0..self.people.len())
            } else {
                self.osterby_person(line, 30..3000, loss_day)
            };
            self.people[person].region = region;
            let line = self.people[person].line;
            let loss = self.day(loss_day);
            let si = match line {
                Line::Motor => (self.rng.gen_range(4_000.0..60_000.0f64) / 250.0).round() * 250.0,
                Line::Home => {
                    (self.rng.gen_range(120_000.0..700_000.0f64) / 1000.0).round() * 1000.0
                }
            };
            let amount = match line {
                Line::Home => self.lognormal(4_200.0, 0.5),
                Line::Motor => self.lognormal(1_800.0, 0.4),
            };
            let mut parties = vec![self.own_account(person)];
            if self.chance(0.8) {
                let c = contractors[self.firm(contractors.len())].clone();
                parties.push(Gen::party(Role::Repairer, c));
            }
            let outcome = if self.chance(0.02) {
                Outcome::Withdrawn
            } else {
                Outcome::Genuine
            };
            let delay = self.rng.gen_range(0..10);
            let address = Some(self.home_of(person));
            let draw1 = self.chance(0.6);
            let draw2 = self.chance(0.75);
            self.osterby_push(
                Draft {
                    person,
                    loss,
                    delay_days: delay,
                    night: if draw1 { Some(false) } else { None },
                    amount,
                    sum_insured: si,
                    parties,
                    circumstances: Circumstances {
                        police_report: false,
                        injury: false,
                        total_loss: false,
                        theft: false,
                    },
                    address,
                    catastrophe: draw2,
                },
                outcome,
                Mechanism::Surge,
            );
        }
    }
}

/// Generate about `n` claims of the second world, sorted by report time, from `seed`.
pub fn generate(n: usize, seed: u64) -> Vec<DemoClaim> {
    let mut g = Gen {
        rng: Xoshiro256Plus::seed_from_u64(seed ^ 0x05_7e_4b_79),
        start: NaiveDate::from_ymd_opt(2024, 3, 1).unwrap_or_default(),
        days: ((n as f64 / CLAIMS_PER_DAY).round() as i64).clamp(180, 545),
        people: Vec::new(),
        next_claim: 1,
        next_person: 1,
        next_witness: 0,
        out: Vec::with_capacity(n + 64),
        regions: &REGIONS,
        currency: "GBP",
        catastrophe: None,
    };
    let share = |p: f64| ((n as f64) * p).round() as usize;
    // The storm falls in the last quarter of the period (the part an evaluation scores), in
    // Wrenfield.
    let storm_day = g.days * 3 / 4 + g.rng.gen_range(0..(g.days / 6).max(1));
    g.storm(share(0.06), 0, storm_day);
    g.mule_group(share(0.002).max(4), Some((0, storm_day)));
    let mut left = share(0.009);
    while left > 0 {
        let pairs = g.rng.gen_range(3..6);
        g.staged_collisions(pairs);
        left = left.saturating_sub(pairs * 2);
    }
    let mut left = share(0.008);
    while left > 0 {
        let k = g.rng.gen_range(15..40).min(left.max(3));
        g.billing_mill(k);
        left = left.saturating_sub(k);
    }
    let mut left = share(0.006);
    while left > 0 {
        let k = g.rng.gen_range(6..14);
        g.mule_group(k, None);
        left = left.saturating_sub(k);
    }
    let mut left = share(0.005);
    while left > 0 {
        let k = g.rng.gen_range(3..6);
        g.phantom_address(k);
        left = left.saturating_sub(k);
    }
    for _ in 0..share(0.008) {
        g.osterby_genuine(true);
    }
    while g.out.len() < n {
        g.osterby_genuine(false);
    }
    g.out.truncate(n);
    sorted(g.out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn second_world_validates_and_differs_from_the_first() {
        let claims = generate(6000, 3);
        let mut by = std::collections::HashMap::new();
        for d in &claims {
            let line = d.to_training_json();
            let v: serde_json::Value = serde_json::from_str(&line).unwrap();
            let c = Claim::from_value_allowing(&v, &["outcome"]).unwrap_or_else(|e| {
                panic!("{line}: {e:?}");
            });
            assert_eq!(c, d.claim);
            *by.entry(d.mechanism).or_insert(0usize) += 1;
        }
        for m in [
            Mechanism::StagedCollision,
            Mechanism::BillingMill,
            Mechanism::MulePayout,
            Mechanism::PhantomDamage,
            Mechanism::Surge,
        ] {
            assert!(by.get(&m).copied().unwrap_or(0) > 10, "{m:?}: {by:?}");
        }
        for m in [
            Mechanism::Ring,
            Mechanism::EarlyLoss,
            Mechanism::StagedTheft,
        ] {
            assert!(!by.contains_key(&m), "{m:?} belongs to the first world");
        }
        let home = claims.iter().filter(|d| d.claim.line == Line::Home).count();
        assert!(home * 2 > claims.len(), "mostly home business");
        let tagged = claims
            .iter()
            .filter(|d| d.claim.catastrophe_code.is_some())
            .count();
        assert!(tagged > 100, "the storm is tagged");
    }
}
