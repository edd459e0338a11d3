//! Fitting a generalized linear model, as a few small steps: check the input, screen the
//! trivial cases (too few rows, no events), find aliased columns, run IRLS
//! ([`irls`](super::irls)), handle estimates at the boundary, compute the covariances, then the
//! statistics. Each step is one function below.
//!
//! Boundary estimates (a zero-count cell whose fitted mean runs to 0, so that the MLE is
//! infinite) are recognised from the converged fit: zero-count rows with fitted means below
//! 1e-6 of the null model's; the model is refitted without them (see
//! [`refit_without_boundary_rows`]).

use std::borrow::Cow;

use nalgebra::DMatrix;

use super::design::Design;
use super::error::FitError;
use super::family::{Family, FamilyKind, FamilyTests, Scale};
use super::irls::{FitOptions, IrlsRun, Standardised, aliased_columns, irls, warm_start};
use super::solve::NormalEquations;

/// The response side of a model: one value per design row.
#[derive(Debug, Clone, Copy)]
pub struct FitInput<'a> {
    pub y: &'a [f64],
    /// Known part of the linear predictor; for rate models log(exposure).
    pub offset: Option<&'a [f64]>,
    /// Prior weights (finite, > 0); none means all 1.
    pub weights: Option<&'a [f64]>,
}

/// How one coefficient came out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TermState {
    Estimated,
    /// Linearly dependent on earlier columns: not estimable.
    Aliased,
    /// The MLE is infinite (fitted means of zero-count cells run to 0).
    Boundary,
    /// No fit was made (too few rows, no events, numerical breakdown).
    NotEstimated,
}

impl TermState {
    /// The flag text reported beside a term, if any.
    pub fn flag(self) -> Option<&'static str> {
        match self {
            TermState::Estimated => None,
            TermState::Aliased => Some("aliased"),
            TermState::Boundary => Some("boundary"),
            TermState::NotEstimated => Some("not estimated"),
        }
    }
}

/// Conditions found while fitting. None of them is an error; each shows in the status text.
#[derive(Debug, Clone, PartialEq)]
pub enum FitIssue {
    TooFewRows {
        rows: usize,
        params: usize,
    },
    NoEvents,
    RankDeficient {
        aliased: usize,
    },
    Boundary {
        terms: usize,
    },
    NotConverged {
        iterations: usize,
    },
    NumericalBreakdown,
    /// No residual degrees of freedom: the fit reproduces the data, so there is nothing left to
    /// test the variance or the fit against.
    Saturated,
}

impl std::fmt::Display for FitIssue {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FitIssue::TooFewRows { rows, params } => {
                write!(
                    f,
                    "too few rows ({rows} row{} for {params} parameter{})",
                    plural(*rows),
                    plural(*params)
                )
            }
            FitIssue::NoEvents => f.write_str("no events (all counts are 0; no finite estimates)"),
            FitIssue::RankDeficient { aliased } => {
                write!(f, "rank deficient ({aliased} aliased column{})", plural(*aliased))
            }
            FitIssue::Boundary { terms } => write!(
                f,
                "boundary estimate ({terms} term{} with an infinite estimate)",
                plural(*terms)
            ),
            FitIssue::NotConverged { iterations } => write!(f, "not converged after {iterations} iterations"),
            FitIssue::NumericalBreakdown => f.write_str("numerical breakdown (weights underflowed)"),
            FitIssue::Saturated => f.write_str(
                "saturated (0 residual degrees of freedom: no dispersion, goodness-of-fit or overdispersion test)",
            ),
        }
    }
}

fn plural(n: usize) -> &'static str {
    if n == 1 { "" } else { "s" }
}

