//! Exponential-family distributions with their link functions.
//!
//! The solver, the inference and the SQL layer only see this trait: a family states its
//! variance, deviance and log-likelihood, how its scale is handled ([`Scale`], which also fixes
//! the reference distribution of its tests), whether its fits can run on covariate-pattern sums,
//! and its own extra statistics. Formulas follow McCullagh & Nelder, *Generalized Linear
//! Models* (2nd ed., 1989), ch. 2: working weight w·(dmu/deta)²/V(mu) and working response
//! eta - offset + (y - mu)·deta/dmu.

use statrs::function::gamma::ln_gamma;

use super::overdispersion::{ScoreTest, cameron_trivedi};

/// Statistics a family adds to its fits (all `None` for families without them).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct FamilyTests {
    /// Negative binomial: the likelihood-ratio test of alpha = 0 (Poisson) on the same rows,
    /// 2 (loglik_NB - loglik_Poisson), with the boundary p-value 0.5 P(chi²_1 >= t) (1 at t = 0).
    pub poisson_lr: Option<ScoreTest>,
    /// Poisson: Cameron & Trivedi (1990) auxiliary-regression test of Var(y) = mu against
    /// Var(y) = mu + alpha·mu², the t statistic of alpha and its one-sided p-value (alpha > 0).
    pub overdispersion: Option<ScoreTest>,
}

/// Which family a fit is of: the typed form of its name.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum FamilyKind {
    Poisson,
    Gaussian,
    NegativeBinomial,
}

impl FamilyKind {
    pub const ALL: [FamilyKind; 3] = [FamilyKind::Poisson, FamilyKind::Gaussian, FamilyKind::NegativeBinomial];

    /// The name reported in the `family` field.
    pub fn name(self) -> &'static str {
        match self {
            FamilyKind::Poisson => "poisson",
            FamilyKind::Gaussian => "gaussian",
            FamilyKind::NegativeBinomial => "negative binomial",
        }
    }

    pub fn parse(name: &str) -> Option<FamilyKind> {
        FamilyKind::ALL.into_iter().find(|k| k.name() == name)
    }

    /// The family itself, for its properties (fits dispatch on the kind to stay monomorphic).
    pub fn family(self) -> &'static dyn Family {
        match self {
            FamilyKind::Poisson => &Poisson,
            FamilyKind::Gaussian => &Gaussian,
            FamilyKind::NegativeBinomial => &super::negbin::NB_PROPERTIES,
        }
    }
}

/// How a family's dispersion is handled; it decides the reference distribution of Wald
/// intervals and of the model test, and whether goodness-of-fit tests exist.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    /// Fixed at 1 (Poisson): z intervals, likelihood-ratio chi-square model test, deviance and
    /// Pearson goodness-of-fit p-values.
    Fixed,
    /// Estimated from the residuals (least squares): t intervals on df_resid, F model test, no
    /// goodness-of-fit p-values.
    Estimated,
    /// A parameter of the family estimated with the coefficients by maximum likelihood (such as
    /// a negative binomial shape): z intervals and likelihood-ratio tests, no goodness-of-fit
    /// p-values.
    OwnParameter,
}

impl Scale {
    /// Whether Wald statistics are referred to Student t on df_resid (else the standard normal).
    pub fn uses_t(self) -> bool {
        self == Scale::Estimated
    }

    /// Whether the deviance and Pearson X² have a chi-square reference (goodness of fit).
    pub fn has_gof_tests(self) -> bool {
        self == Scale::Fixed
    }
}

