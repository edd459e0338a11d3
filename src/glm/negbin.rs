//! Negative binomial (NB2) regression: Var(y) = mu + alpha·mu², log link, alpha estimated by
//! maximum likelihood jointly with the coefficients.
//!
//! Log-likelihood of a row, with theta = 1/alpha (Cameron & Trivedi 1998, ch. 3; Hilbe 2011):
//!   l = lnΓ(y + θ) - lnΓ(θ) - lnΓ(y + 1) + θ ln(θ/(θ + mu)) + y ln(mu/(θ + mu)).
//!
//! Fitting alternates two steps until both settle (relative changes below `tol` and 1e-10):
//! IRLS for the coefficients at fixed alpha (the family [`NegativeBinomial`], warm-started from
//! the previous means), then Newton steps on log(alpha) for the profile likelihood at fixed
//! means. It starts from the Poisson fit, and stops at alpha = 0 when the score of alpha there,
//! ½ Σ ((y - mu)² - y), is not positive: the Poisson fit is then the maximum (boundary).
//!
//! Standard errors come from the inverse of the joint observed information of (beta, alpha)
//! (the convention of statsmodels' `NegativeBinomial`); the sandwich uses the joint scores. The
//! intercept-only model with its own alpha is the null model of `null_deviance` and the model
//! test.

use nalgebra::{DMatrix, DVector};
use statrs::function::gamma::{digamma, ln_gamma};

use super::design::{ColumnKind, Design};
use super::distributions::chi2_sf;
use super::error::FitError;
use super::family::{Family, FamilyKind, FamilyTests, Poisson, Scale, crude_rate, log_factorial, xlogy_ratio};
use super::fit::{FamilyParameter, FitInput, FitIssue, GlmFit, TermState, fit_with_row_count, note_saturation};
use super::irls::{FitOptions, Standardised, irls};
use super::overdispersion::ScoreTest;

/// NB2 with a fixed alpha (> 0), for the coefficient steps; `warm` holds the previous fitted
/// means to start IRLS from.
#[derive(Debug, Clone, Copy)]
pub struct NegativeBinomial<'a> {
    pub alpha: f64,
    pub warm: Option<&'a [f64]>,
}

/// The family's properties (scale, collapsibility), for planning.
pub(crate) static NB_PROPERTIES: NegativeBinomial<'static> = NegativeBinomial { alpha: 1.0, warm: None };

