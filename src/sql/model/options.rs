//! Fit options: the trailing options string of a fit call, and their session-wide defaults.
//!
//! An options string is a comma-separated list of `key=value` pairs, for example
//! `'level=0.90, se=hc0, ref.material=iron'`. Session defaults come from `SET ratesheet.<key>`
//! (a DataFusion config extension); a key given in the call wins. Unknown keys and bad values
//! are planning errors that name the key and list what is valid.

use std::any::Any;
use std::collections::BTreeMap;

use datafusion::common::config::{ConfigEntry, ConfigExtension, ConfigOptions, ExtensionOptions};
use datafusion::error::{DataFusionError, Result};
use serde::{Deserialize, Serialize};

use crate::glm::{FitOptions, SeType};

/// Session-wide defaults for the fit functions (`SET ratesheet.level = 0.9`).
///
/// `SET` validates a value with the same rule as the options string and refuses a bad one at
/// once, naming the valid range; an unknown key lists the valid ones. `SHOW ratesheet.level`
/// (with the information schema on) shows the current value.
#[derive(Debug, Clone, PartialEq)]
pub struct RatesheetConfig {
    /// Confidence level of intervals, strictly between 0 and 1.
    pub level: f64,
    /// Standard errors: model, quasi, hc0 or hc1.
    pub se: String,
    /// Rows with invalid values (negative count, exposure <= 0, NaN, infinite): error or skip.
    pub invalid: String,
    /// Whether fits include an intercept.
    pub intercept: bool,
    /// IRLS iteration cap.
    pub max_iter: usize,
    /// IRLS convergence tolerance on the relative deviance change.
    pub tol: f64,
}

impl Default for RatesheetConfig {
    fn default() -> Self {
        let s = FitSettings::builtin();
        RatesheetConfig {
            level: s.level,
            se: s.se,
            invalid: "error".into(),
            intercept: s.intercept,
            max_iter: s.max_iter,
            tol: s.tol,
        }
    }
}

/// The keys `SET ratesheet.<key>` accepts, with their descriptions (also shown by `SHOW`).
pub const SESSION_KEYS: &[(&str, &str)] = &[
    (
        "level",
        "Confidence level of intervals, strictly between 0 and 1 (default 0.95).",
    ),
    ("se", "Standard errors: model, quasi, hc0 or hc1 (default model)."),
    ("invalid", "Rows with invalid values: error or skip (default error)."),
    (
        "intercept",
        "Whether fits include an intercept: yes or no (default yes).",
    ),
    ("max_iter", "IRLS iteration cap, 1 to 10000 (default 100)."),
    ("tol", "IRLS convergence tolerance, in (0, 0.01] (default 1e-12)."),
];

impl RatesheetConfig {
    /// The session value of `key` as option text (the form [`FitSettings`] parses).
    fn value(&self, key: &str) -> Option<String> {
        Some(match key {
            "level" => self.level.to_string(),
            "se" => self.se.clone(),
            "invalid" => self.invalid.clone(),
            "intercept" => if self.intercept { "yes" } else { "no" }.to_string(),
            "max_iter" => self.max_iter.to_string(),
            "tol" => self.tol.to_string(),
            _ => return None,
        })
    }
}

impl ConfigExtension for RatesheetConfig {
    const PREFIX: &'static str = "ratesheet";
}

impl ExtensionOptions for RatesheetConfig {
    fn as_any(&self) -> &dyn Any {
        self
    }

    fn as_any_mut(&mut self) -> &mut dyn Any {
        self
    }

    fn cloned(&self) -> Box<dyn ExtensionOptions> {
        Box::new(self.clone())
    }