/// A response distribution and its link.
pub trait Family: Sync {
    fn kind(&self) -> FamilyKind;
    /// Short lower-case name (`poisson`, `gaussian`).
    fn name(&self) -> &'static str {
        self.kind().name()
    }
    fn scale(&self) -> Scale;
    /// Whether fits of this family may run on covariate-pattern sums (see `collapse`): true
    /// when the likelihood depends on a pattern's rows only through sums it keeps.
    fn collapsible(&self) -> bool {
        false
    }
    /// Whether a large fit should start from a fit on a subsample of its rows
    /// (`irls::warm_start`): false when IRLS is a single solve (identity link, constant
    /// variance) or the family brings its own start (the negative binomial's warm means).
    fn subsample_start(&self) -> bool {
        true
    }
    /// The family's own statistics of a fit with means `mu` (Poisson: the overdispersion test);
    /// `rows` is the number of rows the fit stands for.
    fn extra_tests(&self, y: &[f64], mu: &[f64], weights: Option<&[f64]>, rows: usize) -> FamilyTests {
        let _ = (y, mu, weights, rows);
        FamilyTests::default()
    }
    /// Why `y` is not an acceptable response, if it is not.
    fn check_response(&self, y: f64) -> Option<&'static str>;
    /// Starting fitted means for IRLS.
    fn start(&self, y: &[f64], offset: &[f64], w: &[f64], mu: &mut [f64]);
    /// Fitted means of the null model (intercept plus offset, or offset alone).
    /// `exposure` is exp(offset), computed once per fit by the caller.
    fn null_fitted(&self, y: &[f64], offset: &[f64], exposure: &[f64], w: &[f64], intercept: bool, mu: &mut [f64]);
    fn link(&self, mu: f64) -> f64;
    fn inverse_link(&self, eta: f64) -> f64;
    /// dmu/deta at `eta`.
    fn mu_eta(&self, eta: f64) -> f64;
    /// dmu/deta at `eta` when `mu` = inverse_link(eta) is already known (for the log link it
    /// is mu itself, which saves an exp per row and iteration).
    fn mu_eta_at(&self, eta: f64, mu: f64) -> f64 {
        let _ = mu;
        self.mu_eta(eta)
    }
    /// Variance function V(mu).
    fn variance(&self, mu: f64) -> f64;
    /// Unit deviance d(y, mu) (the deviance is the weighted sum of these).
    fn unit_deviance(&self, y: f64, mu: f64) -> f64;
    /// Full log-likelihood of the fit (constants included).
    fn log_likelihood(&self, y: &[f64], mu: &[f64], w: &[f64]) -> f64;
    /// [`Family::log_likelihood`] when the linear predictor `eta` of `mu` is known too (for the
    /// log link log mu = eta, which saves a logarithm per row).
    fn log_likelihood_at(&self, y: &[f64], eta: &[f64], mu: &[f64], w: &[f64]) -> f64 {
        let _ = eta;
        self.log_likelihood(y, mu, w)
    }
    /// The linear predictor of the null model's means ([`Family::null_fitted`]), when the family
    /// gives it without a logarithm per row.
    fn null_linear_predictor(
        &self,
        y: &[f64],
        offset: &[f64],
        exposure: &[f64],
        w: &[f64],
        intercept: bool,
    ) -> Option<Vec<f64>> {
        let _ = (y, offset, exposure, w, intercept);
        None
    }
    /// The part of the deviance that does not depend on the fit, computed once per fit for
    /// [`Family::step_deviance`].
    fn deviance_constant(&self, y: &[f64], w: &[f64]) -> f64 {
        let _ = (y, w);
        0.0
    }
    /// The deviance at linear predictor `eta` (offset included) and means `mu`, for step
    /// control inside IRLS; `constant` is [`Family::deviance_constant`]. The reported deviance
    /// is always the sum of unit deviances.
    fn step_deviance(&self, y: &[f64], eta: &[f64], mu: &[f64], w: &[f64], constant: f64) -> f64 {
        let _ = (eta, constant);
        y.iter()
            .zip(mu)
            .zip(w)
            .map(|((&y, &m), &w)| w * self.unit_deviance(y, m))
            .sum()
    }
    /// Number of estimated parameters besides the coefficients counted in AIC and BIC (1 for a
    /// family parameter; least-squares programs do not count the residual variance).
    fn extra_parameters(&self) -> usize {
        usize::from(self.scale() == Scale::OwnParameter)
    }
    /// Whether fitted means can run off to the edge of their range (zero-count cells).
    fn has_boundary(&self) -> bool;
}