/// Fit-level statistics. `None` marks a statistic that does not exist for this fit.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct FitStats {
    /// Rows that entered the fit.
    pub n_used: usize,
    /// Design columns (aliased ones included).
    pub n_params: usize,
    /// Estimated (non-aliased) coefficients.
    pub rank: usize,
    pub df_resid: Option<usize>,
    pub deviance: Option<f64>,
    pub null_deviance: Option<f64>,
    /// Log-likelihood of the null model (intercept and offset only; for a family with its own
    /// parameter, with that parameter re-estimated).
    pub null_loglik: Option<f64>,
    pub pearson_chi2: Option<f64>,
    pub loglik: Option<f64>,
    pub aic: Option<f64>,
    pub bic: Option<f64>,
    /// Σ w·y.
    pub total_response: f64,
    /// Σ w·exp(offset) (the total exposure of a rate model; n without an offset).
    pub total_exposure: f64,
    /// The family's own tests ([`Family::extra_tests`]).
    pub extra: FamilyTests,
}

/// A parameter of the family estimated with the coefficients (none of today's families has
/// one; a negative binomial shape would).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FamilyParameter {
    pub name: &'static str,
    pub estimate: f64,
    pub std_error: Option<f64>,
}

/// A fitted generalized linear model.
#[derive(Debug, Clone)]
pub struct GlmFit {
    pub family: FamilyKind,
    pub scale: Scale,
    /// The family's own parameter, when it has one.
    pub parameter: Option<FamilyParameter>,
    pub names: Vec<String>,
    pub states: Vec<TermState>,
    /// Final coefficients on the caller's scale; 0 for aliased columns. Meaningful for
    /// reporting only where the state is `Estimated`.
    pub estimates: Vec<f64>,
    /// Inverse Fisher information (X'WX)⁻¹ on the caller's scale, p x p; zero rows and
    /// columns for terms not estimated. Multiply by the dispersion for quasi standard errors.
    pub cov_unscaled: DMatrix<f64>,
    /// HC0 sandwich covariance (X'WX)⁻¹ (Σ s_i² x_i x_i') (X'WX)⁻¹ with score factors
    /// s_i = w_i (y_i - mu_i) (dmu/deta) / V(mu_i).
    pub cov_sandwich: DMatrix<f64>,
    /// Fitted means, one per input row (one per pattern for collapsed fits).
    pub fitted: Vec<f64>,
    pub stats: FitStats,
    pub issues: Vec<FitIssue>,
    pub iterations: usize,
    pub converged: bool,
}

impl GlmFit {
    /// `ok`, or the issues joined with "; ".
    pub fn status(&self) -> String {
        if self.issues.is_empty() {
            "ok".to_string()
        } else {
            self.issues
                .iter()
                .map(ToString::to_string)
                .collect::<Vec<_>>()
                .join("; ")
        }
    }

    /// Pearson chi-square / df_resid (for Gaussian fits: the residual variance).
    pub fn dispersion(&self) -> Option<f64> {
        ratio(self.stats.pearson_chi2, self.stats.df_resid)
    }

    /// Deviance / df_resid.
    pub fn deviance_per_df(&self) -> Option<f64> {
        ratio(self.stats.deviance, self.stats.df_resid)
    }

    /// Σy/Σexposure (weighted); `None` without exposure.
    pub fn crude_rate(&self) -> Option<f64> {
        (self.stats.total_exposure > 0.0).then(|| self.stats.total_response / self.stats.total_exposure)
    }

    /// Index of a term by name.
    pub fn term_index(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }

    /// Number of estimated coefficients besides the intercept (the model's degrees of freedom
    /// against the null model).
    pub fn model_df(&self) -> usize {
        let intercept_estimated = self.names.first().map(String::as_str) == Some("intercept")
            && self.states.first() == Some(&TermState::Estimated);
        self.stats.rank - usize::from(intercept_estimated)
    }
}

fn ratio(v: Option<f64>, df: Option<usize>) -> Option<f64> {
    match (v, df) {
        (Some(v), Some(df)) if df > 0 => Some(v / df as f64),
        _ => None,
    }
}

