//! weir: triage of insurance claims for fraud review.
//!
//! A flag from weir is a referral for human review, never a finding of fraud and never a
//! reason to deny or delay payment.
//!
//! The parts, in the order a claim meets them:
//!
//! * [`claim`]: the claim schema; parsing and validation with every problem named by field.
//! * [`features`]: claim-level features and history features across claims (the same
//!   claimant, policy, repairer, medical provider, attorney, bank account or address seen
//!   before), read through the [`features::HistoryView`] trait so training and serving share
//!   one implementation.
//! * [`model`]: the supervised model artifact (standardisation, logistic regression or boosted
//!   trees, Platt calibration, reasons) and [`outliers`]: k-means distance scores normalised by
//!   each cluster's own spread.
//! * [`feedback`]: adjudicated outcomes and how they map to labels.
//! * [`metrics`] and [`monitor`]: evaluation (ROC AUC, confusion counts, calibration) and drift
//!   (PSI, KS), all pure.
//! * [`train`]: offline training with a time-ordered hold-out, k-fold cross-validation,
//!   class balancing, calibration and an honest report.
//! * [`config`]: the TOML configuration; [`demo_data`]: an invented scenario for trying it out.
//!
//! The scoring core (`claim` → `features` → `model` + `outliers`) is pure: no I/O, no clock.

pub mod claim;
pub mod cli;
pub mod config;
pub mod demo_data;
pub mod features;
pub mod feedback;
pub mod metrics;
pub mod model;
pub mod monitor;
pub mod outliers;
pub mod train;
