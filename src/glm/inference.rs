//! Wald inference per coefficient and tests per fit.
//!
//! Per term: SE = sqrt(V_jj), statistic = b/SE, two-sided p-value, interval b ± q·SE with the
//! exact quantile q of the reference distribution at the chosen level, and exp of all three
//! (a rate ratio for Poisson terms; a ratio of geometric means for a Gaussian fit of a log).
//! Covariance variants:
//! * `Model`: (X'WX)⁻¹, times the residual variance for families with an estimated scale;
//! * `Quasi`: (X'WX)⁻¹ times the Pearson dispersion X²/df_resid (quasi-Poisson; normal quantiles);
//! * `Hc0`: the sandwich (X'WX)⁻¹ (Σ s_i² x_i x_i') (X'WX)⁻¹ (White 1980; Huber 1967);
//! * `Hc1`: HC0 times n/(n - p) (MacKinnon & White 1985), p = estimated coefficients.
//!
//! The family's [`Scale`] picks the reference distribution: the standard normal, or Student t
//! with df_resid for an estimated scale (as ordinary least squares does).

use super::distributions::{chi2_sf, f_sf, normal_quantile, normal_sf, student_t_quantile, student_t_sf};
use super::error::FitError;
use super::family::Scale;
use super::fit::{FitIssue, GlmFit, TermState};

/// Which covariance the standard errors come from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SeType {
    Model,
    Quasi,
    Hc0,
    Hc1,
}

impl SeType {
    pub const ALL: [SeType; 4] = [SeType::Model, SeType::Quasi, SeType::Hc0, SeType::Hc1];

    /// The option value naming this variant.
    pub fn name(self) -> &'static str {
        match self {
            SeType::Model => "model",
            SeType::Quasi => "quasi",
            SeType::Hc0 => "hc0",
            SeType::Hc1 => "hc1",
        }
    }

    pub fn parse(s: &str) -> Option<SeType> {
        SeType::ALL
            .into_iter()
            .find(|t| t.name().eq_ignore_ascii_case(s.trim()))
    }
}

/// One row of a coefficient table. Numbers are `None` where the term is flagged or where the
/// chosen standard error does not exist (e.g. quasi with df_resid = 0).
#[derive(Debug, Clone, PartialEq)]
pub struct TermRow {
    pub term: String,
    pub estimate: Option<f64>,
    pub std_error: Option<f64>,
    /// z for fixed-scale families, t otherwise.
    pub statistic: Option<f64>,
    pub p_value: Option<f64>,
    pub ci_low: Option<f64>,
    pub ci_high: Option<f64>,
    pub rate_ratio: Option<f64>,
    pub rr_low: Option<f64>,
    pub rr_high: Option<f64>,
    pub flag: Option<&'static str>,
}

/// Checks a confidence level: strictly between 0 and 1.
pub fn check_level(level: f64) -> Result<f64, FitError> {
    if level > 0.0 && level < 1.0 {
        Ok(level)
    } else {
        Err(FitError::BadSpec(format!(
            "confidence level must be strictly between 0 and 1, got {level}"
        )))
    }
}

/// The coefficient table of `fit` with standard errors of kind `se` and intervals at `level`.
pub fn term_table(fit: &GlmFit, se: SeType, level: f64) -> Result<Vec<TermRow>, FitError> {
    check_level(level)?;
    let df = fit.stats.df_resid.unwrap_or(0);
    let scale = se_scale(fit, se);
    let use_t = fit.scale.uses_t();
    let quantile = wald_quantile(fit.scale, fit.stats.df_resid, level);
    Ok(fit
        .names
        .iter()
        .enumerate()
        .map(|(j, name)| {
            let state = fit.states[j];
            let mut row = TermRow {
                term: name.clone(),
                estimate: None,
                std_error: None,
                statistic: None,
                p_value: None,
                ci_low: None,
                ci_high: None,
                rate_ratio: None,
                rr_low: None,
                rr_high: None,
                flag: state.flag(),
            };
            if state != TermState::Estimated {
                return row;
            }
            let b = fit.estimates[j];
            row.estimate = Some(b);
            row.rate_ratio = finite(b.exp());
            let (Some(scale), Some(q)) = (scale, quantile) else {
                return row;
            };
            let s = (base_covariance(fit, se)[(j, j)] * scale).sqrt();
            if !(s.is_finite() && s > 0.0) {
                return row;
            }
            let stat = b / s;
            row.std_error = Some(s);
            row.statistic = Some(stat);
            row.p_value = Some(if use_t {
                2.0 * student_t_sf(stat.abs(), df as f64)
            } else {
                2.0 * normal_sf(stat.abs())
            });
            row.ci_low = Some(b - q * s);
            row.ci_high = Some(b + q * s);
            row.rr_low = finite((b - q * s).exp());
            row.rr_high = finite((b + q * s).exp());
            row
        })
        .collect())
}

