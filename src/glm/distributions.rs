//! Tail probabilities and quantiles of the reference distributions the tests use (standard
//! normal, Student t, chi-square, F), from statrs. Every caller in the core goes through these,
//! so a p-value is computed the same way everywhere.

use statrs::distribution::{ChiSquared, ContinuousCDF, FisherSnedecor, Normal, StudentsT};

/// P(Z > z) for a standard normal Z (through erfc, accurate far into the tail).
pub fn normal_sf(z: f64) -> f64 {
    0.5 * statrs::function::erf::erfc(z / std::f64::consts::SQRT_2)
}

/// The standard normal quantile at probability `p` (0 < p < 1).
pub fn normal_quantile(p: f64) -> f64 {
    Normal::standard().inverse_cdf(p)
}

/// P(T > t) for Student t with `df` degrees of freedom; NaN for df <= 0.
pub fn student_t_sf(t: f64, df: f64) -> f64 {
    StudentsT::new(0.0, 1.0, df).map(|d| d.sf(t)).unwrap_or(f64::NAN)
}

/// The Student t quantile at probability `p`; NaN for df <= 0.
pub fn student_t_quantile(p: f64, df: f64) -> f64 {
    StudentsT::new(0.0, 1.0, df)
        .map(|d| d.inverse_cdf(p))
        .unwrap_or(f64::NAN)
}

/// P(chi²_df > x); 1 for x <= 0.
pub fn chi2_sf(x: f64, df: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    ChiSquared::new(df).map(|d| d.sf(x)).unwrap_or(f64::NAN)
}

/// P(F_{df1, df2} > f); `None` when the degrees of freedom are not positive.
pub fn f_sf(f: f64, df1: f64, df2: f64) -> Option<f64> {
    FisherSnedecor::new(df1, df2).ok().map(|d| d.sf(f))
}