impl Family for NegativeBinomial<'_> {
    fn kind(&self) -> FamilyKind {
        FamilyKind::NegativeBinomial
    }
    /// The alternation's rounds start from the previous round's means, which are closer.
    fn subsample_start(&self) -> bool {
        self.warm.is_none()
    }
    fn scale(&self) -> Scale {
        Scale::OwnParameter
    }
    /// Not collapsible: the likelihood needs each row's count, not only a pattern's totals.
    fn collapsible(&self) -> bool {
        false
    }
    fn check_response(&self, y: f64) -> Option<&'static str> {
        Poisson.check_response(y)
    }
    fn start(&self, y: &[f64], offset: &[f64], w: &[f64], mu: &mut [f64]) {
        match self.warm {
            Some(warm) if warm.len() == mu.len() => {
                for (m, &v) in mu.iter_mut().zip(warm) {
                    *m = v.max(f64::MIN_POSITIVE);
                }
            }
            _ => Poisson.start(y, offset, w, mu),
        }
    }
    /// The intercept-only fit at this alpha: r solves Σ w (y - E r)/(1 + alpha E r) = 0
    /// (Newton on log r from the crude rate); offset-only without an intercept.
    fn null_fitted(&self, y: &[f64], _offset: &[f64], exposure: &[f64], w: &[f64], intercept: bool, mu: &mut [f64]) {
        let mut rate = 1.0;
        if intercept {
            rate = crude_rate(y, exposure, w);
            for _ in 0..100 {
                let (mut score, mut info) = (0.0, 0.0);
                for i in 0..y.len() {
                    let m = exposure[i] * rate;
                    let d = 1.0 + self.alpha * m;
                    score += w[i] * (y[i] - m) / d;
                    info += w[i] * m * (1.0 + self.alpha * y[i]) / (d * d);
                }
                if !(info > 0.0) || !score.is_finite() {
                    break;
                }
                let step = (score / info).clamp(-5.0, 5.0);
                rate *= step.exp();
                if step.abs() < 1e-14 {
                    break;
                }
            }
        }
        for (m, e) in mu.iter_mut().zip(exposure) {
            *m = e * rate;
        }
    }
    fn link(&self, mu: f64) -> f64 {
        mu.ln()
    }
    fn inverse_link(&self, eta: f64) -> f64 {
        eta.exp()
    }
    fn mu_eta(&self, eta: f64) -> f64 {
        eta.exp()
    }
    fn mu_eta_at(&self, _eta: f64, mu: f64) -> f64 {
        mu
    }
    fn variance(&self, mu: f64) -> f64 {
        mu + self.alpha * mu * mu
    }
    /// d(y, mu) = 2·[y ln(y/mu) - (y + θ) ln((y + θ)/(mu + θ))], with 0·ln 0 = 0.
    fn unit_deviance(&self, y: f64, mu: f64) -> f64 {
        let theta = 1.0 / self.alpha;
        (2.0 * (xlogy_ratio(y, mu) - (y + theta) * ((y + theta) / (mu + theta)).ln())).max(0.0)
    }
    fn log_likelihood(&self, y: &[f64], mu: &[f64], w: &[f64]) -> f64 {
        let sums = GammaSums::new(1.0 / self.alpha, y);
        y.iter()
            .zip(mu)
            .zip(w)
            .map(|((&y, &m), &w)| w * row_loglik_with(y, m, self.alpha, &sums))
            .sum()
    }
    /// Σ w·[y ln y - (y + θ) ln(y + θ)], the part of the deviance that does not move.
    fn deviance_constant(&self, y: &[f64], w: &[f64]) -> f64 {
        let theta = 1.0 / self.alpha;
        y.iter()
            .zip(w)
            .map(|(&y, &w)| w * (super::family::xlogy(y, y) - (y + theta) * (y + theta).ln()))
            .sum()
    }
    /// With ln mu = eta: D = 2·(constant + Σ w·[(y + θ) ln(mu + θ) - y·eta]), one logarithm per
    /// row instead of two.
    fn step_deviance(&self, y: &[f64], eta: &[f64], mu: &[f64], w: &[f64], constant: f64) -> f64 {
        let theta = 1.0 / self.alpha;
        let mut sum = 0.0;
        let mut lost = false;
        for i in 0..y.len() {
            sum += w[i] * ((y[i] + theta) * (mu[i] + theta).ln() - y[i] * eta[i]);
            lost |= mu[i] == 0.0 && y[i] > 0.0;
        }
        if lost { f64::INFINITY } else { 2.0 * (constant + sum) }
    }
    fn has_boundary(&self) -> bool {
        true
    }
}

/// lnΓ(θ + y) - lnΓ(θ): a sum of logarithms for small whole y (no cancellation when θ is
/// large), the difference of lnΓ otherwise.
fn ln_gamma_ratio(theta: f64, y: f64) -> f64 {
    if y >= 0.0 && y < 64.0 && y.fract() == 0.0 {
        (0..y as usize).map(|k| (theta + k as f64).ln()).sum()
    } else {
        ln_gamma(theta + y) - ln_gamma(theta)
    }
}

/// ψ(θ + y) - ψ(θ), as a sum for small whole y.
fn digamma_difference(theta: f64, y: f64) -> f64 {
    if y >= 0.0 && y < 64.0 && y.fract() == 0.0 {
        (0..y as usize).map(|k| 1.0 / (theta + k as f64)).sum()
    } else {
        digamma(theta + y) - digamma(theta)
    }
}

/// ψ'(θ + y) - ψ'(θ), as a sum for small whole y.
fn trigamma_difference(theta: f64, y: f64) -> f64 {
    if y >= 0.0 && y < 64.0 && y.fract() == 0.0 {
        -(0..y as usize).map(|k| (theta + k as f64).powi(-2)).sum::<f64>()
    } else {
        trigamma(theta + y) - trigamma(theta)
    }
}