/// Fits `family` to `input` over `design`.
///
/// Errors are returned only for invalid inputs (non-finite values, negative counts, bad
/// exposure or weights, mismatched lengths). Every other condition gives a fit with issues.
pub fn fit<F: Family>(family: &F, design: &Design, input: FitInput<'_>, opts: FitOptions) -> Result<GlmFit, FitError> {
    let mut fit = fit_with_row_count(family, design, input, opts, design.n_rows())?;
    note_saturation(&mut fit);
    Ok(fit)
}

/// A fit with estimates and 0 residual degrees of freedom is saturated: the tests that need
/// residual variation (dispersion, goodness of fit, overdispersion, a family parameter) do not
/// exist, and the
/// status says so. Called once the final df_resid is known (for pattern fits, that of the rows).
pub(crate) fn note_saturation(fit: &mut GlmFit) {
    let estimated = fit.states.contains(&TermState::Estimated);
    if estimated && fit.stats.df_resid == Some(0) && !fit.issues.contains(&FitIssue::Saturated) {
        fit.stats.extra = FamilyTests::default();
        // A family parameter (a negative binomial alpha) has no rows left to be estimated from.
        fit.parameter = None;
        fit.issues.push(FitIssue::Saturated);
    }
}

/// The response side with defaults filled in: prior weights 1 and offset 0 when not given.
struct Response<'a> {
    y: &'a [f64],
    offset: Cow<'a, [f64]>,
    w: Cow<'a, [f64]>,
    /// The caller's weights, if any (some statistics exist only for unweighted fits).
    weights: Option<&'a [f64]>,
}

impl<'a> Response<'a> {
    fn new(input: FitInput<'a>, n: usize) -> Self {
        Response {
            y: input.y,
            offset: input.offset.map_or_else(|| Cow::Owned(vec![0.0; n]), Cow::Borrowed),
            w: input.weights.map_or_else(|| Cow::Owned(vec![1.0; n]), Cow::Borrowed),
            weights: input.weights,
        }
    }
}

/// As [`fit`], with the number of original rows the design stands for (collapsed fits pass the
/// row count, so that "too few rows" means the same with and without collapsing).
pub(crate) fn fit_with_row_count<F: Family>(
    family: &F,
    design: &Design,
    input: FitInput<'_>,
    opts: FitOptions,
    rows: usize,
) -> Result<GlmFit, FitError> {
    let n = design.n_rows();
    let p = design.n_columns();
    validate(family, n, &input, opts)?;
    let response = Response::new(input, n);
    let (y, offset, w) = (response.y, &*response.offset, &*response.w);
    let exposure: Vec<f64> = offset.iter().map(|o| o.exp()).collect();
    let mut stats = FitStats {
        n_used: n,
        n_params: p,
        total_response: y.iter().zip(w).map(|(y, w)| y * w).sum(),
        total_exposure: exposure.iter().zip(w).map(|(e, w)| e * w).sum(),
        ..FitStats::default()
    };
    if let Some(trivial) = screen(family, design, &response, &mut stats, rows) {
        return Ok(trivial);
    }

    let standard = Standardised::new(design);
    let aliased = aliased_columns(&standard.x, n, p, w);
    let active: Vec<usize> = (0..p).filter(|&j| !aliased[j]).collect();
    stats.rank = active.len();
    stats.df_resid = Some(n - active.len());
    let mut issues = Vec::new();
    if aliased.iter().any(|&a| a) {
        issues.push(FitIssue::RankDeficient {
            aliased: p - active.len(),
        });
    }

    let start = warm_start(family, &standard.x, n, &active, y, offset, w, opts);
    let Some(run) = irls(family, &standard.x, n, &active, y, offset, w, opts, start) else {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    };
    let mut null_mu = vec![0.0; n];
    family.null_fitted(y, offset, &exposure, w, design.has_intercept(), &mut null_mu);
    stats.null_deviance = Some(weighted_deviance(family, y, &null_mu, w));
    let null_loglik = match family.null_linear_predictor(y, offset, &exposure, w, design.has_intercept()) {
        Some(null_eta) => family.log_likelihood_at(y, &null_eta, &null_mu, w),
        None => family.log_likelihood(y, &null_mu, w),
    };
    stats.null_loglik = Some(null_loglik).filter(|l| l.is_finite());

    if let Some(fit) = boundary_refit(family, design, input, opts, &aliased, &run, &null_mu, &stats)? {
        return Ok(fit);
    }
    if run.stalled {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    }
    let Some((cov_unscaled, cov_sandwich, beta)) = covariances(family, &standard, &active, &run, &response) else {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    };
    statistics(family, &response, &run.eta, &run.mu, rows, &mut stats);
    if !run.converged {
        issues.push(FitIssue::NotConverged {
            iterations: run.iterations,
        });
    }
    let mut estimates = vec![0.0; p];
    for (a, &j) in active.iter().enumerate() {
        estimates[j] = beta[a];
    }
    Ok(GlmFit {
        family: family.kind(),
        scale: family.scale(),
        parameter: None,
        names: design.names().to_vec(),
        states: aliased
            .iter()
            .map(|&a| if a { TermState::Aliased } else { TermState::Estimated })
            .collect(),
        estimates,
        cov_unscaled: embed(&cov_unscaled, &active, p),
        cov_sandwich: embed(&cov_sandwich, &active, p),
        fitted: run.mu,
        stats,
        issues,
        iterations: run.iterations,
        converged: run.converged,
    })
}

