//! Closed-form rate inference: one rate with its exact interval, and two rates compared.
//!
//! * Garwood (1936) exact Poisson interval for x events: lower = χ²_{α/2}(2x)/2 (0 when x = 0),
//!   upper = χ²_{1-α/2}(2x+2)/2, with α = 1 - level; divided by the exposure for a rate.
//! * Two rates a/T_a and b/T_b: the ratio RR = (a/T_a)/(b/T_b).
//!   - Wald, on the log scale: SE(log RR) = sqrt(1/a + 1/b), interval exp(log RR ± z·SE),
//!     two-sided p-value from z = log RR / SE.
//!   - Exact conditional: given a + b = n, a ~ Binomial(n, π) with π = T_a·RR/(T_a·RR + T_b).
//!     Clopper–Pearson limits for π (Beta quantiles) map to RR = π/(1 - π)·T_b/T_a; the test
//!     of RR = 1 is the two-sided binomial test of π0 = T_a/(T_a + T_b) that sums all outcomes
//!     no more likely than the observed one (relative tolerance 1e-7 on the comparison).

use statrs::distribution::{Beta, Binomial, Continuous, ContinuousCDF, Discrete, DiscreteCDF, Gamma};

use super::distributions::{normal_quantile, normal_sf};
use super::error::FitError;
use super::inference::check_level;

/// A rate with its interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RateInterval {
    pub rate: f64,
    pub low: f64,
    pub high: f64,
}

/// A ratio of two rates with its interval and the p-value of the test of ratio 1.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RatioTest {
    pub ratio: f64,
    pub low: f64,
    pub high: f64,
    pub p_value: f64,
}

/// Exact (Garwood) interval for `events` over `exposure` at `level`.
pub fn rate_interval(events: f64, exposure: f64, level: f64) -> Result<RateInterval, FitError> {
    check_count("events", events)?;
    check_exposure("exposure", exposure)?;
    let alpha = 1.0 - check_level(level)?;
    let low = if events == 0.0 {
        0.0
    } else {
        gamma_quantile(events, alpha / 2.0)
    };
    let high = gamma_quantile(events + 1.0, 1.0 - alpha / 2.0);
    Ok(RateInterval {
        rate: events / exposure,
        low: low / exposure,
        high: high / exposure,
    })
}

/// Wald comparison of a/ta against b/tb on the log scale. Needs a > 0 and b > 0.
pub fn rate_ratio_wald(a: f64, ta: f64, b: f64, tb: f64, level: f64) -> Result<RatioTest, FitError> {
    check_pair(a, ta, b, tb)?;
    let level = check_level(level)?;
    if a == 0.0 || b == 0.0 {
        return Err(FitError::BadSpec(
            "the Wald rate ratio needs at least one event in each group (use the exact method)".into(),
        ));
    }
    let ratio = (a / ta) / (b / tb);
    let se = (1.0 / a + 1.0 / b).sqrt();
    let q = normal_quantile(0.5 + level / 2.0);
    let z = ratio.ln() / se;
    Ok(RatioTest {
        ratio,
        low: (ratio.ln() - q * se).exp(),
        high: (ratio.ln() + q * se).exp(),
        p_value: 2.0 * normal_sf(z.abs()),
    })
}

/// Exact conditional (binomial) comparison of a/ta against b/tb.
pub fn rate_ratio_exact(a: f64, ta: f64, b: f64, tb: f64, level: f64) -> Result<RatioTest, FitError> {
    check_pair(a, ta, b, tb)?;
    let alpha = 1.0 - check_level(level)?;
    if a + b == 0.0 {
        return Err(FitError::BadSpec(
            "the rate ratio is undefined when neither group has an event".into(),
        ));
    }
    let to_ratio = |p: f64| p / (1.0 - p) * tb / ta;
    let p_low = if a == 0.0 {
        0.0
    } else {
        beta_quantile(a, b + 1.0, alpha / 2.0)
    };
    let high = if b == 0.0 {
        f64::INFINITY
    } else {
        to_ratio(beta_quantile(a + 1.0, b, 1.0 - alpha / 2.0))
    };
    Ok(RatioTest {
        ratio: (a / ta) / (b / tb),
        low: to_ratio(p_low),
        high,
        p_value: binomial_two_sided(a as u64, (a + b) as u64, ta / (ta + tb)),
    })
}