/// Poisson with log link: log mu = offset + x'b, V(mu) = mu.
#[derive(Debug, Clone, Copy, Default)]
pub struct Poisson;

impl Family for Poisson {
    fn kind(&self) -> FamilyKind {
        FamilyKind::Poisson
    }
    fn scale(&self) -> Scale {
        Scale::Fixed
    }
    fn collapsible(&self) -> bool {
        true
    }
    /// The Cameron & Trivedi (1990) overdispersion test (unweighted fits only).
    fn extra_tests(&self, y: &[f64], mu: &[f64], weights: Option<&[f64]>, rows: usize) -> FamilyTests {
        FamilyTests {
            overdispersion: weights.is_none().then(|| cameron_trivedi(y, mu, rows)).flatten(),
            ..FamilyTests::default()
        }
    }
    fn check_response(&self, y: f64) -> Option<&'static str> {
        if !y.is_finite() {
            Some("counts must be finite")
        } else if y < 0.0 {
            Some("counts must be >= 0")
        } else {
            None
        }
    }
    /// mu0 = (y + E·r)/2 with E = exp(offset) and r = Σwy/ΣwE the crude rate: a blend of the data
    /// and the null model that respects the exposure (plain (y + ȳ)/2 ignores it).
    fn start(&self, y: &[f64], offset: &[f64], w: &[f64], mu: &mut [f64]) {
        for (m, o) in mu.iter_mut().zip(offset) {
            *m = o.exp();
        }
        let rate = crude_rate(y, mu, w);
        for i in 0..y.len() {
            mu[i] = 0.5 * (y[i] + mu[i] * rate).max(f64::MIN_POSITIVE);
        }
    }
    /// mu_i = E_i·Σwy/ΣwE with an intercept, mu_i = E_i without.
    fn null_fitted(&self, y: &[f64], _offset: &[f64], exposure: &[f64], w: &[f64], intercept: bool, mu: &mut [f64]) {
        let rate = if intercept { crude_rate(y, exposure, w) } else { 1.0 };
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
        mu
    }
    /// d(y, mu) = 2·(y·log(y/mu) - (y - mu)), with 0·log 0 = 0.
    fn unit_deviance(&self, y: f64, mu: f64) -> f64 {
        2.0 * (xlogy_ratio(y, mu) - (y - mu))
    }
    /// Σ w·(y·log mu - mu - log Γ(y+1)); non-integer y is allowed (quasi-likelihood use).
    fn log_likelihood(&self, y: &[f64], mu: &[f64], w: &[f64]) -> f64 {
        y.iter()
            .zip(mu)
            .zip(w)
            .map(|((&y, &m), &w)| w * (xlogy(y, m) - m - log_factorial(y)))
            .sum()
    }
    /// Σ w·(y·eta - mu - log Γ(y+1)), the same sum with log mu = eta.
    fn log_likelihood_at(&self, y: &[f64], eta: &[f64], mu: &[f64], w: &[f64]) -> f64 {
        (0..y.len())
            .map(|i| {
                let y_eta = if y[i] == 0.0 { 0.0 } else { y[i] * eta[i] };
                w[i] * (y_eta - mu[i] - log_factorial(y[i]))
            })
            .sum()
    }
    /// log(E_i·r) = offset_i + log r, r the crude rate (1 without an intercept).
    fn null_linear_predictor(
        &self,
        y: &[f64],
        offset: &[f64],
        exposure: &[f64],
        w: &[f64],
        intercept: bool,
    ) -> Option<Vec<f64>> {
        let log_rate = if intercept {
            crude_rate(y, exposure, w).ln()
        } else {
            0.0
        };
        Some(offset.iter().map(|o| o + log_rate).collect())
    }
    /// Σ w·y·log y.
    fn deviance_constant(&self, y: &[f64], w: &[f64]) -> f64 {
        y.iter().zip(w).map(|(&y, &w)| w * y_log_y(y)).sum()
    }
    /// With log mu = eta: D = 2·Σ w·(y·log y - y·eta - y + mu), without a logarithm per row.
    /// A positive count whose mean underflowed to 0 makes the step unacceptable (infinite), as
    /// the unit deviance does.
    fn step_deviance(&self, y: &[f64], eta: &[f64], mu: &[f64], w: &[f64], constant: f64) -> f64 {
        let mut sum = 0.0;
        let mut lost = false;
        for i in 0..y.len() {
            sum += w[i] * (mu[i] - y[i] * (eta[i] + 1.0));
            lost |= mu[i] == 0.0 && y[i] > 0.0;
        }
        if lost { f64::INFINITY } else { 2.0 * (constant + sum) }
    }
    fn has_boundary(&self) -> bool {
        true
    }
}