/// The fits that need no iteration: too few rows for the parameters, or (for families with a
/// boundary) no events at all.
fn screen<F: Family>(
    family: &F,
    design: &Design,
    response: &Response<'_>,
    stats: &mut FitStats,
    rows: usize,
) -> Option<GlmFit> {
    let p = design.n_columns();
    if rows == 0 || rows < p {
        return Some(unfitted(
            family,
            design,
            stats.clone(),
            vec![FitIssue::TooFewRows { rows, params: p }],
        ));
    }
    if family.has_boundary() && response.y.iter().all(|&v| v == 0.0) {
        return Some(no_events(family, design, stats.clone(), design.n_rows()));
    }
    None
}

/// Zero-count rows whose fitted means ran to 0 (below [`BOUNDARY_MU_RATIO`] of the null
/// model's), and the refit without them when that makes some terms boundary terms.
#[allow(clippy::too_many_arguments)]
fn boundary_refit<F: Family>(
    family: &F,
    design: &Design,
    input: FitInput<'_>,
    opts: FitOptions,
    aliased: &[bool],
    run: &IrlsRun,
    null_mu: &[f64],
    stats: &FitStats,
) -> Result<Option<GlmFit>, FitError> {
    if !family.has_boundary() {
        return Ok(None);
    }
    let y = input.y;
    let boundary: Vec<usize> = (0..y.len())
        .filter(|&i| y[i] == 0.0 && run.mu[i] < BOUNDARY_MU_RATIO * null_mu[i])
        .collect();
    if boundary.is_empty() {
        return Ok(None);
    }
    refit_without_boundary_rows(family, design, input, opts, aliased, &boundary, stats)
}

/// Covariances at the final estimates, on the caller's scale: the inverse Fisher information
/// (X'WX)⁻¹ and the HC0 sandwich (X'WX)⁻¹ (Σ s_i² x_i x_i') (X'WX)⁻¹, both over the active
/// columns, and the estimates transformed back. `None` when X'WX cannot be inverted.
fn covariances<F: Family>(
    family: &F,
    standard: &Standardised,
    active: &[usize],
    run: &IrlsRun,
    response: &Response<'_>,
) -> Option<(DMatrix<f64>, DMatrix<f64>, nalgebra::DVector<f64>)> {
    let (y, w) = (response.y, &*response.w);
    let n = y.len();
    let k = active.len();
    let mut ne = NormalEquations::new(k, n);
    let mut ww = vec![0.0; n];
    let mut score2 = vec![0.0; n];
    for i in 0..n {
        let d = family.mu_eta_at(run.eta[i], run.mu[i]);
        let v = family.variance(run.mu[i]);
        ww[i] = w[i] * d * d / v;
        let s = w[i] * (y[i] - run.mu[i]) * d / v;
        score2[i] = s * s;
    }
    ne.accumulate(&standard.x, n, active, &ww, None);
    let bread = symmetric_inverse(&ne.gram, k)?;
    ne.accumulate(&standard.x, n, active, &score2, None);
    let meat = symmetric_from_upper(&ne.gram, k);
    let sandwich = &bread * meat * &bread;
    let t = standard.back_transform(active);
    let beta = &t * nalgebra::DVector::from_column_slice(&run.beta);
    Some((&t * bread * t.transpose(), &t * sandwich * t.transpose(), beta))
}

