//! Profile-likelihood confidence intervals for one coefficient (Venzon & Moolgavkar 1988;
//! McCullagh & Nelder 1989, sec. 7.2): the limits are the values b of coefficient j where
//!   2 (l_max - l_p(b)) / phi = chi²_1(level),
//! with l_p(b) the log-likelihood maximised over every other parameter while b_j = b (a refit
//! with b·x_j moved into the offset and column j left out; a family's own parameter is
//! re-estimated in each refit) and phi the dispersion (1, or Pearson X²/df for quasi errors).
//!
//! Each side is found by bracketing from the Wald limit outward, then the Illinois variant of
//! regula falsi on the bracket (relative tolerance 1e-10 on b); no crate in our dependencies
//! has a root finder. A coefficient at the boundary (its MLE infinite) has one finite limit on
//! the side away from the boundary, found from the boundary fit's log-likelihood (the limit of
//! l_p), and an infinite one on the other side.

use std::sync::atomic::{AtomicUsize, Ordering};

use super::design::{ColumnKind, Design};
use super::distributions::normal_quantile;
use super::error::FitError;
use super::family::Family;
use super::fit::{FitInput, GlmFit, TermState};
use super::irls::{FitOptions, Standardised, Start, irls};

/// Constrained refits made by this process (read by the benchmark to report refits per term).
pub static REFITS: AtomicUsize = AtomicUsize::new(0);

/// The limits of one coefficient's interval; `None` for an infinite side.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProfileLimits {
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Constrained refits made.
    pub refits: usize,
}

/// A model with one coefficient held fixed: its log-likelihood maximised over every other
/// parameter.
pub trait ConstrainedFit {
    /// l_p(b); `None` when the refit has no log-likelihood (it broke down).
    fn loglik(&mut self, b: f64) -> Result<Option<f64>, FitError>;
}

/// The design without column `j` (the column whose coefficient is held fixed).
pub fn without_column(design: &Design, j: usize) -> Result<Design, FitError> {
    let columns = (0..design.n_columns())
        .filter(|&c| c != j)
        .map(|c| (design.names()[c].clone(), design.kinds()[c], design.column(c).to_vec()))
        .collect::<Vec<(String, ColumnKind, Vec<f64>)>>();
    Design::from_columns(design.n_rows(), columns)
}

/// offset + b·x_j: the fixed coefficient moved into the offset.
pub fn constrained_offset(offset: Option<&[f64]>, xj: &[f64], b: f64) -> Vec<f64> {
    match offset {
        Some(o) => o.iter().zip(xj).map(|(o, x)| o + b * x).collect(),
        None => xj.iter().map(|x| b * x).collect(),
    }
}

/// Refits of a family with a fixed scale (Poisson) by bare IRLS: no covariances or statistics;
/// the log-likelihood is l_sat - D/2 (l_sat the saturated model's, computed once). For fits
/// without boundary terms (a constrained refit then has none either: its columns span a
/// subspace of the full design's); a fit with one needs the boundary handling of a full refit
/// ([`FunctionRefit`]).
///
/// Warm starts: each refit starts from the means of the nearer of the unconstrained fit and
/// the previous refit, moved to the new b along the tangent of the profile path. At the MLE the
/// other coefficients move with b_j as V[k,j]/V[j,j] (V the coefficient covariance), so the
/// linear predictor moves along t = X·V[.,j]/V[j,j], and the start is mu·exp((b - b_prev)·t).
pub struct IrlsRefit<'a, F: Family> {
    family: &'a F,
    standard: Standardised,
    active: Vec<usize>,
    y: &'a [f64],
    offset: Option<&'a [f64]>,
    w: Vec<f64>,
    xj: Vec<f64>,
    tangent: Vec<f64>,
    saturated_loglik: f64,
    opts: FitOptions,
    /// (b, means) of the unconstrained fit and of the latest refit.
    anchors: Vec<(f64, Vec<f64>)>,
}

