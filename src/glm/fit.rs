//! Fitting: iteratively reweighted least squares (Fisher scoring) with step-halving, on
//! internally standardised columns, followed by the fit statistics.
//!
//! Method: Nelder & Wedderburn (1972); McCullagh & Nelder (1989) §2.5. Each iteration solves
//! (X'WX) b = X'Wz with W = w·(dmu/deta)²/V(mu) and z = eta - offset + (y - mu)/(dmu/deta).
//! A step that makes the deviance non-finite or larger is halved (up to 30 times).
//! Convergence: relative deviance change |D_k - D_{k-1}|/(|D_k| + 0.1) < tol, or the largest
//! coefficient step on the standardised scale below sqrt(tol).
//!
//! Numerical safeguards:
//! * columns are centred (when there is an intercept) and scaled to unit mean square before
//!   fitting; estimates and covariances are transformed back exactly (b = T b', V = T V' T');
//! * aliased columns are found once, from the Cholesky pivots of X'W0X in column order, and left
//!   out of the solve (estimate reported as NULL with the flag `aliased`);
//! * estimates at the boundary (a zero-count cell whose fitted mean runs to 0, so that the MLE is
//!   infinite) are recognised from the converged fit: zero-count rows with fitted means below
//!   1e-8 of the null model's, together with coefficients still moving by O(1) per iteration.

use nalgebra::DMatrix;

use super::design::Design;
use super::error::FitError;
use super::family::Family;
use super::solve::{ALIAS_TOLERANCE, NormalEquations, cholesky_in_place};

/// Controls for IRLS.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FitOptions {
    /// Iteration cap (default 100).
    pub max_iter: usize,
    /// Convergence tolerance on the relative deviance change (default 1e-12).
    pub tol: f64,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            max_iter: 100,
            tol: 1e-12,
        }
    }
}

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

/// A score test statistic with its p-value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoreTest {
    pub statistic: f64,
    pub p_value: f64,
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
    pub pearson_chi2: Option<f64>,
    pub loglik: Option<f64>,
    pub aic: Option<f64>,
    pub bic: Option<f64>,
    /// Σ w·y.
    pub total_response: f64,
    /// Σ w·exp(offset) (the total exposure of a rate model; n without an offset).
    pub total_exposure: f64,
    /// Cameron & Trivedi (1990) auxiliary-regression test of Var(y) = mu against
    /// Var(y) = mu + alpha·mu²: t statistic of alpha and its one-sided p-value (alpha > 0).
    pub overdispersion: Option<ScoreTest>,
}