/// ψ(θ + y) - ψ(θ), ψ'(θ + y) - ψ'(θ) and lnΓ(θ + y) - lnΓ(θ) for the whole counts 0..=max at
/// one θ, as running sums (built in O(max) once per alpha, so that a row costs a lookup).
struct GammaSums {
    theta: f64,
    digamma: Vec<f64>,
    trigamma: Vec<f64>,
    ln_gamma: Vec<f64>,
}

impl GammaSums {
    /// Counts above this are left to the special functions.
    const MAX: usize = 4096;

    fn new(theta: f64, y: &[f64]) -> Self {
        let max = y
            .iter()
            .filter(|v| v.fract() == 0.0 && **v >= 0.0 && **v <= Self::MAX as f64)
            .fold(0.0f64, |m, &v| m.max(v)) as usize;
        let (mut digamma, mut trigamma, mut ln_gamma) = (
            Vec::with_capacity(max + 1),
            Vec::with_capacity(max + 1),
            Vec::with_capacity(max + 1),
        );
        let (mut d, mut t, mut l) = (0.0, 0.0, 0.0);
        for k in 0..=max {
            digamma.push(d);
            trigamma.push(t);
            ln_gamma.push(l);
            let x = theta + k as f64;
            d += 1.0 / x;
            t -= 1.0 / (x * x);
            l += x.ln();
        }
        GammaSums {
            theta,
            digamma,
            trigamma,
            ln_gamma,
        }
    }

    fn index(&self, y: f64) -> Option<usize> {
        (y >= 0.0 && y.fract() == 0.0 && y < self.digamma.len() as f64).then_some(y as usize)
    }

    fn digamma_difference(&self, y: f64) -> f64 {
        self.index(y)
            .map_or_else(|| digamma_difference(self.theta, y), |k| self.digamma[k])
    }

    fn trigamma_difference(&self, y: f64) -> f64 {
        self.index(y)
            .map_or_else(|| trigamma_difference(self.theta, y), |k| self.trigamma[k])
    }

    fn ln_gamma_ratio(&self, y: f64) -> f64 {
        self.index(y)
            .map_or_else(|| ln_gamma_ratio(self.theta, y), |k| self.ln_gamma[k])
    }
}

/// The trigamma function ψ'(x) for x > 0: the recurrence ψ'(x) = ψ'(x + 1) + 1/x² up to
/// x >= 12, then the asymptotic series 1/x + 1/(2x²) + Σ B_2k / x^(2k+1) to B_14 (Abramowitz &
/// Stegun 6.4.12), whose first omitted term there is below 1e-17 relative. statrs has the
/// digamma function but not its derivative, hence this one.
pub fn trigamma(mut x: f64) -> f64 {
    let mut sum = 0.0;
    while x < 12.0 {
        sum += 1.0 / (x * x);
        x += 1.0;
    }
    let z = 1.0 / (x * x);
    // Bernoulli numbers B2..B14: 1/6, -1/30, 1/42, -1/30, 5/66, -691/2730, 7/6.
    let series = 1.0 / 6.0
        + z * (-1.0 / 30.0
            + z * (1.0 / 42.0 + z * (-1.0 / 30.0 + z * (5.0 / 66.0 + z * (-691.0 / 2730.0 + z * (7.0 / 6.0))))));
    sum + 1.0 / x + 0.5 * z + series * z / x
}

/// First and second derivatives of one row's log-likelihood with respect to alpha (`sums` at
/// θ = 1/alpha).
fn alpha_derivatives(y: f64, mu: f64, alpha: f64, sums: &GammaSums) -> (f64, f64) {
    let theta = 1.0 / alpha;
    // dl/dθ and d²l/dθ², then the chain rule with dθ/dα = -θ².
    let d1 = sums.digamma_difference(y) - (alpha * mu).ln_1p() + (mu - y) / (theta + mu);
    let d2 = sums.trigamma_difference(y) + 1.0 / theta - 1.0 / (theta + mu) - (mu - y) / (theta + mu).powi(2);
    (-theta * theta * d1, 2.0 * theta.powi(3) * d1 + theta.powi(4) * d2)
}

