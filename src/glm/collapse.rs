//! Poisson fits on collapsed data: rows with identical covariates are merged into one pattern.
//!
//! For a pattern k with rows i (counts y_i, exposures E_i, common rate r_k = exp(x_k'b)), the
//! Poisson log-likelihood in b depends on the data only through Y_k = Σy_i and E_k = ΣE_i, so a
//! fit to the pseudo-rows (Y_k, offset log E_k) has exactly the same estimates and the same
//! Fisher information, hence the same model-based standard errors.
//!
//! Statistics built from individual rows do change under collapsing: the deviance, Pearson's X²,
//! the log-likelihood (and AIC/BIC), the sandwich covariance and the overdispersion test. They
//! are recovered exactly from per-pattern sums kept while collapsing (mu_i = r_k·E_i):
//! * deviance:  2·[Σ y log y - Σ y log E - Y_k log r_k - Y_k + r_k E_k]
//! * Pearson:   Σ y²/E / r_k - 2 Y_k + r_k E_k
//! * loglik:    Σ y log E + Y_k log r_k - r_k E_k - Σ log Γ(y+1)
//! * HC0 meat:  Σ (y - mu)² = Σy² - 2 r_k Σ yE + r_k² ΣE²  (times x_k x_k')
//! * the Cameron–Trivedi regression through Σ((y-mu)² - y), Σmu² and Σz², z = ((y-mu)² - y)/mu,
//!   expanded in the same sums (a = y² - y):
//!   Σz² = Σa²/E² / r² + 4Σy² + r²ΣE² - 4Σay/E / r + 2Σa - 4rΣyE.
//!
//! Degrees of freedom, AIC and BIC use the number of original rows. The sums are exact up to
//! floating-point cancellation between the y·log y terms (relative error near 1e-16 times
//! Σ y|log y| / deviance).

use std::collections::HashMap;

use nalgebra::DMatrix;

use super::design::{ColumnKind, Design};
use super::error::FitError;
use super::family::{Family, FamilyTests, Poisson, log_factorial, y_log_y};
use super::fit::{FitInput, GlmFit, TermState, fit_with_row_count, note_saturation, set_information_criteria};
use super::irls::FitOptions;
use super::overdispersion::aux_regression_t;

/// Per-pattern sums of the original rows. Every field is a plain sum, so sums of disjoint row
/// sets merge by addition ([`Sums::merge`]).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Sums {
    rows: usize,
    y: f64,
    e: f64,
    yy: f64,
    ye: f64,
    ee: f64,
    y_log_y: f64,
    y_log_e: f64,
    log_gamma: f64,
    yy_over_e: f64,
    a2_over_e2: f64,
    ay_over_e: f64,
    a: f64,
}

impl Sums {
    /// The number of rows summed.
    pub fn rows(&self) -> usize {
        self.rows
    }
    /// Σy.
    pub fn total_count(&self) -> f64 {
        self.y
    }
    /// ΣE.
    pub fn total_exposure(&self) -> f64 {
        self.e
    }

    /// The names of the sums, in the order of [`Sums::to_array`] (for state encoding with named
    /// fields).
    pub const NAMES: [&'static str; 13] = [
        "rows",
        "y",
        "e",
        "yy",
        "ye",
        "ee",
        "y_log_y",
        "y_log_e",
        "log_gamma",
        "yy_over_e",
        "a2_over_e2",
        "ay_over_e",
        "a",
    ];

    /// The sums as an array, in the order of [`Sums::NAMES`]; [`Sums::from_array`] inverts it.
    pub fn to_array(&self) -> [f64; 13] {
        [
            self.rows as f64,
            self.y,
            self.e,
            self.yy,
            self.ye,
            self.ee,
            self.y_log_y,
            self.y_log_e,
            self.log_gamma,
            self.yy_over_e,
            self.a2_over_e2,
            self.ay_over_e,
            self.a,
        ]
    }

