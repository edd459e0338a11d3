//! The overdispersion test of Poisson fits: Cameron & Trivedi (1990), "Regression-based tests
//! for overdispersion in the Poisson model", J. Econometrics 46:347-364.

use super::distributions::normal_sf;

/// A score test statistic with its p-value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoreTest {
    pub statistic: f64,
    pub p_value: f64,
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
        p_value: normal_sf(t),
    })
}