/// Gaussian with identity link: mu = offset + x'b, V(mu) = 1 (weighted least squares).
#[derive(Debug, Clone, Copy, Default)]
pub struct Gaussian;

impl Family for Gaussian {
    fn kind(&self) -> FamilyKind {
        FamilyKind::Gaussian
    }
    fn subsample_start(&self) -> bool {
        false
    }
    fn scale(&self) -> Scale {
        Scale::Estimated
    }
    fn check_response(&self, y: f64) -> Option<&'static str> {
        (!y.is_finite()).then_some("values must be finite")
    }
    fn start(&self, y: &[f64], _offset: &[f64], _w: &[f64], mu: &mut [f64]) {
        mu.copy_from_slice(y);
    }
    fn null_fitted(&self, y: &[f64], offset: &[f64], _exposure: &[f64], w: &[f64], intercept: bool, mu: &mut [f64]) {
        let shift = if intercept {
            let sw: f64 = w.iter().sum();
            y.iter().zip(offset).zip(w).map(|((y, o), w)| w * (y - o)).sum::<f64>() / sw
        } else {
            0.0
        };
        for (m, o) in mu.iter_mut().zip(offset) {
            *m = o + shift;
        }
    }
    fn link(&self, mu: f64) -> f64 {
        mu
    }
    fn inverse_link(&self, eta: f64) -> f64 {
        eta
    }
    fn mu_eta(&self, _eta: f64) -> f64 {
        1.0
    }
    fn variance(&self, _mu: f64) -> f64 {
        1.0
    }
    fn unit_deviance(&self, y: f64, mu: f64) -> f64 {
        (y - mu) * (y - mu)
    }
    /// Normal log-likelihood at the ML variance σ̂² = Σw(y-mu)²/n:
    /// -n/2·(log(2π σ̂²) + 1) + ½ Σ log w (the form ordinary least-squares programs report).
    fn log_likelihood(&self, y: &[f64], mu: &[f64], w: &[f64]) -> f64 {
        let n = y.len() as f64;
        let rss: f64 = y.iter().zip(mu).zip(w).map(|((y, m), w)| w * (y - m) * (y - m)).sum();
        let log_w: f64 = w.iter().map(|w| w.ln()).sum();
        -0.5 * n * ((2.0 * std::f64::consts::PI * rss / n).ln() + 1.0) + 0.5 * log_w
    }
    fn has_boundary(&self) -> bool {
        false
    }
}

/// Σwy / Σw·E, with E = exp(offset) the exposure.
pub(crate) fn crude_rate(y: &[f64], exposure: &[f64], w: &[f64]) -> f64 {
    let (mut sy, mut se) = (0.0, 0.0);
    for i in 0..y.len() {
        sy += w[i] * y[i];
        se += w[i] * exposure[i];
    }
    sy / se
}