/// One row's NB2 log-likelihood with the gamma sums at hand.
fn row_loglik_with(y: f64, mu: f64, alpha: f64, sums: &GammaSums) -> f64 {
    let theta = 1.0 / alpha;
    let log_terms = if y == 0.0 { 0.0 } else { y * (mu / (theta + mu)).ln() };
    sums.ln_gamma_ratio(y) - log_factorial(y) - theta * (alpha * mu).ln_1p() + log_terms
}

/// The alpha that maximises the likelihood at fixed means: Newton steps on t = ln(alpha) for
/// the root of the score, a step kept when it raises the likelihood or shrinks the score (the
/// likelihood of huge counts is a difference of large log-gamma values, too coarse to compare
/// near the maximum; the score is not); 0 when the maximum is at the boundary.
fn profile_alpha(y: &[f64], mu: &[f64], w: &[f64], start: f64) -> f64 {
    profile_alpha_steps(y, mu, w, start, 200)
}

/// At most `steps` Newton steps of [`profile_alpha`] (the alternation takes one per round: the
/// means move under it anyway).
fn profile_alpha_steps(y: &[f64], mu: &[f64], w: &[f64], start: f64, steps: usize) -> f64 {
    let loglik = |a: f64| -> f64 {
        let sums = GammaSums::new(1.0 / a, y);
        (0..y.len())
            .map(|i| w[i] * row_loglik_with(y[i], mu[i], a, &sums))
            .sum()
    };
    // The score and curvature in t: dl/dt = a g, d²l/dt² = a² h + a g.
    let derivatives = |a: f64| -> (f64, f64) {
        let sums = GammaSums::new(1.0 / a, y);
        let (mut g, mut h) = (0.0, 0.0);
        for i in 0..y.len() {
            let (d1, d2) = alpha_derivatives(y[i], mu[i], a, &sums);
            g += w[i] * d1;
            h += w[i] * d2;
        }
        (a * g, a * a * h + a * g)
    };
    let mut a = start.max(1e-8);
    let mut value = loglik(a);
    let (mut gt, mut ht) = derivatives(a);
    for _ in 0..steps {
        let mut step = if ht < 0.0 { -gt / ht } else { gt.signum() };
        step = step.clamp(-3.0, 3.0);
        let mut moved = false;
        for _ in 0..40 {
            let candidate = a * step.exp();
            let (g_new, h_new) = derivatives(candidate);
            // The likelihood is evaluated only when the score alone does not decide.
            let shrinks = g_new.is_finite() && g_new.abs() < gt.abs();
            let v_new = if shrinks { value } else { loglik(candidate) };
            if g_new.is_finite() && (shrinks || v_new > value) {
                let done = step.abs() <= 1e-12;
                (a, value, gt, ht) = (candidate, v_new, g_new, h_new);
                moved = true;
                if done {
                    return a;
                }
                break;
            }
            step *= 0.5;
        }
        if !moved || a < 1e-12 {
            break;
        }
    }
    if a < 1e-10 { 0.0 } else { a }
}

/// The NB2 log-likelihood at fixed means, maximised over alpha (0 at the boundary): the
/// profile of a model without coefficients.
pub fn loglik_at_means(y: &[f64], mu: &[f64], weights: Option<&[f64]>) -> f64 {
    let ones = vec![1.0; y.len()];
    let w = weights.unwrap_or(&ones);
    let score0: f64 = (0..y.len()).map(|i| w[i] * ((y[i] - mu[i]).powi(2) - y[i])).sum();
    let moment = score0 / (0..y.len()).map(|i| w[i] * mu[i] * mu[i]).sum::<f64>();
    let alpha = if score0 > 0.0 {
        profile_alpha(y, mu, w, moment)
    } else {
        0.0
    };
    if alpha == 0.0 {
        Poisson.log_likelihood(y, mu, w)
    } else {
        NegativeBinomial { alpha, warm: None }.log_likelihood(y, mu, w)
    }
}