/// A fitted generalized linear model.
#[derive(Debug, Clone)]
pub struct GlmFit {
    pub family: &'static str,
    /// True when the dispersion is fixed at 1 (Poisson), false when estimated (Gaussian).
    pub fixed_scale: bool,
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
/// residual variation (dispersion, goodness of fit, overdispersion) do not exist, and the
/// status says so. Called once the final df_resid is known (for pattern fits, that of the rows).
pub(crate) fn note_saturation(fit: &mut GlmFit) {
    let estimated = fit.states.contains(&TermState::Estimated);
    if estimated && fit.stats.df_resid == Some(0) && !fit.issues.contains(&FitIssue::Saturated) {
        fit.stats.overdispersion = None;
        fit.issues.push(FitIssue::Saturated);
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
    validate(family, n, &input)?;
    if !(opts.tol > 0.0 && opts.tol < 1.0) || opts.max_iter == 0 {
        return Err(FitError::BadSpec(format!(
            "tolerance must be in (0, 1) and the iteration cap at least 1 (got {} and {})",
            opts.tol, opts.max_iter
        )));
    }
    let ones;
    let w = match input.weights {
        Some(w) => w,
        None => {
            ones = vec![1.0; n];
            &ones
        }
    };
    let zeros;
    let offset = match input.offset {
        Some(o) => o,
        None => {
            zeros = vec![0.0; n];
            &zeros
        }
    };
    let y = input.y;
    let mut stats = FitStats {
        n_used: n,
        n_params: p,
        total_response: y.iter().zip(w).map(|(y, w)| y * w).sum(),
        total_exposure: offset.iter().zip(w).map(|(o, w)| o.exp() * w).sum(),
        ..FitStats::default()
    };
    if rows == 0 || rows < p {
        return Ok(unfitted(
            family,
            design,
            stats,
            vec![FitIssue::TooFewRows { rows, params: p }],
        ));
    }
    if family.has_boundary() && y.iter().all(|&v| v == 0.0) {
        return Ok(no_events(family, design, stats, n));
    }

    let standard = Standardised::new(design);
    let mut aliased = vec![false; p];
    {
        let all: Vec<usize> = (0..p).collect();
        let mut ne = NormalEquations::new(p);
        ne.accumulate(&standard.x, n, &all, w, None);
        cholesky_in_place(&mut ne.gram, p, ALIAS_TOLERANCE, Some(&mut aliased));
    }
    let active: Vec<usize> = (0..p).filter(|&j| !aliased[j]).collect();
    let k = active.len();
    stats.rank = k;
    stats.df_resid = Some(n - k);

    let run = irls(family, &standard.x, n, &active, y, offset, w, opts);
    let mut issues = Vec::new();
    if aliased.iter().any(|&a| a) {
        issues.push(FitIssue::RankDeficient { aliased: p - k });
    }
    let Some(run) = run else {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    };
    let mut null_mu = vec![0.0; n];
    family.null_fitted(y, offset, w, design.has_intercept(), &mut null_mu);
    stats.null_deviance = Some(weighted_deviance(family, y, &null_mu, w));

    if family.has_boundary() {
        let boundary: Vec<usize> = (0..n)
            .filter(|&i| y[i] == 0.0 && run.mu[i] < BOUNDARY_MU_RATIO * null_mu[i])
            .collect();
        if !boundary.is_empty() {
            if let Some(fit) = refit_without_boundary_rows(family, design, input, opts, &aliased, &boundary, &stats)? {
                return Ok(fit);
            }
        }
    }
    if run.stalled {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    }

    // Covariances on the standardised scale, at the final estimates.
    let mut ne = NormalEquations::new(k);
    let mut ww = vec![0.0; n];
    let mut score2 = vec![0.0; n];
    for i in 0..n {
        let d = family.mu_eta_at(run.eta[i], run.mu[i]);
        let v = family.variance(run.mu[i]);
        ww[i] = w[i] * d * d / v;
        let s = w[i] * (y[i] - run.mu[i]) * d / v;
        score2[i] = s * s;
    }
    ne.accumulate(&standard.x, n, &active, &ww, None);
    let Some(bread) = symmetric_inverse(&ne.gram, k) else {
        issues.push(FitIssue::NumericalBreakdown);
        return Ok(unfitted(family, design, stats, issues));
    };
    ne.accumulate(&standard.x, n, &active, &score2, None);
    let meat = symmetric_from_upper(&ne.gram, k);
    let sandwich = &bread * meat * &bread;

    let t = standard.back_transform(&active);
    let beta = &t * nalgebra::DVector::from_column_slice(&run.beta);
    let cov_unscaled = &t * bread * t.transpose();
    let cov_sandwich = &t * sandwich * t.transpose();

    let states: Vec<TermState> = aliased
        .iter()
        .map(|&a| if a { TermState::Aliased } else { TermState::Estimated })
        .collect();
    let mut estimates = vec![0.0; p];
    for (a, &j) in active.iter().enumerate() {
        estimates[j] = beta[a];
    }

    // Statistics on the rows.
    stats.deviance = Some(weighted_deviance(family, y, &run.mu, w));
    stats.pearson_chi2 = Some(
        (0..n)
            .map(|i| w[i] * (y[i] - run.mu[i]).powi(2) / family.variance(run.mu[i]))
            .sum(),
    );
    let loglik = family.log_likelihood(y, &run.mu, w);
    set_information_criteria(&mut stats, family, loglik);
    if family.name() == "poisson" && input.weights.is_none() {
        stats.overdispersion = cameron_trivedi(y, &run.mu, n);
    }
    if !run.converged {
        issues.push(FitIssue::NotConverged {
            iterations: run.iterations,
        });
    }

    Ok(GlmFit {
        family: family.name(),
        fixed_scale: family.fixed_scale(),
        names: design.names().to_vec(),
        states,
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
    let overdispersion = if fit.stats.overdispersion.is_some() {
        cameron_trivedi(&y, &fit.fitted, n)
    } else {
        None
    };
    let mut fitted = vec![0.0; n];
    for (&i, &mu) in keep.iter().zip(&fit.fitted) {
        fitted[i] = mu;
    }
    fit.fitted = fitted;
    let loglik = fit.stats.loglik.unwrap_or(0.0);
    fit.stats = FitStats {
        df_resid: Some(n - full_stats.rank),
        overdispersion,
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

fn validate<F: Family>(family: &F, n: usize, input: &FitInput<'_>) -> Result<(), FitError> {
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
        family: family.name(),
        fixed_scale: family.fixed_scale(),
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

/// Cameron & Trivedi (1990): regress ((y - mu)² - y)/mu on mu without intercept by OLS; the t
/// statistic of the slope is asymptotically N(0,1) under the Poisson hypothesis. Returns the
/// statistic and the one-sided p-value for overdispersion.
/// `n` is the number of rows the test is about: rows set aside at the boundary (y = 0 with
/// mu -> 0) add z = 0 at regressor 0, so they count in n and add nothing to the sums.
pub(crate) fn cameron_trivedi(y: &[f64], mu: &[f64], n: usize) -> Option<ScoreTest> {
    if n < 2 {
        return None;
    }
    let (mut szx, mut sxx, mut szz) = (0.0, 0.0, 0.0);
    for (&y, &m) in y.iter().zip(mu) {
        let z = ((y - m).powi(2) - y) / m;
        szx += z * m;
        sxx += m * m;
        szz += z * z;
    }
    aux_regression_t(szx, sxx, szz, n)
}

/// t statistic of the slope of a no-intercept OLS regression from its sums Σzx, Σx², Σz².
pub(crate) fn aux_regression_t(szx: f64, sxx: f64, szz: f64, n: usize) -> Option<ScoreTest> {
    let alpha = szx / sxx;
    let rss = (szz - alpha * szx).max(0.0);
    let s2 = rss / (n as f64 - 1.0);
    let t = alpha / (s2 / sxx).sqrt();
    if !t.is_finite() {
        return None;
    }
    Some(ScoreTest {
        statistic: t,
        p_value: super::inference::normal_sf(t),
    })
}

/// Columns centred (with an intercept) and scaled to unit mean square.
struct Standardised {
    x: Vec<f64>,
    center: Vec<f64>,
    spread: Vec<f64>,
    intercept: bool,
}

impl Standardised {
    fn new(design: &Design) -> Self {
        let n = design.n_rows();
        let p = design.n_columns();
        let intercept = design.has_intercept();
        let mut x = Vec::with_capacity(n * p);
        let mut center = vec![0.0; p];
        let mut spread = vec![1.0; p];
        for j in 0..p {
            let col = design.column(j);
            if intercept && j == 0 {
                x.extend_from_slice(col);
                continue;
            }
            let c = if intercept {
                col.iter().sum::<f64>() / n as f64
            } else {
                0.0
            };
            // Root mean square of (x - c), computed relative to max |x - c| so that values
            // near 1e200 do not overflow when squared.
            let peak = col.iter().fold(0.0f64, |m, v| m.max((v - c).abs()));
            let ms = col.iter().map(|v| ((v - c) / peak).powi(2)).sum::<f64>() / n as f64;
            // A column constant after centring stays all-zero and is then found aliased.
            let s = if peak > 0.0 && peak.is_finite() && ms > 0.0 {
                peak * ms.sqrt()
            } else {
                1.0
            };
            x.extend(col.iter().map(|v| (v - c) / s));
            center[j] = c;
            spread[j] = s;
        }
        Standardised {
            x,
            center,
            spread,
            intercept,
        }
    }

    /// T with b = T b' over the active columns: b_j = b'_j / s_j and, with an intercept,
    /// b_0 = b'_0 - Σ_j c_j b'_j / s_j.
    fn back_transform(&self, active: &[usize]) -> DMatrix<f64> {
        let k = active.len();
        let mut t = DMatrix::zeros(k, k);
        for (a, &j) in active.iter().enumerate() {
            if self.intercept && j == 0 {
                t[(a, a)] = 1.0;
            } else {
                t[(a, a)] = 1.0 / self.spread[j];
                if self.intercept && active[0] == 0 {
                    t[(0, a)] = -self.center[j] / self.spread[j];
                }
            }
        }
        t
    }
}

/// The outcome of the IRLS loop, on the standardised scale.
struct IrlsRun {
    beta: Vec<f64>,
    eta: Vec<f64>,
    mu: Vec<f64>,
    iterations: usize,
    converged: bool,
    /// The weighted normal equations became singular (weights of some rows underflowed):
    /// iteration stopped at the last good estimates.
    stalled: bool,
}

/// Step-halving attempts before giving up on an iteration.
const MAX_HALVINGS: usize = 30;

#[allow(clippy::too_many_arguments)]
fn irls<F: Family>(
    family: &F,
    x: &[f64],
    n: usize,
    active: &[usize],
    y: &[f64],
    offset: &[f64],
    w: &[f64],
    opts: FitOptions,
) -> Option<IrlsRun> {
    let k = active.len();
    let mut mu = vec![0.0; n];
    family.start(y, offset, w, &mut mu);
    let mut eta: Vec<f64> = mu.iter().map(|&m| family.link(m)).collect();
    let mut ww = vec![0.0; n];
    let mut z = vec![0.0; n];
    let mut ne = NormalEquations::new(k);
    let mut beta = vec![0.0; k];
    let mut deviance = f64::INFINITY;
    let mut trial_eta = vec![0.0; n];
    let mut trial_mu = vec![0.0; n];
    let mut converged = false;
    let mut stalled = false;
    let mut iterations = 0;
    let constant = family.deviance_constant(y, w);

    while iterations < opts.max_iter {
        iterations += 1;
        for i in 0..n {
            let d = family.mu_eta_at(eta[i], mu[i]);
            let v = family.variance(mu[i]);
            if d > 0.0 && v > 0.0 && d.is_finite() {
                ww[i] = w[i] * d * d / v;
                z[i] = eta[i] - offset[i] + (y[i] - mu[i]) / d;
            } else {
                ww[i] = 0.0;
                z[i] = eta[i] - offset[i];
            }
        }
        ne.accumulate(x, n, active, &ww, Some(&z));
        if !ne.factor() {
            stalled = true;
            break;
        }
        ne.solve();
        let mut candidate = ne.rhs.clone();
        let mut trial_dev = f64::NAN;
        let first = iterations == 1;
        for halving in 0..=MAX_HALVINGS {
            linear_predictor(x, n, active, &candidate, offset, &mut trial_eta);
            for i in 0..n {
                trial_mu[i] = family.inverse_link(trial_eta[i]);
            }
            trial_dev = family.step_deviance(y, &trial_eta, &trial_mu, w, constant);
            let acceptable = trial_dev.is_finite() && (first || trial_dev <= deviance + 1e-9 * (deviance.abs() + 0.1));
            if acceptable || halving == MAX_HALVINGS {
                break;
            }
            for (c, b) in candidate.iter_mut().zip(&beta) {
                *c = 0.5 * (*c + b);
            }
        }
        if !trial_dev.is_finite() {
            return None;
        }
        let max_step = candidate
            .iter()
            .zip(&beta)
            .map(|(c, b)| (c - b).abs())
            .fold(0.0, f64::max);
        let relative_change = (trial_dev - deviance).abs() / (trial_dev.abs() + 0.1);
        beta.copy_from_slice(&candidate);
        std::mem::swap(&mut eta, &mut trial_eta);
        std::mem::swap(&mut mu, &mut trial_mu);
        deviance = trial_dev;
        if !first && (relative_change < opts.tol || max_step < opts.tol.sqrt()) {
            converged = true;
            break;
        }
    }
    Some(IrlsRun {
        beta,
        stalled,
        eta,
        mu,
        iterations,
        converged,
    })
}

/// eta = offset + X[:, active]·b.
fn linear_predictor(x: &[f64], n: usize, active: &[usize], b: &[f64], offset: &[f64], eta: &mut [f64]) {
    eta.copy_from_slice(offset);
    for (a, &j) in active.iter().enumerate() {
        let col = &x[j * n..(j + 1) * n];
        let coef = b[a];
        for (e, &v) in eta.iter_mut().zip(col) {
            *e += coef * v;
        }
    }
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
