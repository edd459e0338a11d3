//! Standardised rates: direct standardisation with gamma intervals, indirect standardisation
//! (observed / expected) with the exact Poisson interval, and the ratio of two direct rates.
//!
//! **Direct** (Fay & Feuer 1997, notation of that paper). Strata j = 1..J of one area: x_j
//! events (Poisson), n_j exposure, standard weights s_j normalised over the area's strata to
//! w̃_j = s_j / Σ s; the per-stratum multipliers are w_j = w̃_j / n_j. The directly standardised
//! rate is y = Σ w_j x_j with variance estimate v = Σ w_j² x_j. Fay–Feuer treat the rate as a
//! gamma variable with mean y and variance v:
//!
//! * lower = G⁻¹(α/2; y²/v, v/y) (0 when y = 0),
//! * upper = G⁻¹(1-α/2; y*²/v*, v*/y*) with y* = y + w_M, v* = v + w_M², w_M = max_j w_j,
//!
//! where G⁻¹(p; shape, scale) is the gamma quantile and α = 1 - level.
//! Tiwari, Clegg & Zou (2006) keep the lower limit and shift the upper one by the strata's
//! means instead of the maximum: y* = y + (1/J) Σ w_j, v* = v + (1/J) Σ w_j².
//! With one stratum both reduce to the Garwood interval x/n scaled by the weight (tested).
//!
//! **Ratio of two direct rates.** Each rate's gamma distribution above is read as a confidence
//! distribution for the true rate, so the true ratio θ1/θ2 is distributed as
//! (y1/y2)·F(2a1, 2a2) with shapes a = y²/v. The conservative limits shift the side that widens:
//! lower = (y1/y2*)·F⁻¹(α/2; 2a1, 2a2*), upper = (y1*/y2)·F⁻¹(1-α/2; 2a1*, 2a2), starred
//! moments as in the rate's own upper limit. With one stratum per area this is exactly the
//! exact conditional (Clopper–Pearson) interval for a ratio of two Poisson rates (tested).
//!
//! **Indirect.** Observed O = Σ x_j, expected E = Σ n_j·r_j from reference rates r_j (or given
//! directly). Ratio O/E (SMR/SIR) with the Garwood interval G⁻¹(α/2; O, 1)/E (0 when O = 0),
//! G⁻¹(1-α/2; O+1, 1)/E, and the exact two-sided p-value of ratio 1:
//! min(1, 2·min(P(X ≤ O), P(X ≥ O))) with X ~ Poisson(E).

use statrs::function::gamma::{gamma_lr, gamma_ur};

use super::closed_form::{beta_quantile, gamma_quantile};

/// How the upper limit of a direct rate is widened.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GammaShift {
    /// Fay & Feuer (1997): by the largest per-stratum multiplier.
    FayFeuer,
    /// Tiwari, Clegg & Zou (2006): by the mean multiplier and the mean squared multiplier.
    Tiwari,
}

impl GammaShift {
    pub fn name(self) -> &'static str {
        match self {
            GammaShift::FayFeuer => "fay_feuer",
            GammaShift::Tiwari => "tiwari",
        }
    }

    pub fn parse(s: &str) -> Option<GammaShift> {
        match s.to_ascii_lowercase().as_str() {
            "fay_feuer" => Some(GammaShift::FayFeuer),
            "tiwari" => Some(GammaShift::Tiwari),
            _ => None,
        }
    }
}

/// Running sums of one area's strata, enough for the rate, both intervals and merging.
/// With S = Σ s_j every reported quantity is a sum divided by a power of S.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct StrataSums {
    pub n_strata: u64,
    /// Σ s_j.
    pub weight: f64,
    /// Σ s_j x_j / n_j.
    pub weighted_rate: f64,
    /// Σ s_j² x_j / n_j².
    pub weighted_variance: f64,
    /// max s_j / n_j.
    pub max_multiplier: f64,
    /// Σ s_j / n_j.
    pub multiplier_sum: f64,
    /// Σ (s_j / n_j)².
    pub multiplier_square_sum: f64,
    /// Σ x_j.
    pub events: f64,
    /// Σ n_j.
    pub exposure: f64,
}

impl StrataSums {
    pub fn new() -> StrataSums {
        StrataSums::default()
    }