impl<'a, F: Family> IrlsRefit<'a, F> {
    /// Refits of `fit` (of `family` to `design` and `input`) with coefficient `j` held fixed, on
    /// the other columns `fit` estimated.
    pub fn new(
        family: &'a F,
        design: &Design,
        input: FitInput<'a>,
        fit: &GlmFit,
        j: usize,
        opts: FitOptions,
    ) -> Result<Self, FitError> {
        let reduced = without_column(design, j)?;
        let active = (0..design.n_columns())
            .filter(|&c| c != j && fit.states[c] == TermState::Estimated)
            .map(|c| if c > j { c - 1 } else { c })
            .collect();
        let n = design.n_rows();
        let w = input.weights.map_or_else(|| vec![1.0; n], <[f64]>::to_vec);
        let xj = design.column(j).to_vec();
        let mut tangent = xj.clone();
        let vjj = fit.cov_unscaled[(j, j)];
        if vjj > 0.0 && vjj.is_finite() {
            for k in (0..design.n_columns()).filter(|&k| k != j && fit.states[k] == TermState::Estimated) {
                let slope = fit.cov_unscaled[(k, j)] / vjj;
                if slope.is_finite() {
                    for (t, x) in tangent.iter_mut().zip(design.column(k)) {
                        *t += slope * x;
                    }
                }
            }
        }
        let mut anchors = Vec::with_capacity(2);
        if fit.states[j] == TermState::Estimated && fit.fitted.len() == n {
            anchors.push((fit.estimates[j], fit.fitted.clone()));
        }
        Ok(IrlsRefit {
            family,
            standard: Standardised::new(&reduced),
            active,
            y: input.y,
            offset: input.offset,
            saturated_loglik: family.log_likelihood(input.y, input.y, &w),
            w,
            xj,
            tangent,
            opts,
            anchors,
        })
    }

    /// Means to start the refit at `b` from: the nearest anchor moved to b along the tangent,
    /// when all finite and > 0.
    fn warm_start(&self, b: f64) -> Option<Vec<f64>> {
        let (b0, mu0) = self
            .anchors
            .iter()
            .min_by(|x, y| (x.0 - b).abs().total_cmp(&(y.0 - b).abs()))?;
        let mu: Vec<f64> = mu0
            .iter()
            .zip(&self.tangent)
            .map(|(m, t)| m * ((b - b0) * t).exp())
            .collect();
        mu.iter().all(|m| m.is_finite() && *m > 0.0).then_some(mu)
    }
}

impl<F: Family> ConstrainedFit for IrlsRefit<'_, F> {
    fn loglik(&mut self, b: f64) -> Result<Option<f64>, FitError> {
        REFITS.fetch_add(1, Ordering::Relaxed);
        let n = self.y.len();
        let offset = constrained_offset(self.offset, &self.xj, b);
        let (mu, deviance) = if self.active.is_empty() {
            let mu: Vec<f64> = offset.iter().map(|&e| self.family.inverse_link(e)).collect();
            let d = super::fit::weighted_deviance(self.family, self.y, &mu, &self.w);
            (mu, d)
        } else {
            let start = self.warm_start(b);
            let run = irls(
                self.family,
                &self.standard.x,
                n,
                &self.active,
                self.y,
                &offset,
                &self.w,
                self.opts,
                start.map(|mu| Start { mu, eta: None }),
            );
            match run {
                Some(run) if !run.stalled => (run.mu, run.deviance),
                _ => return Ok(None),
            }
        };
        let l = self.saturated_loglik - deviance / 2.0;
        if !l.is_finite() {
            return Ok(None);
        }
        if mu.iter().all(|m| m.is_finite() && *m > 0.0) {
            self.anchors.truncate(1);
            self.anchors.push((b, mu));
        }
        Ok(Some(l))
    }
}

/// Refits by any fitting function `refit(design, input) -> loglik` (negative binomial: alpha
/// re-estimated in every refit) on the design without column `j`.
pub struct FunctionRefit<'a, R> {
    reduced: Design,
    input: FitInput<'a>,
    xj: Vec<f64>,
    refit: R,
}

impl<'a, R: FnMut(&Design, FitInput<'_>) -> Result<Option<f64>, FitError>> FunctionRefit<'a, R> {
    pub fn new(design: &Design, input: FitInput<'a>, j: usize, refit: R) -> Result<Self, FitError> {
        Ok(FunctionRefit {
            reduced: without_column(design, j)?,
            input,
            xj: design.column(j).to_vec(),
            refit,
        })
    }
}

