//! Configuration: one TOML file, built-in defaults for every key, unknown keys refused, and
//! every problem reported at once.

use serde::{Deserialize, Serialize};
use std::path::Path;

/// Referral economics: what a review costs and how many reviews a day the team can do.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Referral {
    /// Cost of one review, in the claims' currency units.
    pub review_cost: f64,
    /// Reviews the investigation team completes per day.
    pub daily_capacity: f64,
    /// How the training command sets the referral threshold: "capacity" (refer the share of
    /// claims the team can review) or "expected_value" (refer when probability × claimed
    /// amount exceeds the review cost).
    pub rule: ThresholdRule,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ThresholdRule {
    Capacity,
    ExpectedValue,
}

impl Default for Referral {
    fn default() -> Self {
        Referral {
            review_cost: 300.0,
            daily_capacity: 1.5,
            rule: ThresholdRule::Capacity,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Trees {
    pub enabled: bool,
    pub iterations: usize,
    pub learning_rate: f32,
    pub max_depth: usize,
}

impl Default for Trees {
    fn default() -> Self {
        Trees {
            enabled: true,
            iterations: 150,
            learning_rate: 0.1,
            max_depth: 4,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Training {
    /// Model features by catalogue name; empty means the whole catalogue.
    pub features: Vec<String>,
    /// Attributes that must never be model features (protected characteristics and obvious
    /// proxies). Training refuses a feature list naming any of them.
    pub protected_attributes: Vec<String>,
    /// Share of the time-ordered data held out as the later, test part.
    pub test_share: f64,
    /// Folds of cross-validation on the training part.
    pub folds: usize,
    /// L2 penalties tried for logistic regression (alpha = 1/C).
    pub alphas: Vec<f64>,
    /// Clusters for the outlier model.
    pub clusters: usize,
    pub seed: u64,
    pub trees: Trees,
}

impl Default for Training {
    fn default() -> Self {
        Training {
            features: Vec::new(),
            protected_attributes: [
                "age",
                "date_of_birth",
                "gender",
                "sex",
                "ethnicity",
                "race",
                "nationality",
                "religion",
                "disability",
                "marital_status",
                "sexual_orientation",
                "postcode",
            ]
            .map(String::from)
            .to_vec(),
            test_share: 1.0 / 3.0,
            folds: 5,
            alphas: vec![10.0, 100.0, 1000.0],
            clusters: 8,
            seed: 20_251_202,
            trees: Trees::default(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    pub referral: Referral,
    pub training: Training,
}

#[derive(Debug, thiserror::Error)]
#[error("configuration {source_name} has {} problem(s):\n  - {}", .problems.len(), .problems.join("\n  - "))]
pub struct ConfigError {
    pub source_name: String,
    pub problems: Vec<String>,
}

impl Config {
    pub fn from_toml(text: &str, source_name: &str) -> Result<Config, ConfigError> {
        let fail = |problems| ConfigError {
            source_name: source_name.to_string(),
            problems,
        };
        let value: toml::Value =
            toml::from_str(text).map_err(|e: toml::de::Error| fail(vec![e.to_string()]))?;
        // Unknown keys first, all of them, by comparing with the defaults' own keys.
        let mut problems: Vec<String> = Vec::new();
        check_keys(&value, &Config::default(), "", &mut problems);
        if !problems.is_empty() {
            return Err(fail(problems));
        }
        let config: Config = value
            .try_into()
            .map_err(|e: toml::de::Error| fail(vec![e.message().to_string()]))?;
        config.validate().map_err(fail)?;
        Ok(config)
    }

    pub fn read(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            source_name: path.display().to_string(),
            problems: vec![format!("cannot read: {e}")],
        })?;
        Config::from_toml(&text, &path.display().to_string())
    }

    /// Every semantic problem, at once.
    pub fn validate(&self) -> Result<(), Vec<String>> {
        let mut p = Vec::new();
        let r = &self.referral;
        if !(r.review_cost.is_finite() && r.review_cost >= 0.0) {
            p.push("referral.review_cost: must be a finite number >= 0".into());
        }
        if !(r.daily_capacity.is_finite() && r.daily_capacity > 0.0) {
            p.push("referral.daily_capacity: must be a finite number > 0".into());
        }
        let t = &self.training;
        if !(t.test_share > 0.0 && t.test_share < 1.0) {
            p.push("training.test_share: must be strictly between 0 and 1".into());
        }
        if t.folds < 2 {
            p.push("training.folds: must be at least 2".into());
        }
        if t.alphas.is_empty() || t.alphas.iter().any(|a| !(a.is_finite() && *a > 0.0)) {
            p.push("training.alphas: must be a non-empty list of positive numbers".into());
        }
        if t.clusters == 0 {
            p.push("training.clusters: must be at least 1".into());
        }
        if t.trees.iterations == 0 || t.trees.max_depth == 0 {
            p.push("training.trees: iterations and max_depth must be at least 1".into());
        }
        if !(t.trees.learning_rate > 0.0 && t.trees.learning_rate <= 1.0) {
            p.push("training.trees.learning_rate: must be in (0, 1]".into());
        }
        if let Err(missing) = crate::features::resolve(&t.features) {
            p.push(format!(
                "training.features: unknown feature(s) {missing:?}; known: {}",
                crate::features::names().join(", ")
            ));
        }
        for f in &t.features {
            let lower = f.to_ascii_lowercase();
            if let Some(attr) = t
                .protected_attributes
                .iter()
                .find(|a| !a.is_empty() && lower.contains(&a.to_ascii_lowercase()))
            {
                p.push(format!(
                    "training.features: {f:?} names the protected attribute {attr:?}; protected attributes must not be model features"
                ));
            }
        }
        if p.is_empty() { Ok(()) } else { Err(p) }
    }

    /// The model's feature names: the configured list, or the whole catalogue.
    pub fn feature_names(&self) -> Vec<String> {
        if self.training.features.is_empty() {
            crate::features::names()
                .into_iter()
                .map(String::from)
                .collect()
        } else {
            self.training.features.clone()
        }
    }
}

/// Compare the keys of a parsed TOML table with the keys of the defaults serialised to TOML.
fn check_keys<T: Serialize>(
    value: &toml::Value,
    defaults: &T,
    prefix: &str,
    out: &mut Vec<String>,
) {
    let Ok(schema) = toml::Value::try_from(defaults) else {
        return;
    };
    walk(value, &schema, prefix, out);
}

fn walk(value: &toml::Value, schema: &toml::Value, prefix: &str, out: &mut Vec<String>) {
    if let (toml::Value::Table(v), toml::Value::Table(s)) = (value, schema) {
        for (k, sub) in v {
            let path = if prefix.is_empty() {
                k.clone()
            } else {
                format!("{prefix}.{k}")
            };
            match s.get(k) {
                None => out.push(format!("{path}: unknown key")),
                Some(sub_schema) => walk(sub, sub_schema, &path, out),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shipped_config_is_the_defaults_written_out() {
        let text = include_str!("../config/weir.toml");
        assert_eq!(
            Config::from_toml(text, "config/weir.toml").unwrap(),
            Config::default()
        );
    }

    #[test]
    fn defaults_are_valid_and_empty_file_gives_defaults() {
        assert_eq!(Config::from_toml("", "t").unwrap(), Config::default());
    }

    #[test]
    fn reports_every_problem_at_once() {
        let text = r#"
            [referral]
            review_cost = -1
            daily_capacity = 0
            colour = "red"
            [training]
            folds = 1
            features = ["night_loss", "claimant_age", "shoe_size"]
            protected_attributes = ["age"]
            [extra]
            x = 1
        "#;
        let err = Config::from_toml(text, "t").unwrap_err();
        let all = err.problems.join("\n");
        for needle in ["referral.colour: unknown key", "extra: unknown key"] {
            assert!(all.contains(needle), "{needle} missing from\n{all}");
        }
        // Unknown keys are reported before values are checked; fix them and the rest shows.
        let text = text
            .replace("colour = \"red\"", "")
            .replace("[extra]\n            x = 1", "");
        let err = Config::from_toml(&text, "t").unwrap_err();
        let all = err.problems.join("\n");
        for needle in [
            "referral.review_cost",
            "referral.daily_capacity",
            "training.folds",
            "\"shoe_size\"",
            "\"claimant_age\" names the protected attribute \"age\"",
        ] {
            assert!(all.contains(needle), "{needle} missing from\n{all}");
        }
    }
}