    /// Adds one stratum. The caller has checked x >= 0, n > 0, s >= 0, all finite.
    pub fn add(&mut self, x: f64, n: f64, s: f64) {
        let m = s / n;
        self.n_strata += 1;
        self.weight += s;
        self.weighted_rate += m * x;
        self.weighted_variance += m * m * x;
        self.max_multiplier = self.max_multiplier.max(m);
        self.multiplier_sum += m;
        self.multiplier_square_sum += m * m;
        self.events += x;
        self.exposure += n;
    }

    pub fn merge(&mut self, o: &StrataSums) {
        self.n_strata += o.n_strata;
        self.weight += o.weight;
        self.weighted_rate += o.weighted_rate;
        self.weighted_variance += o.weighted_variance;
        self.max_multiplier = self.max_multiplier.max(o.max_multiplier);
        self.multiplier_sum += o.multiplier_sum;
        self.multiplier_square_sum += o.multiplier_square_sum;
        self.events += o.events;
        self.exposure += o.exposure;
    }

    /// The rate's gamma moments (y, v) and its shifted moments (y*, v*) for `shift`; `None`
    /// when the area has no strata or zero total weight.
    pub fn moments(&self, shift: GammaShift) -> Option<GammaMoments> {
        if self.n_strata == 0 || !(self.weight > 0.0) {
            return None;
        }
        let s = self.weight;
        let j = self.n_strata as f64;
        let (dy, dv) = match shift {
            GammaShift::FayFeuer => (self.max_multiplier / s, (self.max_multiplier / s).powi(2)),
            GammaShift::Tiwari => (self.multiplier_sum / (j * s), self.multiplier_square_sum / (j * s * s)),
        };
        Some(GammaMoments {
            mean: self.weighted_rate / s,
            variance: self.weighted_variance / (s * s),
            shift_mean: dy,
            shift_variance: dv,
        })
    }
}

/// A direct rate as a gamma variable: mean y, variance v, and the shift (Δy, Δv) its upper
/// limit adds (y* = y + Δy, v* = v + Δv).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GammaMoments {
    pub mean: f64,
    pub variance: f64,
    pub shift_mean: f64,
    pub shift_variance: f64,
}

impl GammaMoments {
    /// The same rate per `per` units of exposure (every moment scales with it).
    pub fn scaled(self, per: f64) -> GammaMoments {
        GammaMoments {
            mean: self.mean * per,
            variance: self.variance * per * per,
            shift_mean: self.shift_mean * per,
            shift_variance: self.shift_variance * per * per,
        }
    }

    fn shifted(self) -> (f64, f64) {
        (self.mean + self.shift_mean, self.variance + self.shift_variance)
    }

    /// The gamma interval at `level` (Fay–Feuer form; see the module doc).
    pub fn interval(self, level: f64) -> (f64, f64) {
        let alpha = 1.0 - level;
        let (y, v) = (self.mean, self.variance);
        let low = if y > 0.0 {
            gamma_quantile(y * y / v, alpha / 2.0) * v / y
        } else {
            0.0
        };
        let (ys, vs) = self.shifted();
        let high = gamma_quantile(ys * ys / vs, 1.0 - alpha / 2.0) * vs / ys;
        (low, high)
    }
}

/// The ratio of two direct rates with its F interval (module doc). `None` for the ratio when
/// the denominator rate is 0; the upper limit is then infinite.
pub fn direct_rate_ratio(num: GammaMoments, den: GammaMoments, level: f64) -> RatioInterval {
    let alpha = 1.0 - level;
    let shape = |y: f64, v: f64| y * y / v;
    let (y1s, v1s) = num.shifted();
    let (y2s, v2s) = den.shifted();
    let low = if num.mean > 0.0 {
        num.mean / y2s * f_quantile(alpha / 2.0, 2.0 * shape(num.mean, num.variance), 2.0 * shape(y2s, v2s))
    } else {
        0.0
    };
    let high = if den.mean > 0.0 {
        y1s / den.mean
            * f_quantile(
                1.0 - alpha / 2.0,
                2.0 * shape(y1s, v1s),
                2.0 * shape(den.mean, den.variance),
            )
    } else {
        f64::INFINITY
    };
    RatioInterval {
        ratio: if den.mean > 0.0 {
            Some(num.mean / den.mean)
        } else {
            None
        },
        low,
        high,
    }
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RatioInterval {
    pub ratio: Option<f64>,
    pub low: f64,
    pub high: f64,
}

/// Observed over expected with the Garwood interval and the exact two-sided p-value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IndirectRatio {
    pub ratio: f64,
    pub low: f64,
    pub high: f64,
    /// `None` when the observed count is not a whole number (the Poisson tail needs one).
    pub p_value: Option<f64>,
}