/// Deviance, Pearson X², log-likelihood with AIC/BIC, and the family's own tests of a fit with
/// means `mu` (linear predictor `eta`); `rows` is the number of rows the fit stands for.
fn statistics<F: Family>(
    family: &F,
    response: &Response<'_>,
    eta: &[f64],
    mu: &[f64],
    rows: usize,
    stats: &mut FitStats,
) {
    let (y, w) = (response.y, &*response.w);
    stats.deviance = Some(weighted_deviance(family, y, mu, w));
    stats.pearson_chi2 = Some(
        (0..y.len())
            .map(|i| w[i] * (y[i] - mu[i]).powi(2) / family.variance(mu[i]))
            .sum(),
    );
    set_information_criteria(stats, family, family.log_likelihood_at(y, eta, mu, w));
    stats.extra = family.extra_tests(y, mu, response.weights, rows);
}

/// Boundary estimates. Zero-count rows whose fitted means ran to 0 are set aside and the model
/// is refitted on the other rows. The MLE is infinite exactly when some direction d has
/// x_i'd = 0 on rows with y_i > 0 and x_i'd <= 0 elsewhere, so on the remaining rows the columns
/// along d become aliased: those newly aliased terms are the ones with infinite estimates, and
/// the refit gives the finite estimates of all other terms (their limit as the boundary terms
/// go to infinity). The set-aside rows add exactly 0 to the deviance, Pearson's X² and the
/// log-likelihood in that limit. Returns `None` when no term becomes aliased (the small fitted
/// means were genuine, and the full fit stands).
fn refit_without_boundary_rows<F: Family>(
    family: &F,
    design: &Design,
    input: FitInput<'_>,
    opts: FitOptions,
    aliased: &[bool],
    boundary: &[usize],
    full_stats: &FitStats,
) -> Result<Option<GlmFit>, FitError> {
    let n = design.n_rows();
    let mut keep_row = vec![true; n];
    for &i in boundary {
        keep_row[i] = false;
    }
    let keep: Vec<usize> = (0..n).filter(|&i| keep_row[i]).collect();
    let pick = |v: &[f64]| keep.iter().map(|&i| v[i]).collect::<Vec<f64>>();
    let sub_design = design.select_rows(&keep);
    let (y, offset, weights) = (pick(input.y), input.offset.map(pick), input.weights.map(pick));
    let sub_input = FitInput {
        y: &y,
        offset: offset.as_deref(),
        weights: weights.as_deref(),
    };
    let sub = fit_with_row_count(family, &sub_design, sub_input, opts, n)?;
    let newly_aliased: Vec<usize> = (0..aliased.len())
        .filter(|&j| !aliased[j] && sub.states[j] != TermState::Estimated)
        .collect();
    if newly_aliased.is_empty() || !sub.states.contains(&TermState::Estimated) {
        return Ok(None);
    }
    let mut fit = sub;
    for &j in &newly_aliased {
        fit.states[j] = TermState::Boundary;
    }
    let extra = family.extra_tests(&y, &fit.fitted, weights.as_deref(), n);
    let mut fitted = vec![0.0; n];
    for (&i, &mu) in keep.iter().zip(&fit.fitted) {
        fitted[i] = mu;
    }
    fit.fitted = fitted;
    let loglik = fit.stats.loglik.unwrap_or(0.0);
    fit.stats = FitStats {
        df_resid: Some(n - full_stats.rank),
        extra,
        deviance: fit.stats.deviance,
        pearson_chi2: fit.stats.pearson_chi2,
        ..full_stats.clone()
    };
    set_information_criteria(&mut fit.stats, family, loglik);
    let previously_aliased = aliased.iter().filter(|&&a| a).count();
    let mut issues = Vec::new();
    if previously_aliased > 0 {
        issues.push(FitIssue::RankDeficient {
            aliased: previously_aliased,
        });
    }
    issues.push(FitIssue::Boundary {
        terms: newly_aliased.len(),
    });
    issues.extend(
        fit.issues
            .iter()
            .filter(|i| !matches!(i, FitIssue::RankDeficient { .. } | FitIssue::Boundary { .. }))
            .cloned(),
    );
    fit.issues = issues;
    Ok(Some(fit))
}