impl<R: FnMut(&Design, FitInput<'_>) -> Result<Option<f64>, FitError>> ConstrainedFit for FunctionRefit<'_, R> {
    fn loglik(&mut self, b: f64) -> Result<Option<f64>, FitError> {
        REFITS.fetch_add(1, Ordering::Relaxed);
        let offset = constrained_offset(self.input.offset, &self.xj, b);
        let input = FitInput {
            offset: Some(&offset),
            ..self.input
        };
        (self.refit)(&self.reduced, input)
    }
}

/// Profile limits of coefficient `j` of `fit` at `level`, the profile statistic divided by
/// `dispersion`, from the refits of `model`.
///
/// Each side solves h(b) = sqrt(2 (l_max - l_p(b)) / phi) - q = 0 with q the normal quantile:
/// h is nearly linear in b (exactly so for a quadratic log-likelihood, where the root is the
/// Wald limit), so the search starts at the Wald limit, extrapolates by secant from h(b̂) = -q
/// until the root is bracketed, then closes the bracket by Illinois regula falsi.
pub fn profile_interval(
    model: &mut dyn ConstrainedFit,
    fit: &GlmFit,
    j: usize,
    level: f64,
    dispersion: f64,
) -> Result<ProfileLimits, FitError> {
    let Some(l_max) = fit.stats.loglik else {
        return Ok(ProfileLimits {
            low: None,
            high: None,
            refits: 0,
        });
    };
    let q = normal_quantile(0.5 + level / 2.0);
    let mut refits = 0;
    let mut h = |b: f64| -> Result<Option<f64>, FitError> {
        refits += 1;
        Ok(model
            .loglik(b)?
            .map(|l| (2.0 * (l_max - l) / dispersion).max(0.0).sqrt() - q))
    };
    let (low, high) = match fit.states[j] {
        TermState::Estimated => {
            let b = fit.estimates[j];
            let se = fit.cov_unscaled[(j, j)].max(0.0).sqrt() * dispersion.sqrt();
            let step = if se > 0.0 && se.is_finite() { q * se } else { 1.0 };
            (side(&mut h, b, -q, -step)?, side(&mut h, b, -q, step)?)
        }
        TermState::Boundary => {
            // The estimate runs off to one side; the finite limit is on the other. The side is
            // the one where pulling the coefficient back lowers the likelihood.
            let (Some(up), Some(down)) = (h(10.0)?, h(-10.0)?) else {
                return Ok(ProfileLimits {
                    low: None,
                    high: None,
                    refits,
                });
            };
            if up > down {
                (None, side(&mut h, -10.0, down, 1.0)?)
            } else {
                (side(&mut h, 10.0, up, -1.0)?, None)
            }
        }
        _ => (None, None),
    };
    Ok(ProfileLimits { low, high, refits })
}

/// The root of `h` beyond `start` (where h = `h_start` < 0) in the direction of `step`: first
/// trial at start + step, then secant extrapolation (at least 10% and at most 100% further out
/// than the last trial) until h >= 0, then Illinois regula falsi to 1e-10 relative. `None` when
/// no root is found within 60 extrapolations (an infinite side) or a refit fails.
fn side(
    h: &mut dyn FnMut(f64) -> Result<Option<f64>, FitError>,
    start: f64,
    h_start: f64,
    step: f64,
) -> Result<Option<f64>, FitError> {
    if h_start >= 0.0 {
        return Ok(None);
    }
    let (mut a, mut fa) = (start, h_start);
    let mut b = start + step;
    let mut fb = f64::NAN;
    for _ in 0..60 {
        let Some(v) = h(b)? else { return Ok(None) };
        fb = v;
        if fb >= 0.0 {
            break;
        }
        // Signed distances from start: the next trial lies between 1.1 and 2 times the last.
        let reach = b - start;
        let (near, far) = (1.1 * reach, 2.0 * reach);
        let secant = if fb > fa {
            b + (b - a) * (-fb) / (fb - fa) - start
        } else {
            far
        };
        let next = if !secant.is_finite() {
            far
        } else if reach > 0.0 {
            secant.clamp(near, far)
        } else {
            secant.clamp(far, near)
        };
        (a, fa) = (b, fb);
        b = start + next;
    }
    if !(fb >= 0.0) {
        return Ok(None);
    }
    // Illinois: regula falsi where the end kept twice in a row has its value halved.
    let mut previous = b;
    for _ in 0..200 {
        let c = (a * fb - b * fa) / (fb - fa);
        let Some(fc) = h(c)? else { return Ok(None) };
        if fc == 0.0 || (c - previous).abs() <= 1e-10 * c.abs().max(1.0) {
            return Ok(Some(c));
        }
        previous = c;
        if (fc > 0.0) != (fb > 0.0) {
            (a, fa) = (b, fb);
        } else {
            fa *= 0.5;
        }
        (b, fb) = (c, fc);
    }
    Ok(Some(b))
}
