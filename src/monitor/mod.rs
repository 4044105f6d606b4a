//! Monitoring read-outs, all pure: drift of features and scores against the training baseline
//! ([`drift`]); confusion counts by week, precision with its interval, audit-sample estimates
//! and referral rates by segment ([`quality`]).

pub mod drift;
pub mod quality;
