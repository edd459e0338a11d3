//! Fit options: the trailing options string of a fit call, and their session-wide defaults.
//!
//! An options string is a comma-separated list of `key=value` pairs, for example
//! `'level=0.90, se=hc0, ref.material=iron'`. Session defaults come from `SET ratesheet.<key>`
//! (a DataFusion config extension); a key given in the call wins. Unknown keys and bad values
//! are planning errors that name the key and list what is valid.

use std::collections::BTreeMap;

use datafusion::common::config::{ConfigExtension, ConfigOptions};
use datafusion::common::extensions_options;
use datafusion::error::{DataFusionError, Result};
use serde::{Deserialize, Serialize};

use crate::glm::{FitOptions, SeType};

extensions_options! {
    /// Session-wide defaults for the fit functions (`SET ratesheet.level = 0.9`).
    pub struct RatesheetConfig {
        /// Confidence level of intervals, strictly between 0 and 1.
        pub level: f64, default = 0.95
        /// Standard errors: model, quasi, hc0 or hc1.
        pub se: String, default = "model".to_string()
        /// Rows with invalid values (negative count, exposure <= 0, NaN, infinite): error or skip.
        pub invalid: String, default = "error".to_string()
        /// Whether fits include an intercept.
        pub intercept: bool, default = true
        /// IRLS iteration cap.
        pub max_iter: usize, default = 100
        /// IRLS convergence tolerance on the relative deviance change.
        pub tol: f64, default = 1e-12
    }
}

impl ConfigExtension for RatesheetConfig {
    const PREFIX: &'static str = "ratesheet";
}

/// The keys an options string may use; `ref.<predictor>` names a factor's reference level.
pub const OPTION_KEYS: &[&str] = &[
    "level",
    "se",
    "invalid",
    "intercept",
    "max_iter",
    "tol",
    "ref.<predictor>",
];

/// What to do with a row holding an invalid value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum InvalidRows {
    Error,
    Skip,
}

/// Fully resolved settings of one fit call.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitSettings {
    pub level: f64,
    pub se: String,
    pub invalid: InvalidRows,
    pub intercept: bool,
    pub max_iter: usize,
    pub tol: f64,
    /// Reference level per factor predictor name.
    pub references: BTreeMap<String, String>,
}

impl FitSettings {
    /// Defaults of the session (or the built-in defaults when the extension is absent).
    pub fn from_session(config: &ConfigOptions) -> Result<FitSettings> {
        let defaults = config.extensions.get::<RatesheetConfig>().cloned().unwrap_or_default();
        let mut settings = FitSettings {
            level: 0.95,
            se: "model".into(),
            invalid: InvalidRows::Error,
            intercept: defaults.intercept,
            max_iter: 100,
            tol: 1e-12,
            references: BTreeMap::new(),
        };
        settings.apply("level", &defaults.level.to_string(), "SET ratesheet.level")?;
        settings.apply("se", &defaults.se, "SET ratesheet.se")?;
        settings.apply("invalid", &defaults.invalid, "SET ratesheet.invalid")?;
        settings.apply("max_iter", &defaults.max_iter.to_string(), "SET ratesheet.max_iter")?;
        settings.apply("tol", &defaults.tol.to_string(), "SET ratesheet.tol")?;
        Ok(settings)
    }

    /// Applies an options string on top of these settings. `function` names the SQL function in
    /// error messages.
    pub fn apply_string(&mut self, options: &str, function: &str) -> Result<()> {
        for item in options.split(',').map(str::trim).filter(|s| !s.is_empty()) {
            let Some((key, value)) = item.split_once('=') else {
                return Err(plan_error(format!(
                    "{function}: option '{item}' is not of the form key=value; valid keys: {}",
                    OPTION_KEYS.join(", ")
                )));
            };
            self.apply(key.trim(), value.trim(), function)?;
        }
        Ok(())
    }

    fn apply(&mut self, key: &str, value: &str, origin: &str) -> Result<()> {
        let bad = |what: &str| plan_error(format!("{origin}: {key}={value} is not valid: {what}"));
        match key {
            "level" => {
                let v: f64 = value
                    .parse()
                    .map_err(|_| bad("expected a number strictly between 0 and 1"))?;
                if !(v > 0.0 && v < 1.0) {
                    return Err(bad("expected a number strictly between 0 and 1"));
                }
                self.level = v;
            }
            "se" => {
                let se = SeType::parse(value).ok_or_else(|| bad("valid values are model, quasi, hc0, hc1"))?;
                self.se = se.name().to_string();
            }
            "invalid" => {
                self.invalid = match value.to_ascii_lowercase().as_str() {
                    "error" => InvalidRows::Error,
                    "skip" => InvalidRows::Skip,
                    _ => return Err(bad("valid values are error, skip")),
                }
            }
            "intercept" => {
                self.intercept = match value.to_ascii_lowercase().as_str() {
                    "yes" | "true" | "on" => true,
                    "no" | "false" | "off" => false,
                    _ => return Err(bad("valid values are yes, no")),
                }
            }
            "max_iter" => {
                let v: usize = value
                    .parse()
                    .map_err(|_| bad("expected a whole number from 1 to 10000"))?;
                if !(1..=10_000).contains(&v) {
                    return Err(bad("expected a whole number from 1 to 10000"));
                }
                self.max_iter = v;
            }
            "tol" => {
                let v: f64 = value.parse().map_err(|_| bad("expected a number in (0, 0.01]"))?;
                if !(v > 0.0 && v <= 0.01) {
                    return Err(bad("expected a number in (0, 0.01]"));
                }
                self.tol = v;
            }
            _ => {
                if let Some(predictor) = key.strip_prefix("ref.") {
                    if predictor.is_empty() || value.is_empty() {
                        return Err(bad("write ref.<predictor>=<level>"));
                    }
                    self.references.insert(predictor.to_string(), value.to_string());
                } else {
                    return Err(plan_error(format!(
                        "{origin}: unknown option '{key}'; valid keys: {}",
                        OPTION_KEYS.join(", ")
                    )));
                }
            }
        }
        Ok(())
    }

    pub fn se_type(&self) -> SeType {
        SeType::parse(&self.se).unwrap_or(SeType::Model)
    }

    pub fn fit_options(&self) -> FitOptions {
        FitOptions {
            max_iter: self.max_iter,
            tol: self.tol,
        }
    }
}

pub(crate) fn plan_error(msg: String) -> DataFusionError {
    DataFusionError::Plan(msg)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn call_options_override_session_defaults() {
        let mut config = ConfigOptions::new();
        config.extensions.insert(RatesheetConfig::default());
        config.set("ratesheet.level", "0.9").unwrap();
        let mut s = FitSettings::from_session(&config).unwrap();
        assert_eq!(s.level, 0.9);
        s.apply_string("se=HC1, level=0.99, ref.material=iron, invalid=skip", "poisson_fit")
            .unwrap();
        assert_eq!((s.level, s.se.as_str(), s.invalid), (0.99, "hc1", InvalidRows::Skip));
        assert_eq!(s.references["material"], "iron");
    }

    #[test]
    fn bad_options_name_the_key_and_the_valid_choices() {
        let mut s = FitSettings::from_session(&ConfigOptions::new()).unwrap();
        let e = s.apply_string("colour=red", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("unknown option 'colour'") && e.contains("level, se"), "{e}");
        let e = s.apply_string("se=robust", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("se=robust") && e.contains("model, quasi, hc0, hc1"), "{e}");
        let e = s.apply_string("level=95", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("strictly between 0 and 1"), "{e}");
        assert!(s.apply_string("level", "poisson_fit").is_err());
    }
}