    /// Sums from [`Sums::to_array`]; None unless the row count is a whole number >= 1, the count
    /// total is >= 0 and the exposure total is > 0 (NaN fails both).
    pub fn from_array(v: [f64; 13]) -> Option<Sums> {
        // Sums of valid rows can overflow to infinity at extreme magnitudes (y·y/e with e = 1e-300),
        // and opposite infinities can merge to NaN in the overdispersion sums; the statistics that
        // use them are then NULL. Only the row count and the two totals must be well-formed.
        let ok = v[0] >= 1.0 && v[0].fract() == 0.0 && v[0] < 9.0e15 && v[1] >= 0.0 && v[2] > 0.0;
        ok.then(|| Sums {
            rows: v[0] as usize,
            y: v[1],
            e: v[2],
            yy: v[3],
            ye: v[4],
            ee: v[5],
            y_log_y: v[6],
            y_log_e: v[7],
            log_gamma: v[8],
            yy_over_e: v[9],
            a2_over_e2: v[10],
            ay_over_e: v[11],
            a: v[12],
        })
    }

    /// Adds the sums of another, disjoint set of rows of the same pattern.
    pub fn merge(&mut self, o: &Sums) {
        self.rows += o.rows;
        self.y += o.y;
        self.e += o.e;
        self.yy += o.yy;
        self.ye += o.ye;
        self.ee += o.ee;
        self.y_log_y += o.y_log_y;
        self.y_log_e += o.y_log_e;
        self.log_gamma += o.log_gamma;
        self.yy_over_e += o.yy_over_e;
        self.a2_over_e2 += o.a2_over_e2;
        self.ay_over_e += o.ay_over_e;
        self.a += o.a;
    }

    /// Adds one row: count y (finite, >= 0) with exposure e (finite, > 0).
    pub fn add(&mut self, y: f64, e: f64) {
        let a = y * y - y;
        self.rows += 1;
        self.y += y;
        self.e += e;
        self.yy += y * y;
        self.ye += y * e;
        self.ee += e * e;
        self.y_log_y += y_log_y(y);
        self.y_log_e += if y == 0.0 { 0.0 } else { y * e.ln() };
        self.log_gamma += log_factorial(y);
        self.yy_over_e += y * y / e;
        self.a2_over_e2 += a * a / (e * e);
        self.ay_over_e += a * y / e;
        self.a += a;
    }

    /// Σ(y·log r) with the convention 0·log 0 = 0.
    fn y_log_r(&self, r: f64) -> f64 {
        if self.y == 0.0 { 0.0 } else { self.y * r.ln() }
    }

    fn deviance(&self, r: f64) -> f64 {
        2.0 * (self.y_log_y - self.y_log_e - self.y_log_r(r) - self.y + r * self.e)
    }

    fn pearson(&self, r: f64) -> f64 {
        let first = if self.yy_over_e == 0.0 { 0.0 } else { self.yy_over_e / r };
        first - 2.0 * self.y + r * self.e
    }

    fn loglik(&self, r: f64) -> f64 {
        self.y_log_e + self.y_log_r(r) - r * self.e - self.log_gamma
    }

    fn squared_residuals(&self, r: f64) -> f64 {
        (self.yy - 2.0 * r * self.ye + r * r * self.ee).max(0.0)
    }

    fn squared_aux_response(&self, r: f64) -> f64 {
        let mut s = 4.0 * self.yy + r * r * self.ee + 2.0 * self.a - 4.0 * r * self.ye;
        if self.a2_over_e2 != 0.0 {
            s += self.a2_over_e2 / (r * r);
        }
        if self.ay_over_e != 0.0 {
            s -= 4.0 * self.ay_over_e / r;
        }
        s
    }
}

/// A Poisson fit computed on collapsed patterns, with row-level statistics.
#[derive(Debug, Clone)]
pub struct CollapsedFit {
    /// The fit; `fitted` holds one fitted mean per pattern.
    pub fit: GlmFit,
    /// Number of distinct covariate patterns.
    pub patterns: usize,
    /// Pattern index of every original row.
    pub pattern_of_row: Vec<u32>,
}