/// ln Γ(y+1) and y·ln y for the small whole counts that make up most rows.
struct SmallCounts {
    log_factorial: [f64; SMALL_COUNTS],
    y_log_y: [f64; SMALL_COUNTS],
}

const SMALL_COUNTS: usize = 256;

static SMALL: std::sync::LazyLock<SmallCounts> = std::sync::LazyLock::new(|| {
    let mut t = SmallCounts {
        log_factorial: [0.0; SMALL_COUNTS],
        y_log_y: [0.0; SMALL_COUNTS],
    };
    for k in 0..SMALL_COUNTS {
        let y = k as f64;
        t.log_factorial[k] = ln_gamma(y + 1.0);
        t.y_log_y[k] = xlogy(y, y);
    }
    t
});

/// The table index of a small whole count.
fn small(y: f64) -> Option<usize> {
    (y >= 0.0 && y < SMALL_COUNTS as f64 && y.fract() == 0.0).then_some(y as usize)
}

/// ln Γ(y+1) (ln y! for whole y), from a table for whole y below 256.
pub(crate) fn log_factorial(y: f64) -> f64 {
    small(y).map_or_else(|| ln_gamma(y + 1.0), |k| SMALL.log_factorial[k])
}

/// y·ln y with 0·ln 0 = 0, from a table for whole y below 256.
pub(crate) fn y_log_y(y: f64) -> f64 {
    small(y).map_or_else(|| xlogy(y, y), |k| SMALL.y_log_y[k])
}

/// y·log(mu), with 0·log(anything) = 0.
pub(crate) fn xlogy(y: f64, mu: f64) -> f64 {
    if y == 0.0 { 0.0 } else { y * mu.ln() }
}

/// y·log(y/mu), with 0·log 0 = 0.
pub(crate) fn xlogy_ratio(y: f64, mu: f64) -> f64 {
    if y == 0.0 { 0.0 } else { y * (y / mu).ln() }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The log-likelihood from the linear predictor (no logarithm per row) equals the one from
    /// the means, for a fit's means and for the null model's, with and without an intercept.
    #[test]
    fn poisson_log_likelihood_from_eta_matches_the_one_from_mu() {
        let y = [0.0, 3.0, 1.0, 0.0, 7.0, 2.0, 12.0, 0.0];
        let offset: Vec<f64> = [0.5, 2.0, 1.5, 0.2, 4.0, 1.0, 9.0, 3.0]
            .iter()
            .map(|e: &f64| e.ln())
            .collect();
        let w = [1.0, 2.0, 1.0, 0.5, 1.0, 1.0, 3.0, 1.0];
        let exposure: Vec<f64> = offset.iter().map(|o| o.exp()).collect();
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-13 * b.abs();
        let eta: Vec<f64> = offset
            .iter()
            .enumerate()
            .map(|(i, o)| o + 0.3 - 0.05 * i as f64)
            .collect();
        let mu: Vec<f64> = eta.iter().map(|e| e.exp()).collect();
        let (a, b) = (
            Poisson.log_likelihood_at(&y, &eta, &mu, &w),
            Poisson.log_likelihood(&y, &mu, &w),
        );
        assert!(close(a, b), "{a} vs {b}");
        for intercept in [true, false] {
            let mut null_mu = vec![0.0; y.len()];
            Poisson.null_fitted(&y, &offset, &exposure, &w, intercept, &mut null_mu);
            let null_eta = Poisson
                .null_linear_predictor(&y, &offset, &exposure, &w, intercept)
                .unwrap();
            let (a, b) = (
                Poisson.log_likelihood_at(&y, &null_eta, &null_mu, &w),
                Poisson.log_likelihood(&y, &null_mu, &w),
            );
            assert!(close(a, b), "intercept {intercept}: {a} vs {b}");
        }
    }
}
