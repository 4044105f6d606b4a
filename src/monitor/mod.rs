//! Monitoring read-outs, all pure: drift of features and scores against the training baseline.
//! (Confusion counts by window and precision intervals join here with the outcomes loop.)

pub mod drift;