/// Fits a Poisson rate model after merging rows with identical design rows.
/// `exposure` (finite, > 0) defaults to 1 per row.
pub fn fit_poisson_collapsed(
    design: &Design,
    y: &[f64],
    exposure: Option<&[f64]>,
    opts: FitOptions,
) -> Result<CollapsedFit, FitError> {
    let n = design.n_rows();
    let p = design.n_columns();
    if y.len() != n {
        return Err(FitError::LengthMismatch {
            what: "response".into(),
            expected: n,
            found: y.len(),
        });
    }
    if let Some(e) = exposure {
        if e.len() != n {
            return Err(FitError::LengthMismatch {
                what: "exposure".into(),
                expected: n,
                found: e.len(),
            });
        }
    }
    let exposure_of = |i: usize| exposure.map_or(1.0, |e| e[i]);
    for i in 0..n {
        if let Some(reason) = Poisson.check_response(y[i]) {
            return Err(FitError::BadResponse {
                row: i,
                value: y[i],
                reason,
            });
        }
        let e = exposure_of(i);
        if !(e.is_finite() && e > 0.0) {
            return Err(FitError::BadExposure { row: i, value: e });
        }
    }

    let (representative, pattern_of_row) = group_rows(design);
    let m = representative.len();
    let mut sums = vec![Sums::default(); m];
    for i in 0..n {
        sums[pattern_of_row[i] as usize].add(y[i], exposure_of(i));
    }
    let columns: Vec<(String, ColumnKind, Vec<f64>)> = (0..p)
        .map(|j| {
            let col = design.column(j);
            let values = representative.iter().map(|&i| col[i]).collect();
            (design.names()[j].clone(), design.kinds()[j], values)
        })
        .collect();
    let pseudo = Design::from_columns(m, columns)?;
    Ok(CollapsedFit {
        fit: fit_poisson_patterns(&pseudo, &sums, opts)?,
        patterns: m,
        pattern_of_row,
    })
}

/// Fits a Poisson rate model to covariate patterns: row k of `pseudo` is the design row of
/// pattern k and `sums[k]` the sums of its original rows (each pattern's rows must share the
/// design row). Reports the statistics of the original rows.
pub fn fit_poisson_patterns(pseudo: &Design, sums: &[Sums], opts: FitOptions) -> Result<GlmFit, FitError> {
    if sums.len() != pseudo.n_rows() {
        return Err(FitError::LengthMismatch {
            what: "pattern sums".into(),
            expected: pseudo.n_rows(),
            found: sums.len(),
        });
    }
    let n: usize = sums.iter().map(|s| s.rows).sum();
    let py: Vec<f64> = sums.iter().map(|s| s.y).collect();
    let poffset: Vec<f64> = sums.iter().map(|s| s.e.ln()).collect();
    let input = FitInput {
        y: &py,
        offset: Some(&poffset),
        weights: None,
    };
    let mut fit = fit_with_row_count(&Poisson, pseudo, input, opts, n)?;
    restate_row_statistics(&mut fit, pseudo, sums, n);
    note_saturation(&mut fit);
    Ok(fit)
}