/// `Some(v)` for finite v: exp of a large estimate overflows, and is then not reported.
fn finite(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// The covariance the standard errors of kind `se` come from, before its scale factor.
fn base_covariance(fit: &GlmFit, se: SeType) -> &nalgebra::DMatrix<f64> {
    match se {
        SeType::Model | SeType::Quasi => &fit.cov_unscaled,
        SeType::Hc0 | SeType::Hc1 => &fit.cov_sandwich,
    }
}

/// The covariance of the coefficients behind standard errors of kind `se` (zero rows and
/// columns for terms not estimated); `None` when it does not exist (quasi or HC1 without
/// residual degrees of freedom). Scoring intervals use it (the delta method on x'b).
pub fn coefficient_covariance(fit: &GlmFit, se: SeType) -> Option<nalgebra::DMatrix<f64>> {
    let scale = se_scale(fit, se)?;
    Some(base_covariance(fit, se) * scale)
}

/// The quantile of the reference distribution of `fit`'s Wald intervals at `level` (normal, or
/// t on df_resid for an estimated scale); `None` without residual degrees of freedom for t.
pub fn wald_quantile(fit_scale: Scale, df_resid: Option<usize>, level: f64) -> Option<f64> {
    if fit_scale.uses_t() {
        let df = df_resid.filter(|&d| d > 0)? as f64;
        Some(student_t_quantile(0.5 + level / 2.0, df))
    } else {
        Some(normal_quantile(0.5 + level / 2.0))
    }
}

/// Factor applied to the chosen covariance's diagonal; `None` when it does not exist.
fn se_scale(fit: &GlmFit, se: SeType) -> Option<f64> {
    let df = fit.stats.df_resid?;
    match se {
        SeType::Model if fit.scale != Scale::Estimated => Some(1.0),
        SeType::Model | SeType::Quasi => fit.dispersion(),
        SeType::Hc0 => Some(1.0),
        SeType::Hc1 => (df > 0).then(|| fit.stats.n_used as f64 / df as f64),
    }
}

/// A test statistic with its degrees of freedom and p-value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ModelTest {
    pub statistic: f64,
    pub df: f64,
    /// Denominator degrees of freedom for an F test; `None` for chi-square tests.
    pub df_denominator: Option<f64>,
    pub p_value: f64,
}

/// Test of the model against the null model (intercept and offset only): the likelihood-ratio
/// chi-square (null deviance - deviance on the model's df), or for families with an estimated
/// scale the F test ((D0 - D)/df1)/(D/df2).
pub fn model_test(fit: &GlmFit) -> Option<ModelTest> {
    let df1 = fit.model_df();
    let (dev, null) = (fit.stats.deviance?, fit.stats.null_deviance?);
    if df1 == 0
        || !fit.issues.iter().all(|i| {
            matches!(
                i,
                FitIssue::RankDeficient { .. } | FitIssue::Boundary { .. } | FitIssue::Saturated
            )
        })
    {
        return None;
    }
    let df1 = df1 as f64;
    if !fit.scale.uses_t() {
        // With the family's own parameter re-estimated in the null model the deviances are at
        // different parameters: the test is 2 (loglik - null loglik).
        let stat = if fit.scale == Scale::OwnParameter {
            2.0 * (fit.stats.loglik? - fit.stats.null_loglik?)
        } else {
            null - dev
        }
        .max(0.0);
        Some(ModelTest {
            statistic: stat,
            df: df1,
            df_denominator: None,
            p_value: chi2_sf(stat, df1),
        })
    } else {
        let df2 = fit.stats.df_resid? as f64;
        if df2 == 0.0 || dev <= 0.0 {
            return None;
        }
        let f = ((null - dev) / df1) / (dev / df2);
        Some(ModelTest {
            statistic: f,
            df: df1,
            df_denominator: Some(df2),
            p_value: f_sf(f, df1, df2)?,
        })
    }
}

/// Goodness-of-fit p-value P(chi²_df > statistic), for the deviance or Pearson's X².
pub fn gof_p_value(statistic: Option<f64>, df: Option<usize>) -> Option<f64> {
    match (statistic, df) {
        (Some(s), Some(df)) if df > 0 && s.is_finite() => Some(chi2_sf(s, df as f64)),
        _ => None,
    }
}

/// Likelihood-ratio test of a smaller model nested in a bigger one, from their deviances.
pub fn nested_lr_test(bigger_deviance: f64, smaller_deviance: f64, df: usize) -> Option<ModelTest> {
    if df == 0 {
        return None;
    }
    let stat = (smaller_deviance - bigger_deviance).max(0.0);
    Some(ModelTest {
        statistic: stat,
        df: df as f64,
        df_denominator: None,
        p_value: chi2_sf(stat, df as f64),
    })
}
