//! Options of the standardisation aggregates: `level`, `invalid` (both with the session defaults
//! of `SET ratesheet.level` / `ratesheet.invalid`), and for `standardized_rate` also `per` and
//! `method`. Same `key=value, ...` syntax and error wording as the fits' options.

use datafusion::common::config::ConfigOptions;
use datafusion::error::Result;

use crate::glm::standardize::GammaShift;
use crate::sql::model::options::{InvalidRows, RatesheetConfig, parse_level, parse_pairs, plan_error};

/// Which standardisation an aggregate performs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Standardization {
    /// `standardized_rate`: direct, one row per stratum with a standard weight.
    Direct,
    /// `standardized_ratio`: indirect, observed over expected.
    Indirect,
}

impl Standardization {
    pub fn sql_name(self) -> &'static str {
        match self {
            Standardization::Direct => "standardized_rate",
            Standardization::Indirect => "standardized_ratio",
        }
    }

    /// The option keys the function accepts.
    pub fn keys(self) -> &'static [&'static str] {
        match self {
            Standardization::Direct => &["level", "per", "method", "invalid"],
            Standardization::Indirect => &["level", "invalid"],
        }
    }
}

/// Fully resolved options of one call.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StandardizeSettings {
    pub level: f64,
    /// Rates are reported per this many units of exposure.
    pub per: f64,
    pub method: GammaShift,
    pub invalid: InvalidRows,
}

impl StandardizeSettings {
    pub fn builtin() -> StandardizeSettings {
        StandardizeSettings {
            level: 0.95,
            per: 1.0,
            method: GammaShift::FayFeuer,
            invalid: InvalidRows::Error,
        }
    }

    /// Built-in defaults, then the session's `level` and `invalid` unless the call gives them,
    /// then the call's options (`options`, the trailing string).
    pub fn resolve(config: &ConfigOptions, options: &str, kind: Standardization) -> Result<StandardizeSettings> {
        let function = kind.sql_name();
        let given = parse_pairs(options, function, kind.keys())?;
        let mut s = StandardizeSettings::builtin();
        if let Some(session) = config.extensions.get::<RatesheetConfig>() {
            if !given.iter().any(|(k, _)| k == "level") {
                s.level = session.level;
            }
            if !given.iter().any(|(k, _)| k == "invalid") && session.invalid == "skip" {
                s.invalid = InvalidRows::Skip;
            }
        }
        for (key, value) in &given {
            s.apply(kind, key, value)?;
        }
        Ok(s)
    }

    /// The options string alone, without session defaults (calls that the optimizer did not
    /// rewrite, for example window calls).
    pub fn parse(options: &str, kind: Standardization) -> Result<StandardizeSettings> {
        let mut s = StandardizeSettings::builtin();
        for (key, value) in parse_pairs(options, kind.sql_name(), kind.keys())? {
            s.apply(kind, &key, &value)?;
        }
        Ok(s)
    }

    /// Every key written out, so that resolving the text again gives the same settings
    /// whatever the session says.
    pub fn to_options(self, kind: Standardization) -> String {
        let invalid = match self.invalid {
            InvalidRows::Error => "error",
            InvalidRows::Skip => "skip",
        };
        match kind {
            Standardization::Direct => format!(
                "level={}, per={}, method={}, invalid={invalid}",
                self.level,
                self.per,
                self.method.name()
            ),
            Standardization::Indirect => format!("level={}, invalid={invalid}", self.level),
        }
    }

    fn apply(&mut self, kind: Standardization, key: &str, value: &str) -> Result<()> {
        let function = kind.sql_name();
        let bad = |what: &str| plan_error(format!("{function}: {key}={value} is not valid: {what}"));
        if !kind.keys().contains(&key) {
            return Err(plan_error(format!(
                "{function}: unknown option '{key}'; valid keys: {}",
                kind.keys().join(", ")
            )));
        }
        match key {
            "level" => {
                self.level = parse_level(value).ok_or_else(|| bad("expected a number strictly between 0 and 1"))?
            }
            "per" => {
                let v: f64 = value.parse().map_err(|_| bad("expected a finite number > 0"))?;
                if !(v.is_finite() && v > 0.0) {
                    return Err(bad("expected a finite number > 0"));
                }
                self.per = v;
            }
            "method" => {
                self.method = GammaShift::parse(value).ok_or_else(|| bad("valid values are fay_feuer, tiwari"))?;
            }
            "invalid" => {
                self.invalid = match value.to_ascii_lowercase().as_str() {
                    "error" => InvalidRows::Error,
                    "skip" => InvalidRows::Skip,
                    _ => return Err(bad("valid values are error, skip")),
                }
            }
            _ => return Err(plan_error(format!("{function}: option '{key}' has no meaning here"))),
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_written_options_resolve_to_the_same_settings_in_any_session() {
        let mut config = ConfigOptions::new();
        config.extensions.insert(RatesheetConfig::default());
        config.set("ratesheet.level", "0.9").unwrap();
        config.set("ratesheet.invalid", "skip").unwrap();
        let kind = Standardization::Direct;
        let s = StandardizeSettings::resolve(&config, "per=100000, method=Tiwari", kind).unwrap();
        assert_eq!(
            (s.level, s.per, s.method, s.invalid),
            (0.9, 1e5, GammaShift::Tiwari, InvalidRows::Skip)
        );
        let text = s.to_options(kind);
        let mut other = ConfigOptions::new();
        other.extensions.insert(RatesheetConfig::default());
        assert_eq!(StandardizeSettings::resolve(&other, &text, kind).unwrap(), s);
        let e = StandardizeSettings::parse("per=0", kind).unwrap_err().to_string();
        assert!(e.contains("standardized_rate: per=0 is not valid"), "{e}");
        let e = StandardizeSettings::parse("method=fay", kind).unwrap_err().to_string();
        assert!(e.contains("fay_feuer, tiwari"), "{e}");
        let e = StandardizeSettings::parse("per=10", Standardization::Indirect)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("unknown option 'per'") && e.contains("level, invalid"),
            "{e}"
        );
    }
}