/// Replaces the pattern-level statistics of `fit` by those of the original rows.
fn restate_row_statistics(fit: &mut GlmFit, pseudo: &Design, sums: &[Sums], n: usize) {
    fit.stats.n_used = n;
    fit.stats.df_resid = fit.stats.df_resid.map(|_| n - fit.stats.rank);
    if fit.fitted.is_empty() {
        return;
    }
    let rates: Vec<f64> = fit.fitted.iter().zip(sums).map(|(mu, s)| mu / s.e).collect();
    let total_y: f64 = sums.iter().map(|s| s.y).sum();
    let total_e: f64 = sums.iter().map(|s| s.e).sum();
    let null_rate = if pseudo.has_intercept() { total_y / total_e } else { 1.0 };
    let sum_over = |f: &dyn Fn(&Sums, f64) -> f64| -> f64 { sums.iter().zip(&rates).map(|(s, &r)| f(s, r)).sum() };
    fit.stats.deviance = Some(sum_over(&|s, r| s.deviance(r)));
    fit.stats.null_deviance = Some(sums.iter().map(|s| s.deviance(null_rate)).sum());
    if fit.stats.pearson_chi2.is_some() {
        fit.stats.pearson_chi2 = Some(sum_over(&|s, r| s.pearson(r)));
    }
    set_information_criteria(&mut fit.stats, &Poisson, sum_over(&|s, r| s.loglik(r)));
    // The pattern-level tests mean nothing for the rows; the row-level ones follow.
    fit.stats.extra = FamilyTests::default();

    if fit.states.contains(&TermState::Estimated) {
        let p = pseudo.n_columns();
        let mut meat = DMatrix::<f64>::zeros(p, p);
        for (k, (s, &r)) in sums.iter().zip(&rates).enumerate() {
            let weight = s.squared_residuals(r);
            for a in 0..p {
                let xa = pseudo.column(a)[k] * weight;
                for b in 0..p {
                    meat[(a, b)] += xa * pseudo.column(b)[k];
                }
            }
        }
        fit.cov_sandwich = &fit.cov_unscaled * meat * &fit.cov_unscaled;

        let szx = sum_over(&|s, r| s.squared_residuals(r) - s.y);
        let sxx = sum_over(&|s, r| r * r * s.ee);
        let szz = sum_over(&|s, r| s.squared_aux_response(r));
        fit.stats.extra.overdispersion = if n >= 2 {
            aux_regression_t(szx, sxx, szz, n)
        } else {
            None
        };
    }
}

/// Groups identical design rows. Returns one representative row per pattern (in order of first
/// appearance) and the pattern index of every row. Rows are compared by the bits of their
/// values (after mapping -0.0 to 0.0), without allocating per row.
fn group_rows(design: &Design) -> (Vec<usize>, Vec<u32>) {
    let n = design.n_rows();
    let p = design.n_columns();
    let bits = |i: usize, j: usize| -> u64 {
        let v = design.column(j)[i];
        if v == 0.0 { 0 } else { v.to_bits() }
    };
    let mut first_by_hash: HashMap<u64, u32> = HashMap::new();
    let mut next_same_hash: Vec<u32> = Vec::new();
    let mut representative: Vec<usize> = Vec::new();
    let mut pattern_of_row = Vec::with_capacity(n);
    for i in 0..n {
        let mut h: u64 = 0x9e37_79b9_7f4a_7c15;
        for j in 0..p {
            h = (h ^ bits(i, j)).wrapping_mul(0x1000_0000_01b3).rotate_left(29);
        }
        let same = |k: u32| (0..p).all(|j| bits(representative[k as usize], j) == bits(i, j));
        let found = match first_by_hash.get(&h) {
            None => None,
            Some(&start) => {
                let mut k = start;
                loop {
                    if same(k) {
                        break Some(k);
                    }
                    if next_same_hash[k as usize] == u32::MAX {
                        break None;
                    }
                    k = next_same_hash[k as usize];
                }
            }
        };
        let k = match found {
            Some(k) => k,
            None => {
                let k = representative.len() as u32;
                representative.push(i);
                next_same_hash.push(u32::MAX);
                match first_by_hash.get(&h) {
                    None => {
                        first_by_hash.insert(h, k);
                    }
                    Some(&start) => {
                        // Append to the end of this hash's chain.
                        let mut last = start;
                        while next_same_hash[last as usize] != u32::MAX {
                            last = next_same_hash[last as usize];
                        }
                        next_same_hash[last as usize] = k;
                    }
                }
                k
            }
        };
        pattern_of_row.push(k);
    }
    (representative, pattern_of_row)
}
