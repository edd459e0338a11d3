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

use super::design::{ColumnKind, Design};
use super::distributions::normal_quantile;
use super::error::FitError;
use super::fit::{FitInput, GlmFit, TermState};

/// The limits of one coefficient's interval; `None` for an infinite side.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ProfileLimits {
    pub low: Option<f64>,
    pub high: Option<f64>,
    /// Constrained refits made.
    pub refits: usize,
}

/// Refits a model to `design` with `input` (the offset carries the fixed coefficient) and
/// returns its log-likelihood; `None` when the refit has none.
pub trait Refit {
    fn loglik(&self, design: &Design, input: FitInput<'_>) -> Result<Option<f64>, FitError>;
}

impl<F: Fn(&Design, FitInput<'_>) -> Result<Option<f64>, FitError>> Refit for F {
    fn loglik(&self, design: &Design, input: FitInput<'_>) -> Result<Option<f64>, FitError> {
        self(design, input)
    }
}

/// Profile limits of coefficient `j` of `fit` (fitted to `design` and `input` by `refit`'s
/// method) at `level`, the profile statistic divided by `dispersion`.
pub fn profile_interval(
    refit: &dyn Refit,
    design: &Design,
    input: FitInput<'_>,
    fit: &GlmFit,
    j: usize,
    level: f64,
    dispersion: f64,
) -> Result<ProfileLimits, FitError> {
    let n = design.n_rows();
    let Some(l_max) = fit.stats.loglik else {
        return Ok(ProfileLimits {
            low: None,
            high: None,
            refits: 0,
        });
    };
    let target = normal_quantile(0.5 + level / 2.0).powi(2) * dispersion;
    // The design without column j, and x_j to move into the offset.
    let columns: Vec<(String, ColumnKind, Vec<f64>)> = (0..design.n_columns())
        .filter(|&c| c != j)
        .map(|c| (design.names()[c].clone(), design.kinds()[c], design.column(c).to_vec()))
        .collect();
    let reduced = Design::from_columns(n, columns)?;
    let xj = design.column(j);
    let base: Vec<f64> = input.offset.map_or_else(|| vec![0.0; n], <[f64]>::to_vec);
    let mut refits = 0;
    let mut deviation = |b: f64| -> Result<Option<f64>, FitError> {
        refits += 1;
        let offset: Vec<f64> = base.iter().zip(xj).map(|(o, x)| o + b * x).collect();
        let constrained = FitInput {
            y: input.y,
            offset: Some(&offset),
            weights: input.weights,
        };
        Ok(refit
            .loglik(&reduced, constrained)?
            .map(|l| (2.0 * (l_max - l)).max(0.0) - target))
    };
    let wald_se = fit.cov_unscaled[(j, j)].max(0.0).sqrt() * dispersion.sqrt();
    let (low, high) = match fit.states[j] {
        TermState::Estimated => {
            let b = fit.estimates[j];
            let step = if wald_se > 0.0 && wald_se.is_finite() {
                wald_se
            } else {
                1.0
            };
            (side(&mut deviation, b, -step)?, side(&mut deviation, b, step)?)
        }
        TermState::Boundary => {
            // The estimate runs off to one side; the finite limit is on the other. The side is
            // the one where pulling the coefficient back raises the deviation.
            let (up, down) = (deviation(10.0)?, deviation(-10.0)?);
            match (up, down) {
                (Some(u), Some(d)) if u > d => (None, side(&mut deviation, -10.0, 1.0)?),
                (Some(_), Some(_)) => (side(&mut deviation, 10.0, -1.0)?, None),
                _ => (None, None),
            }
        }
        _ => (None, None),
    };
    Ok(ProfileLimits { low, high, refits })
}

/// The root of `deviation` beyond `start` in the direction of `step`: bracket by doubling the
/// step (up to 60 times), then Illinois regula falsi to 1e-10 relative. `None` when no root is
/// found (an infinite side) or a refit fails.
fn side(
    deviation: &mut dyn FnMut(f64) -> Result<Option<f64>, FitError>,
    start: f64,
    step: f64,
) -> Result<Option<f64>, FitError> {
    let Some(f0) = deviation(start)? else { return Ok(None) };
    if f0 >= 0.0 {
        return Ok(None);
    }
    let (mut a, mut fa) = (start, f0);
    let mut width = step;
    let (mut b, mut fb) = (start, f0);
    for _ in 0..60 {
        b = start + width;
        let Some(v) = deviation(b)? else { return Ok(None) };
        fb = v;
        if fb >= 0.0 {
            break;
        }
        (a, fa) = (b, fb);
        width *= 2.0;
    }
    if fb < 0.0 {
        return Ok(None);
    }
    // Illinois: regula falsi where the end kept twice in a row has its value halved.
    let mut previous = b;
    for _ in 0..200 {
        let c = (a * fb - b * fa) / (fb - fa);
        let Some(fc) = deviation(c)? else { return Ok(None) };
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