/// O/E at `level`. Needs O >= 0 and E > 0 (the caller reports other cases).
pub fn indirect_ratio(observed: f64, expected: f64, level: f64) -> IndirectRatio {
    let alpha = 1.0 - level;
    let low = if observed > 0.0 {
        gamma_quantile(observed, alpha / 2.0) / expected
    } else {
        0.0
    };
    let high = gamma_quantile(observed + 1.0, 1.0 - alpha / 2.0) / expected;
    IndirectRatio {
        ratio: observed / expected,
        low,
        high,
        p_value: (observed.fract() == 0.0).then(|| poisson_two_sided(observed, expected)),
    }
}

/// min(1, 2·min(P(X ≤ o), P(X ≥ o))) for X ~ Poisson(mean), o a whole number >= 0.
pub fn poisson_two_sided(o: f64, mean: f64) -> f64 {
    (2.0 * poisson_at_most(o, mean).min(poisson_at_least(o, mean))).min(1.0)
}

/// P(X ≤ k) for X ~ Poisson(mean), k whole: Q(k+1, mean), the regularised upper incomplete
/// gamma (0 for k < 0). With [`poisson_at_least`], the Poisson tails behind both the exact
/// p-value and the funnel limits.
pub fn poisson_at_most(k: f64, mean: f64) -> f64 {
    if k < 0.0 { 0.0 } else { gamma_ur(k + 1.0, mean) }
}

/// P(X ≥ k) = 1 - P(X ≤ k-1) for X ~ Poisson(mean), k whole: P(k, mean), the regularised
/// lower incomplete gamma (computed directly, so small upper tails keep their digits).
pub fn poisson_at_least(k: f64, mean: f64) -> f64 {
    if k <= 0.0 { 1.0 } else { gamma_lr(k, mean) }
}

/// The funnel plot's control limit for an observed/expected ratio at tail probability `p`
/// (for example 0.025 or 0.975) when E = `expected`: the p-quantile r of Poisson(E) (the
/// smallest whole r with P(X ≤ r) ≥ p), moved down by the interpolation
/// a = (P(X ≤ r) - p) / (P(X = r)) so that the limit is continuous in E, divided by E:
/// (r - a) / E, and never below 0 (for small E the interpolation at r = 0 would give a negative
/// ratio). Spiegelhalter (2005, Statistics in Medicine 24:1185-1202; from memory).
pub fn funnel_limit(expected: f64, p: f64) -> f64 {
    // Start near the normal approximation and walk to the quantile.
    let z = super::distributions::normal_quantile(p);
    let mut r = (expected + z * expected.sqrt()).floor().max(0.0);
    while r > 0.0 && poisson_at_most(r - 1.0, expected) >= p {
        r -= 1.0;
    }
    while poisson_at_most(r, expected) < p {
        r += 1.0;
    }
    let at_r = poisson_at_most(r, expected);
    let below = poisson_at_most(r - 1.0, expected);
    let a = (at_r - p) / (at_r - below);
    // At r = 0 the interpolation runs below zero counts; a ratio's limit stops at 0.
    ((r - a) / expected).max(0.0)
}

/// The multiplicative overdispersion factor of a funnel plot: φ = mean of the squared
/// z-scores z = (O - E) / sqrt(E), with the z-scores Winsorised at their 10th and 90th
/// percentiles (Spiegelhalter 2005; the 10% is that paper's suggestion, from memory).
/// Limits widen as 1 + (limit - 1)·sqrt(φ) when φ > 1; `None` with fewer than 3 areas.
pub fn funnel_overdispersion(points: &[(f64, f64)]) -> Option<f64> {
    let mut z: Vec<f64> = points
        .iter()
        .filter(|(_, e)| *e > 0.0)
        .map(|(o, e)| (o - e) / e.sqrt())
        .collect();
    if z.len() < 3 {
        return None;
    }
    let mut sorted = z.clone();
    sorted.sort_by(f64::total_cmp);
    let at = |q: f64| sorted[((q * (sorted.len() - 1) as f64).round()) as usize];
    let (low, high) = (at(0.1), at(0.9));
    for v in &mut z {
        *v = v.clamp(low, high);
    }
    Some(z.iter().map(|v| v * v).sum::<f64>() / z.len() as f64)
}