/// A zero-count row whose fitted mean is below this fraction of the null model's is a candidate
/// boundary row (see `refit_without_boundary_rows`; a false candidate changes nothing).
const BOUNDARY_MU_RATIO: f64 = 1e-6;

/// Sets the log-likelihood, AIC = -2 llf + 2k and BIC = -2 llf + k log n (k = estimated
/// coefficients plus any estimated scale), and turns any statistic that overflowed into `None`
/// (a fitted mean that underflowed beside a positive count makes Pearson's X² infinite).
pub(crate) fn set_information_criteria<F: Family>(stats: &mut FitStats, family: &F, loglik: f64) {
    let k = (stats.rank + family.extra_parameters()) as f64;
    stats.loglik = Some(loglik);
    stats.aic = Some(-2.0 * loglik + 2.0 * k);
    stats.bic = Some(-2.0 * loglik + k * (stats.n_used as f64).ln());
    for v in [
        &mut stats.deviance,
        &mut stats.null_deviance,
        &mut stats.pearson_chi2,
        &mut stats.loglik,
        &mut stats.aic,
        &mut stats.bic,
    ] {
        *v = v.filter(|x| x.is_finite());
    }
}

fn validate<F: Family>(family: &F, n: usize, input: &FitInput<'_>, opts: FitOptions) -> Result<(), FitError> {
    if !(opts.tol > 0.0 && opts.tol < 1.0) || opts.max_iter == 0 {
        return Err(FitError::BadSpec(format!(
            "tolerance must be in (0, 1) and the iteration cap at least 1 (got {} and {})",
            opts.tol, opts.max_iter
        )));
    }
    if input.y.len() != n {
        return Err(FitError::LengthMismatch {
            what: "response".into(),
            expected: n,
            found: input.y.len(),
        });
    }
    for (row, &value) in input.y.iter().enumerate() {
        if let Some(reason) = family.check_response(value) {
            return Err(FitError::BadResponse { row, value, reason });
        }
    }
    if let Some(o) = input.offset {
        if o.len() != n {
            return Err(FitError::LengthMismatch {
                what: "offset".into(),
                expected: n,
                found: o.len(),
            });
        }
        if let Some(row) = o.iter().position(|v| !v.is_finite()) {
            return Err(FitError::NonFinite {
                column: "offset".into(),
                row,
                value: o[row],
            });
        }
    }
    if let Some(w) = input.weights {
        if w.len() != n {
            return Err(FitError::LengthMismatch {
                what: "weights".into(),
                expected: n,
                found: w.len(),
            });
        }
        if let Some(row) = w.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(FitError::BadWeight { row, value: w[row] });
        }
    }
    Ok(())
}

/// Pearson residuals (y_i - mu_i) sqrt(w_i / V(mu_i)); their squares add up to Pearson's X².
pub fn pearson_residuals<F: Family>(family: &F, y: &[f64], mu: &[f64], weights: Option<&[f64]>) -> Vec<f64> {
    (0..y.len())
        .map(|i| {
            let w = weights.map_or(1.0, |w| w[i]);
            (y[i] - mu[i]) * (w / family.variance(mu[i])).sqrt()
        })
        .collect()
}