/// Fits an NB2 model (see the module doc). Errors only for invalid input, as [`super::fit`].
pub fn fit_negative_binomial(design: &Design, input: FitInput<'_>, opts: FitOptions) -> Result<GlmFit, FitError> {
    let poisson = fit_with_row_count(&Poisson, design, input, opts, design.n_rows())?;
    let mut fit = match alternate(design, input, opts, &poisson)? {
        Alternation::Unfitted(fit) => as_negative_binomial(fit, None),
        Alternation::Boundary => at_poisson_boundary(&poisson),
        Alternation::Fitted(mut fit, alpha) => {
            let w = input
                .weights
                .map_or_else(|| vec![1.0; design.n_rows()], <[f64]>::to_vec);
            joint_covariances(design, input.y, &w, alpha, &mut fit);
            let t = (2.0 * (fit.stats.loglik.unwrap_or(f64::NAN) - poisson.stats.loglik.unwrap_or(f64::NAN))).max(0.0);
            fit.stats.extra = FamilyTests {
                poisson_lr: t.is_finite().then(|| ScoreTest {
                    statistic: t,
                    p_value: if t > 0.0 { 0.5 * chi2_sf(t, 1.0) } else { 1.0 },
                }),
                ..FamilyTests::default()
            };
            null_model(design, input, opts, &mut fit)?;
            fit
        }
    };
    note_saturation(&mut fit);
    Ok(fit)
}

/// How the alternation ended.
enum Alternation {
    /// No coefficient could be estimated (too few rows, no events, breakdown): the fit as it is.
    Unfitted(GlmFit),
    /// alpha's maximum is at 0: the Poisson fit is the NB fit.
    Boundary,
    /// The fit at the final alpha (IRLS statistics; covariances not yet joint).
    Fitted(GlmFit, f64),
}

/// IRLS at fixed alpha and the profile step for alpha, alternated from the Poisson fit until
/// both settle (see the module doc).
fn alternate(
    design: &Design,
    input: FitInput<'_>,
    opts: FitOptions,
    poisson: &GlmFit,
) -> Result<Alternation, FitError> {
    let n = design.n_rows();
    let y = input.y;
    let ones = vec![1.0; n];
    let w = input.weights.unwrap_or(&ones);
    if !poisson.states.contains(&TermState::Estimated) || poisson.fitted.len() != n {
        return Ok(Alternation::Unfitted(poisson.clone()));
    }
    // The score of alpha at 0 decides whether alpha moves off the boundary.
    let score0: f64 = (0..n).map(|i| w[i] * ((y[i] - poisson.fitted[i]).powi(2) - y[i])).sum();
    if !(score0 > 0.0) {
        return Ok(Alternation::Boundary);
    }
    let moment = score0 / (0..n).map(|i| w[i] * poisson.fitted[i].powi(2)).sum::<f64>();
    let mut alpha = profile_alpha(y, &poisson.fitted, w, moment);
    let mut fit = poisson.clone();
    if !poisson.states.contains(&TermState::Boundary) {
        // Most of the way with bare IRLS runs (no statistics or covariances per round); the
        // full fits below then settle in a round or two.
        let (settled_alpha, mu) = approach(design, input, opts, &poisson.states, &poisson.fitted, alpha);
        alpha = settled_alpha;
        fit.fitted = mu;
    }
    for round in 1..=opts.max_iter {
        if alpha == 0.0 {
            return Ok(Alternation::Boundary);
        }
        let family = NegativeBinomial {
            alpha,
            warm: Some(&fit.fitted),
        };
        let next_fit = fit_with_row_count(&family, design, input, opts, n)?;
        if !next_fit.states.contains(&TermState::Estimated) || next_fit.fitted.len() != n {
            return Ok(Alternation::Unfitted(next_fit));
        }
        fit = next_fit;
        let next = profile_alpha(y, &fit.fitted, w, alpha);
        if (next - alpha).abs() <= 1e-10 * alpha && fit.converged {
            return Ok(Alternation::Fitted(fit, alpha));
        }
        alpha = next;
        if round == opts.max_iter {
            fit.issues.push(FitIssue::NotConverged { iterations: round });
            fit.converged = false;
        }
    }
    if alpha == 0.0 {
        return Ok(Alternation::Boundary);
    }
    Ok(Alternation::Fitted(fit, alpha))
}