    /// Validates with the options-string rule and stores the value in its canonical form.
    fn set(&mut self, key: &str, value: &str) -> Result<()> {
        if !SESSION_KEYS.iter().any(|(k, _)| *k == key) {
            let keys: Vec<String> = SESSION_KEYS.iter().map(|(k, _)| format!("ratesheet.{k}")).collect();
            return Err(plan_error(format!(
                "SET ratesheet.{key}: unknown setting; valid settings: {}",
                keys.join(", ")
            )));
        }
        let mut checked = FitSettings::builtin();
        checked.apply(key, value.trim(), &format!("SET ratesheet.{key}"))?;
        match key {
            "level" => self.level = checked.level,
            "se" => self.se = checked.se,
            "invalid" => {
                self.invalid = match checked.invalid {
                    InvalidRows::Error => "error".into(),
                    InvalidRows::Skip => "skip".into(),
                }
            }
            "intercept" => self.intercept = checked.intercept,
            "max_iter" => self.max_iter = checked.max_iter,
            _ => self.tol = checked.tol,
        }
        Ok(())
    }

    fn entries(&self) -> Vec<ConfigEntry> {
        SESSION_KEYS
            .iter()
            .map(|(key, description)| ConfigEntry {
                key: format!("{}.{key}", Self::PREFIX),
                value: self.value(key),
                description,
            })
            .collect()
    }
}

/// The keys an options string may use; `ref.<predictor>` names a factor's reference level.
pub const OPTION_KEYS: &[&str] = &[
    "level",
    "se",
    "invalid",
    "intercept",
    "max_iter",
    "tol",
    "ci",
    "response",
    "ref.<predictor>",
];

/// What to do with a row holding an invalid value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum InvalidRows {
    Error,
    Skip,
}

/// How intervals are computed (option `ci`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum CiMethod {
    /// estimate ± quantile · standard error.
    Wald,
    /// Where the profile log-likelihood drops by half the chi-square quantile.
    Profile,
}

impl CiMethod {
    pub fn name(self) -> &'static str {
        match self {
            CiMethod::Wald => "wald",
            CiMethod::Profile => "profile",
        }
    }
}

/// How the response of a least-squares fit is to be read (option `response`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum ResponseScale {
    /// A natural logarithm: exp(coefficient) is a ratio (of geometric means).
    Log,
    /// Anything else: exp(coefficient) means nothing, and no ratio is reported.
    Plain,
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
    /// The `response` option as given; `None` when the call leaves it to the response
    /// expression (see `spec::resolve_call`).
    pub response: Option<ResponseScale>,
    pub ci: CiMethod,
    /// Reference level per factor predictor name.
    pub references: BTreeMap<String, String>,
}

impl FitSettings {
    /// The built-in defaults.
    pub fn builtin() -> FitSettings {
        FitSettings {
            level: 0.95,
            se: "model".into(),
            invalid: InvalidRows::Error,
            intercept: true,
            max_iter: 100,
            tol: 1e-12,
            response: None,
            ci: CiMethod::Wald,
            references: BTreeMap::new(),
        }
    }

    /// The settings of one call: built-in defaults, then the session's defaults for every key
    /// the call does not give, then the call's own options (`options`, the trailing string).
    /// A key given in the call wins, so a session default never breaks a call that overrides
    /// it. `function` names the SQL function in error messages.
    pub fn resolve(config: &ConfigOptions, options: &str, function: &str) -> Result<FitSettings> {
        let given = parse_pairs(options, function, OPTION_KEYS)?;
        let mut settings = FitSettings::builtin();
        if let Some(session) = config.extensions.get::<RatesheetConfig>() {
            for (key, _) in SESSION_KEYS {
                if !given.iter().any(|(k, _)| k == key) {
                    let value = session.value(key).unwrap_or_default();
                    settings.apply(key, &value, &format!("SET ratesheet.{key}"))?;
                }
            }
        }
        for (key, value) in &given {
            settings.apply(key, value, function)?;
        }
        Ok(settings)
    }

    /// Applies an options string on top of these settings. `function` names the SQL function in
    /// error messages.
    pub fn apply_string(&mut self, options: &str, function: &str) -> Result<()> {
        for (key, value) in parse_pairs(options, function, OPTION_KEYS)? {
            self.apply(&key, &value, function)?;
        }
        Ok(())
    }

