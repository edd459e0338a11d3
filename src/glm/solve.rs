//! Weighted normal equations: accumulation of X'WX and X'Wz, and a Cholesky solve.
//!
//! Hand-written rather than taken from nalgebra because the solver needs two things nalgebra's
//! `Cholesky` does not offer: sequential detection of aliased (linearly dependent) columns in
//! their given order, the way model-fitting programs report them, and an in-place factorisation
//! on buffers reused across IRLS iterations (no allocation per iteration). Matrices here are
//! small (k x k, k = number of active columns) and stored row-major in flat slices.

use super::kernels::{cross_products, scratch_len};

/// Reusable buffers for one IRLS run.
pub(crate) struct NormalEquations {
    k: usize,
    /// Upper triangle of X'WX, row-major k x k; after `factor`, the Cholesky factor (lower, row-major).
    pub(crate) gram: Vec<f64>,
    /// X'Wz, then the solution.
    pub(crate) rhs: Vec<f64>,
    weighted: Vec<f64>,
}

impl NormalEquations {
    /// Buffers for `k` columns of `n` rows.
    pub(crate) fn new(k: usize, n: usize) -> Self {
        NormalEquations {
            k,
            gram: vec![0.0; k * k],
            rhs: vec![0.0; k],
            weighted: vec![0.0; scratch_len(k, n)],
        }
    }

    /// Accumulates X'WX (upper triangle) and, when `z` is given, X'Wz, over the columns of `x`
    /// listed in `cols` (each column `n` contiguous values); see [`cross_products`].
    pub(crate) fn accumulate(&mut self, x: &[f64], n: usize, cols: &[usize], w: &[f64], z: Option<&[f64]>) {
        debug_assert_eq!(cols.len(), self.k);
        self.gram.iter_mut().for_each(|v| *v = 0.0);
        self.rhs.iter_mut().for_each(|v| *v = 0.0);
        cross_products(x, n, cols, w, z, &mut self.gram, &mut self.rhs, &mut self.weighted);
    }

    /// Cholesky factorisation of the accumulated matrix in place. Returns false when the matrix
    /// is not numerically positive definite.
    pub(crate) fn factor(&mut self) -> bool {
        cholesky_in_place(&mut self.gram, self.k, SOLVE_TOLERANCE, None)
    }

    /// Solves (L L') b = rhs in place after `factor`.
    pub(crate) fn solve(&mut self) {
        solve_in_place(&self.gram, self.k, &mut self.rhs);
    }
}

/// Cholesky factorisation A = L L' of the symmetric matrix whose upper triangle is in `a`
/// (row-major k x k); L is written to the lower triangle, the upper part is zeroed.
///
/// With `aliased = Some(flags)`, a column whose pivot falls below `tolerance` times its
/// original diagonal is marked aliased (it lies in the span of the columns before it) and
/// dropped from the factorisation; otherwise such a pivot makes the function return false.
pub(crate) fn cholesky_in_place(a: &mut [f64], k: usize, tolerance: f64, mut aliased: Option<&mut [bool]>) -> bool {
    // Mirror the upper triangle into the lower one; the factor overwrites the lower part.
    for i in 0..k {
        for j in 0..i {
            a[i * k + j] = a[j * k + i];
        }
    }
    for j in 0..k {
        let original = a[j * k + j];
        let mut d = original;
        for m in 0..j {
            d -= a[j * k + m] * a[j * k + m];
        }
        let singular = !(d > tolerance * original) || !d.is_finite() || original <= 0.0;
        if singular {
            match aliased.as_deref_mut() {
                Some(flags) => {
                    flags[j] = true;
                    for i in j..k {
                        a[i * k + j] = 0.0;
                    }
                    continue;
                }
                None => return false,
            }
        }
        let l = d.sqrt();
        a[j * k + j] = l;
        for i in j + 1..k {
            let mut s = a[i * k + j];
            for m in 0..j {
                s -= a[i * k + m] * a[j * k + m];
            }
            a[i * k + j] = s / l;
        }
    }
    for i in 0..k {
        for j in i + 1..k {
            a[i * k + j] = 0.0;
        }
    }
    true
}

/// Relative size of a Cholesky pivot below which a column counts as aliased: 1e-9 of its own
/// squared length, i.e. a correlation with the earlier columns above 1 - 5e-10. With the
/// standardised columns the solver uses, round-off in an exact dependence is near 1e-15.
pub(crate) const ALIAS_TOLERANCE: f64 = 1e-9;

/// Pivot tolerance inside IRLS. Weights can legitimately make a column nearly dependent on the
/// others (rows heading for the boundary lose their weight); the iteration continues until the
/// pivot is 1e-13 of its diagonal and then stops for the boundary check.
const SOLVE_TOLERANCE: f64 = 1e-13;

/// Forward and back substitution with the lower factor in `l` (row-major k x k).
fn solve_in_place(l: &[f64], k: usize, b: &mut [f64]) {
    for i in 0..k {
        let mut s = b[i];
        for m in 0..i {
            s -= l[i * k + m] * b[m];
        }
        b[i] = s / l[i * k + i];
    }
    for i in (0..k).rev() {
        let mut s = b[i];
        for m in i + 1..k {
            s -= l[m * k + i] * b[m];
        }
        b[i] = s / l[i * k + i];
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn solves_a_small_system_and_flags_a_dependent_column() {
        // Columns: 1, x, 2x (aliased), x^2.
        let xs = [1.0, 2.0, 3.0, 4.0, 5.0];
        let n = xs.len();
        let mut x = vec![1.0; n];
        x.extend_from_slice(&xs);
        x.extend(xs.iter().map(|v| 2.0 * v));
        x.extend(xs.iter().map(|v| v * v));
        let w = vec![1.0; n];
        let mut ne = NormalEquations::new(4, n);
        ne.accumulate(&x, n, &[0, 1, 2, 3], &w, None);
        let mut flags = [false; 4];
        assert!(cholesky_in_place(
            &mut ne.gram.clone(),
            4,
            ALIAS_TOLERANCE,
            Some(&mut flags)
        ));
        assert_eq!(flags, [false, false, true, false]);

        // y = 1 + 2x + 3x^2 exactly, on the three independent columns.
        let y: Vec<f64> = xs.iter().map(|v| 1.0 + 2.0 * v + 3.0 * v * v).collect();
        let mut ne = NormalEquations::new(3, n);
        ne.accumulate(&x, n, &[0, 1, 3], &w, Some(&y));
        assert!(ne.factor());
        ne.solve();
        for (got, want) in ne.rhs.iter().zip([1.0, 2.0, 3.0]) {
            assert!((got - want).abs() < 1e-10, "{got} vs {want}");
        }
    }
}
