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
//! * [`model`]: the supervised model artifact (standardisation, logistic regression, boosted
//!   trees or a blend of both, Platt or isotonic calibration, reasons) and [`outliers`]:
//!   k-means distance scores normalised by each cluster's own spread.
//! * [`feedback`]: adjudicated outcomes and how they map to labels.
//! * [`metrics`] and [`monitor`]: evaluation (ROC AUC, confusion counts, calibration) and drift
//!   (PSI, KS), all pure.
//! * [`train`]: offline training with a time-ordered hold-out, k-fold cross-validation that
//!   selects by precision at the review capacity, class balancing, calibration and an honest
//!   report; [`elsewhere`]: the same model scored on a second book of business.
//! * [`rules`]: rules from a reviewed file, and the combination of scores and rules into a
//!   queue and a priority.
//! * [`store`]: the embedded sled store (atomic multi-tree writes, group-committed flushes);
//!   [`service`]: intake and queue operations on it; [`http`]: the thin axum layer;
//!   [`server`]: start-up and shutdown; [`telemetry`]: metrics and logs; [`report`]: the
//!   self-contained HTML monitoring report.
//! * [`config`]: the TOML configuration; [`demo_data`]: two invented worlds, one for trying
//!   weir out and one written only to evaluate it;
//!   [`demo`]: the whole loop on it; [`client`]: a small HTTP client for the demo and tests.
//!
//! The scoring core (`claim` → `features` → `model` + `outliers` → `rules`) is pure: no I/O, no
//! clock. The service and the training command both call it.

pub mod access;
pub mod claim;
pub mod cli;
pub mod client;
pub mod config;
pub mod demo;
pub mod demo_data;
pub mod drawing;
pub mod elsewhere;
pub mod features;
pub mod feedback;
pub mod graph;
pub mod http;
pub mod metrics;
pub mod model;
pub mod monitor;
pub mod outliers;
pub mod pg_store;
pub mod report;
pub mod rings;
pub mod rules;
pub mod server;
pub mod service;
pub mod store;
pub mod stream;
pub mod telemetry;
pub mod train;
pub mod web;