/// Quantile of F(d1, d2) at p, through Beta(d1/2, d2/2): F = d2·B / (d1·(1 - B)).
fn f_quantile(p: f64, d1: f64, d2: f64) -> f64 {
    let b = beta_quantile(d1 / 2.0, d2 / 2.0, p);
    d2 * b / (d1 * (1.0 - b))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::glm::closed_form::{rate_interval, rate_ratio_exact};

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs().max(1e-300)
    }

    /// One stratum: the direct rate is the crude rate and its interval the Garwood one, for
    /// both shifts (module doc identity).
    #[test]
    fn one_stratum_gives_the_garwood_interval() {
        for (x, n) in [(0.0, 120.0), (3.0, 40.0), (57.0, 1e4)] {
            let mut s = StrataSums::new();
            s.add(x, n, 2.5);
            let g = rate_interval(x, n, 0.95).unwrap();
            for shift in [GammaShift::FayFeuer, GammaShift::Tiwari] {
                let m = s.moments(shift).unwrap();
                let (low, high) = m.interval(0.95);
                assert!(close(m.mean, x / n, 1e-14));
                assert!(
                    close(low, g.low, 1e-10) || (low == 0.0 && g.low == 0.0),
                    "{low} {}",
                    g.low
                );
                assert!(close(high, g.high, 1e-10), "{high} {}", g.high);
            }
        }
    }

    /// One stratum per area: the F interval is the exact conditional interval.
    #[test]
    fn one_stratum_each_gives_the_exact_conditional_ratio_interval() {
        for (a, ta, b, tb) in [(4.0, 100.0, 9.0, 150.0), (0.0, 50.0, 3.0, 20.0), (12.0, 7.0, 1.0, 9.0)] {
            let (mut s1, mut s2) = (StrataSums::new(), StrataSums::new());
            s1.add(a, ta, 1.0);
            s2.add(b, tb, 1.0);
            let r = direct_rate_ratio(
                s1.moments(GammaShift::FayFeuer).unwrap(),
                s2.moments(GammaShift::FayFeuer).unwrap(),
                0.95,
            );
            let e = rate_ratio_exact(a, ta, b, tb, 0.95).unwrap();
            assert!(
                close(r.low, e.low, 1e-9) || (r.low == 0.0 && e.low == 0.0),
                "{} {}",
                r.low,
                e.low
            );
            assert!(close(r.high, e.high, 1e-9), "{} {}", r.high, e.high);
        }
    }

    #[test]
    fn merging_is_adding_strata() {
        let strata = [(3.0, 10.0, 1.0), (0.0, 4.0, 2.0), (7.0, 30.0, 0.5), (1.0, 2.0, 3.0)];
        let mut all = StrataSums::new();
        strata.iter().for_each(|&(x, n, s)| all.add(x, n, s));
        let (mut a, mut b) = (StrataSums::new(), StrataSums::new());
        strata[..2].iter().for_each(|&(x, n, s)| a.add(x, n, s));
        strata[2..].iter().for_each(|&(x, n, s)| b.add(x, n, s));
        a.merge(&b);
        let (m, n) = (
            all.moments(GammaShift::Tiwari).unwrap(),
            a.moments(GammaShift::Tiwari).unwrap(),
        );
        assert!(close(m.mean, n.mean, 1e-15) && close(m.shift_variance, n.shift_variance, 1e-15));
    }

    #[test]
    fn poisson_tails_at_the_edges() {
        assert_eq!(poisson_two_sided(0.0, 0.1), (2.0 * (-0.1f64).exp()).min(1.0));
        assert!(close(poisson_two_sided(0.0, 3.0), 2.0 * (-3.0f64).exp(), 1e-14));
        assert!(poisson_two_sided(1e6, 1e6) <= 1.0);
    }
}