/// Alternates bare IRLS runs at fixed alpha (warm-started, on the columns the Poisson fit
/// estimated) with the profile step for alpha until alpha settles; returns alpha and the means.
fn approach(
    design: &Design,
    input: FitInput<'_>,
    opts: FitOptions,
    states: &[TermState],
    start: &[f64],
    mut alpha: f64,
) -> (f64, Vec<f64>) {
    let n = design.n_rows();
    let standard = Standardised::new(design);
    let active: Vec<usize> = (0..states.len())
        .filter(|&j| states[j] == TermState::Estimated)
        .collect();
    let (zeros, ones) = (vec![0.0; n], vec![1.0; n]);
    let offset = input.offset.unwrap_or(&zeros);
    let w = input.weights.unwrap_or(&ones);
    let mut mu = start.to_vec();
    for _ in 0..opts.max_iter {
        if alpha == 0.0 {
            break;
        }
        let family = NegativeBinomial { alpha, warm: Some(&mu) };
        let Some(run) = irls(&family, &standard.x, n, &active, input.y, offset, w, opts, None) else {
            break;
        };
        if run.stalled || run.mu.iter().any(|m| !m.is_finite()) {
            break;
        }
        mu = run.mu;
        let next = profile_alpha_steps(input.y, &mu, w, alpha, 1);
        let settled = (next - alpha).abs() <= 1e-10 * alpha && run.converged;
        alpha = next;
        if settled {
            break;
        }
    }
    (alpha, mu)
}

/// A Poisson fit reported as the NB fit at alpha = 0 (the boundary): same estimates and
/// statistics, alpha 0 without a standard error, the LR test against Poisson 0 with p = 1.
fn at_poisson_boundary(poisson: &GlmFit) -> GlmFit {
    let mut fit = as_negative_binomial(
        poisson.clone(),
        Some(FamilyParameter {
            name: "alpha",
            estimate: 0.0,
            std_error: None,
        }),
    );
    fit.stats.extra.poisson_lr = Some(ScoreTest {
        statistic: 0.0,
        p_value: 1.0,
    });
    fit.stats.null_loglik = poisson.stats.null_loglik;
    fit
}

fn as_negative_binomial(mut fit: GlmFit, parameter: Option<FamilyParameter>) -> GlmFit {
    fit.family = FamilyKind::NegativeBinomial;
    fit.scale = Scale::OwnParameter;
    fit.parameter = parameter;
    fit.stats.extra = FamilyTests::default();
    if parameter.is_some() {
        // alpha counts as a parameter in AIC and BIC.
        let k = (fit.stats.rank + 1) as f64;
        if let Some(l) = fit.stats.loglik {
            fit.stats.aic = Some(-2.0 * l + 2.0 * k);
            fit.stats.bic = Some(-2.0 * l + k * (fit.stats.n_used as f64).ln());
        }
    }
    fit
}