    fn apply(&mut self, key: &str, value: &str, origin: &str) -> Result<()> {
        let bad = |what: &str| plan_error(format!("{origin}: {key}={value} is not valid: {what}"));
        match key {
            "level" => {
                self.level = parse_level(value).ok_or_else(|| bad("expected a number strictly between 0 and 1"))?
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
            "ci" => {
                self.ci = match value.to_ascii_lowercase().as_str() {
                    "wald" => CiMethod::Wald,
                    "profile" => CiMethod::Profile,
                    _ => return Err(bad("valid values are wald, profile")),
                }
            }
            "response" => {
                self.response = Some(match value.to_ascii_lowercase().as_str() {
                    "log" => ResponseScale::Log,
                    "plain" => ResponseScale::Plain,
                    _ => return Err(bad("valid values are log (the response is a natural logarithm), plain")),
                })
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

/// The `key=value` pairs of an options string, in order; `keys` (the valid ones) are listed
/// when an item is not a pair.
pub(crate) fn parse_pairs(options: &str, function: &str, keys: &[&str]) -> Result<Vec<(String, String)>> {
    options
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|item| match item.split_once('=') {
            Some((key, value)) => Ok((key.trim().to_string(), value.trim().to_string())),
            None => Err(plan_error(format!(
                "{function}: option '{item}' is not of the form key=value; valid keys: {}",
                keys.join(", ")
            ))),
        })
        .collect()
}

/// A confidence level: a number strictly between 0 and 1.
pub(crate) fn parse_level(value: &str) -> Option<f64> {
    value.trim().parse::<f64>().ok().filter(|v| *v > 0.0 && *v < 1.0)
}

pub(crate) fn plan_error(msg: String) -> DataFusionError {
    DataFusionError::Plan(msg)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn session() -> ConfigOptions {
        let mut config = ConfigOptions::new();
        config.extensions.insert(RatesheetConfig::default());
        config
    }

    #[test]
    fn call_options_override_session_defaults() {
        let mut config = session();
        config.set("ratesheet.level", "0.9").unwrap();
        config.set("ratesheet.se", "hc0").unwrap();
        assert_eq!(FitSettings::resolve(&config, "", "poisson_fit").unwrap().level, 0.9);
        let s = FitSettings::resolve(
            &config,
            "se=HC1, level=0.99, ref.material=iron, invalid=skip",
            "poisson_fit",
        )
        .unwrap();
        assert_eq!((s.level, s.se.as_str(), s.invalid), (0.99, "hc1", InvalidRows::Skip));
        assert_eq!(s.references["material"], "iron");
    }

    #[test]
    fn a_bad_session_value_is_refused_when_set_and_leaves_the_old_one() {
        let mut config = session();
        let e = config.set("ratesheet.level", "95").unwrap_err().to_string();
        assert!(
            e.contains("SET ratesheet.level: level=95 is not valid") && e.contains("strictly between 0 and 1"),
            "{e}"
        );
        assert_eq!(config.extensions.get::<RatesheetConfig>().unwrap().level, 0.95);
        let e = config.set("ratesheet.levle", "0.9").unwrap_err().to_string();
        assert!(
            e.contains("unknown setting") && e.contains("ratesheet.level, ratesheet.se"),
            "{e}"
        );
        config.set("ratesheet.intercept", "false").unwrap();
        config.set("ratesheet.se", "HC1").unwrap();
        let entries = config.entries();
        let value = |k: &str| entries.iter().find(|e| e.key == k).and_then(|e| e.value.clone());
        assert_eq!(value("ratesheet.intercept").as_deref(), Some("no"));
        assert_eq!(value("ratesheet.se").as_deref(), Some("hc1"));
    }

    #[test]
    fn bad_options_name_the_key_and_the_valid_choices() {
        let mut s = FitSettings::builtin();
        let e = s.apply_string("colour=red", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("unknown option 'colour'") && e.contains("level, se"), "{e}");
        let e = s.apply_string("se=robust", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("se=robust") && e.contains("model, quasi, hc0, hc1"), "{e}");
        let e = s.apply_string("level=95", "poisson_fit").unwrap_err().to_string();
        assert!(e.contains("strictly between 0 and 1"), "{e}");
        assert!(s.apply_string("level", "poisson_fit").is_err());
    }
}