/// Two-sided binomial test: the sum of P(X = j) over all j with P(X = j) <= P(X = k).
pub fn binomial_two_sided(k: u64, n: u64, p: f64) -> f64 {
    let dist = Binomial::new(p, n).expect("p in (0, 1)");
    let d = dist.pmf(k) * (1.0 + 1e-7);
    let mean = p * n as f64;
    let at_most = |j: u64| dist.cdf(j);
    let at_least = |j: u64| if j == 0 { 1.0 } else { dist.sf(j - 1) };
    let total = if (k as f64 - mean).abs() < 1e-12 {
        1.0
    } else if (k as f64) < mean {
        // First j above the mean whose probability is <= d (the pmf falls beyond the mode).
        let (mut lo, mut hi) = (mean.ceil() as u64, n + 1);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if dist.pmf(mid) <= d { hi = mid } else { lo = mid + 1 }
        }
        at_most(k) + if lo <= n { at_least(lo) } else { 0.0 }
    } else {
        // Last j below the mean whose probability is <= d.
        let (mut lo, mut hi) = (0u64, mean.floor() as u64 + 1);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if dist.pmf(mid) <= d { lo = mid + 1 } else { hi = mid }
        }
        at_least(k) + if lo > 0 { at_most(lo - 1) } else { 0.0 }
    };
    total.min(1.0)
}

/// Quantile of Gamma(shape, 1) at p: χ²_p(2·shape)/2.
pub(crate) fn gamma_quantile(shape: f64, p: f64) -> f64 {
    let dist = Gamma::new(shape, 1.0).expect("shape > 0");
    polished_quantile(&dist, p, f64::INFINITY)
}

/// Quantile of Beta(a, b) at p.
pub(crate) fn beta_quantile(a: f64, b: f64, p: f64) -> f64 {
    polished_quantile(&Beta::new(a, b).expect("shapes > 0"), p, 1.0)
}

/// The p-quantile of `dist` (support (0, `upper`)): statrs' generic inverse, which stops about
/// 1e-10 short of the root, then a few Newton steps on the tail probability nearer to 0 (cdf
/// below the median, survival function above) to full precision.
fn polished_quantile<D: ContinuousCDF<f64, f64> + Continuous<f64, f64>>(dist: &D, p: f64, upper: f64) -> f64 {
    let mut x = dist.inverse_cdf(p);
    for _ in 0..8 {
        let gap = if p < 0.5 {
            dist.cdf(x) - p
        } else {
            (1.0 - p) - dist.sf(x)
        };
        let step = gap / dist.pdf(x);
        let next = x - step;
        if !step.is_finite() || next <= 0.0 || next >= upper {
            break;
        }
        x = next;
        if step.abs() <= 1e-16 * x {
            break;
        }
    }
    x
}

fn check_count(what: &str, x: f64) -> Result<(), FitError> {
    if x.is_finite() && x >= 0.0 && x.fract() == 0.0 && x < 9.0e15 {
        Ok(())
    } else {
        Err(FitError::BadSpec(format!(
            "{what} must be a whole number of events >= 0, got {x}"
        )))
    }
}

fn check_exposure(what: &str, t: f64) -> Result<(), FitError> {
    if t.is_finite() && t > 0.0 {
        Ok(())
    } else {
        Err(FitError::BadSpec(format!("{what} must be finite and > 0, got {t}")))
    }
}

fn check_pair(a: f64, ta: f64, b: f64, tb: f64) -> Result<(), FitError> {
    check_count("events of the first group", a)?;
    check_exposure("exposure of the first group", ta)?;
    check_count("events of the second group", b)?;
    check_exposure("exposure of the second group", tb)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn refuses_bad_inputs_with_reasons() {
        assert!(
            rate_interval(1.5, 10.0, 0.95)
                .unwrap_err()
                .to_string()
                .contains("whole number")
        );
        assert!(rate_interval(1.0, 0.0, 0.95).unwrap_err().to_string().contains("> 0"));
        assert!(rate_interval(1.0, 1.0, 1.0).unwrap_err().to_string().contains("level"));
        assert!(rate_ratio_wald(0.0, 1.0, 3.0, 1.0, 0.95).is_err());
        assert!(rate_ratio_exact(0.0, 1.0, 0.0, 1.0, 0.95).is_err());
    }

    #[test]
    fn exact_ratio_with_no_events_in_one_group_has_an_open_limit() {
        let r = rate_ratio_exact(4.0, 10.0, 0.0, 10.0, 0.95).unwrap();
        assert!(r.high.is_infinite() && r.low > 0.0 && r.ratio.is_infinite());
        let r = rate_ratio_exact(0.0, 10.0, 4.0, 10.0, 0.95).unwrap();
        assert_eq!((r.ratio, r.low), (0.0, 0.0));
        assert!(r.high.is_finite());
    }
}