/// The joint observed information of (beta, alpha) at the fit, inverted: coefficient
/// covariances (model and sandwich) and alpha's standard error. Computed on standardised
/// columns and transformed back.
fn joint_covariances(design: &Design, y: &[f64], w: &[f64], alpha: f64, fit: &mut GlmFit) {
    let n = design.n_rows();
    let p = design.n_columns();
    let active: Vec<usize> = (0..p).filter(|&j| fit.states[j] == TermState::Estimated).collect();
    let k = active.len();
    let standard = Standardised::new(design);
    let column = |a: usize| &standard.x[active[a] * n..(active[a] + 1) * n];
    let mut info = DMatrix::<f64>::zeros(k + 1, k + 1);
    let mut meat = DMatrix::<f64>::zeros(k + 1, k + 1);
    let mut score = DVector::<f64>::zeros(k + 1);
    let sums = GammaSums::new(1.0 / alpha, y);
    for i in 0..n {
        let mu = fit.fitted[i];
        if !(mu > 0.0) {
            continue; // rows set aside at the boundary add nothing
        }
        let d = 1.0 + alpha * mu;
        let w_bb = w[i] * mu * (1.0 + alpha * y[i]) / (d * d);
        let w_ba = w[i] * mu * (y[i] - mu) / (d * d);
        let (d1, d2) = alpha_derivatives(y[i], mu, alpha, &sums);
        let s_eta = w[i] * (y[i] - mu) / d;
        for a in 0..k {
            let xa = column(a)[i];
            score[a] = xa * s_eta;
            for b in a..k {
                info[(a, b)] += xa * column(b)[i] * w_bb;
            }
            info[(a, k)] += xa * w_ba;
        }
        info[(k, k)] -= w[i] * d2;
        score[k] = w[i] * d1;
        meat.ger(1.0, &score, &score, 1.0);
    }
    for a in 0..=k {
        for b in 0..a {
            info[(a, b)] = info[(b, a)];
        }
    }
    let Some(inverse) = info.clone().cholesky().map(|c| c.inverse()) else {
        fit.issues.push(FitIssue::NumericalBreakdown);
        fit.parameter = Some(FamilyParameter {
            name: "alpha",
            estimate: alpha,
            std_error: None,
        });
        return;
    };
    let sandwich = &inverse * meat * &inverse;
    let t = standard.back_transform(&active);
    let block = |m: &DMatrix<f64>| &t * m.view((0, 0), (k, k)) * t.transpose();
    let (model, robust) = (block(&inverse), block(&sandwich));
    let mut cov = DMatrix::zeros(p, p);
    let mut cov_sandwich = DMatrix::zeros(p, p);
    for (a, &i) in active.iter().enumerate() {
        for (b, &j) in active.iter().enumerate() {
            cov[(i, j)] = model[(a, b)];
            cov_sandwich[(i, j)] = robust[(a, b)];
        }
    }
    fit.cov_unscaled = cov;
    fit.cov_sandwich = cov_sandwich;
    let variance = inverse[(k, k)];
    fit.parameter = Some(FamilyParameter {
        name: "alpha",
        estimate: alpha,
        std_error: (variance > 0.0).then(|| variance.sqrt()),
    });
}

/// The intercept-only NB model with its own alpha: its deviance is the null deviance and its
/// log-likelihood the base of the model test. Without an intercept there is no such model.
fn null_model(design: &Design, input: FitInput<'_>, opts: FitOptions, fit: &mut GlmFit) -> Result<(), FitError> {
    fit.stats.null_deviance = None;
    fit.stats.null_loglik = None;
    if !design.has_intercept() {
        return Ok(());
    }
    let n = design.n_rows();
    let only = Design::from_columns(n, vec![("intercept".into(), ColumnKind::Intercept, vec![1.0; n])])?;
    let poisson = fit_with_row_count(&Poisson, &only, input, opts, n)?;
    let null = match alternate(&only, input, opts, &poisson)? {
        Alternation::Unfitted(f) | Alternation::Fitted(f, _) => f,
        Alternation::Boundary => poisson,
    };
    fit.stats.null_deviance = null.stats.deviance;
    fit.stats.null_loglik = null.stats.loglik;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn trigamma_meets_its_recurrence_and_known_values() {
        // ψ'(1) = π²/6 and ψ'(1/2) = π²/2 (Abramowitz & Stegun 6.4.2, 6.4.4).
        let pi2 = std::f64::consts::PI.powi(2);
        assert!((trigamma(1.0) - pi2 / 6.0).abs() < 1e-14);
        assert!((trigamma(0.5) - pi2 / 2.0).abs() < 1e-13);
        for x in [0.3, 2.5, 7.9, 40.0, 1e6] {
            let r = trigamma(x) - trigamma(x + 1.0) - 1.0 / (x * x);
            assert!(r.abs() < 1e-13 * trigamma(x), "{x}: {r}");
        }
    }
}