/// Deviance residuals sign(y_i - mu_i) sqrt(w_i d(y_i, mu_i)); their squares add up to the
/// deviance.
pub fn deviance_residuals<F: Family>(family: &F, y: &[f64], mu: &[f64], weights: Option<&[f64]>) -> Vec<f64> {
    (0..y.len())
        .map(|i| {
            let w = weights.map_or(1.0, |w| w[i]);
            let d = (w * family.unit_deviance(y[i], mu[i])).max(0.0).sqrt();
            if y[i] < mu[i] { -d } else { d }
        })
        .collect()
}

/// log(exposure) for a rate model, refusing exposures that are not finite and positive.
pub fn log_exposure(exposure: &[f64]) -> Result<Vec<f64>, FitError> {
    exposure
        .iter()
        .enumerate()
        .map(|(row, &e)| {
            if e.is_finite() && e > 0.0 {
                Ok(e.ln())
            } else {
                Err(FitError::BadExposure { row, value: e })
            }
        })
        .collect()
}

pub(crate) fn weighted_deviance<F: Family>(family: &F, y: &[f64], mu: &[f64], w: &[f64]) -> f64 {
    y.iter()
        .zip(mu)
        .zip(w)
        .map(|((&y, &m), &w)| w * family.unit_deviance(y, m))
        .sum()
}

/// A fit that was not attempted or broke down: all numbers `None`, every term not estimated.
fn unfitted<F: Family>(family: &F, design: &Design, stats: FitStats, issues: Vec<FitIssue>) -> GlmFit {
    let p = design.n_columns();
    GlmFit {
        family: family.kind(),
        scale: family.scale(),
        parameter: None,
        names: design.names().to_vec(),
        states: vec![TermState::NotEstimated; p],
        estimates: vec![0.0; p],
        cov_unscaled: DMatrix::zeros(p, p),
        cov_sandwich: DMatrix::zeros(p, p),
        fitted: Vec::new(),
        stats: FitStats {
            rank: 0,
            df_resid: None,
            ..stats
        },
        issues,
        iterations: 0,
        converged: false,
    }
}

/// All counts zero: the likelihood is maximised only in the limit mu -> 0, where the deviance
/// and the log-likelihood are exactly 0. Coefficients have no finite estimate.
fn no_events<F: Family>(family: &F, design: &Design, stats: FitStats, n: usize) -> GlmFit {
    let p = design.n_columns();
    let mut fit = unfitted(family, design, stats, vec![FitIssue::NoEvents]);
    fit.states = vec![TermState::Boundary; p];
    fit.fitted = vec![0.0; n];
    fit.stats.deviance = Some(0.0);
    fit.stats.null_deviance = Some(0.0);
    set_information_criteria(&mut fit.stats, family, 0.0);
    fit
}

fn symmetric_from_upper(upper: &[f64], k: usize) -> DMatrix<f64> {
    DMatrix::from_fn(k, k, |i, j| if i <= j { upper[i * k + j] } else { upper[j * k + i] })
}

/// Inverse of the symmetric positive-definite matrix whose upper triangle is given.
fn symmetric_inverse(upper: &[f64], k: usize) -> Option<DMatrix<f64>> {
    let m = symmetric_from_upper(upper, k);
    let inv = m.cholesky()?.inverse();
    inv.iter().all(|v| v.is_finite()).then_some(inv)
}

/// Places a k x k matrix over the active columns into a p x p matrix of zeros.
fn embed(m: &DMatrix<f64>, active: &[usize], p: usize) -> DMatrix<f64> {
    let mut out = DMatrix::zeros(p, p);
    for (a, &i) in active.iter().enumerate() {
        for (b, &j) in active.iter().enumerate() {
            out[(i, j)] = m[(a, b)];
        }
    }
    out
}
