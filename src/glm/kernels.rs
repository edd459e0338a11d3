//! The dense loops of an IRLS fit, over columns stored one after another (column j of an n-row
//! matrix is `x[j * n..(j + 1) * n]`): the weighted cross products X'WX and X'Wz
//! ([`cross_products`]), the linear predictor eta = offset + X b ([`linear_predictor`]), and the
//! sums that standardise a column ([`lane_sum`], [`peak_deviation`], [`scaled_square_sum`],
//! [`standardise`]).
//!
//! Hand-written rather than a gemm call because the pass needs the upper triangle only, the
//! weights folded in block by block, and above all one fixed association of every sum, so that a
//! fit gives the same bits on every machine:
//! * a cross product over a block of [`BLOCK`] rows is split into four lanes (row i goes to lane
//!   i mod 4), each lane is a chain of fused multiply-adds in row order, the lanes are added as
//!   (l0 + l1) + (l2 + l3), and block sums are added to the total in block order;
//! * eta_i = fma(b_k, x_ik, ... fma(b_1, x_i1, offset_i)), columns in the order given;
//! * column sums use eight lanes the same way.
//!
//! Every kernel runs in one of two compilations: for x86-64 processors with AVX2 and FMA
//! (chosen at run time; four lanes are one vector register, the cross products' tiles written
//! with explicit intrinsics because the compiler's own vectorisation of them spilled registers)
//! and for any other processor. Both perform the same exactly rounded operations
//! (`f64::mul_add` is one rounding everywhere; Rust never fuses or reorders floating-point
//! operations on its own), so they agree to the bit; a test checks it.

/// Rows per block: a block's weighted columns stay in L1 cache while they are multiplied with
/// every other column.
pub(crate) const BLOCK: usize = 256;

/// Scratch values one column takes in [`cross_products`]: a block, no longer than the rows (a
/// fit of 20 rows zeroes 20 values per column, not 256).
fn block_stride(n: usize) -> usize {
    BLOCK.min(n)
}

/// Scratch values [`cross_products`] needs for `k` columns of `n` rows.
pub(crate) fn scratch_len(k: usize, n: usize) -> usize {
    k * block_stride(n)
}

/// Sums of products split over four lanes (row i of a block in lane i mod 4).
type Lanes = [f64; 4];

/// (l0 + l1) + (l2 + l3).
#[inline(always)]
fn reduce(l: Lanes) -> f64 {
    (l[0] + l[1]) + (l[2] + l[3])
}

/// Defines `$name` as `$body` compiled twice: for x86-64 processors with AVX2 and FMA (taken
/// when the processor has them) and for any processor.
macro_rules! compiled_twice {
    ($(#[$meta:meta])* fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? = $body:ident;) => {
        $(#[$meta])*
        #[allow(clippy::too_many_arguments)]
        pub(crate) fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2,fma")]
                #[allow(clippy::too_many_arguments)]
                fn with_avx2_fma($($arg: $ty),*) $(-> $ret)? {
                    $body($($arg),*)
                }
                if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                    // SAFETY: the processor has the features the function is compiled for.
                    return unsafe { with_avx2_fma($($arg),*) };
                }
            }
            $body($($arg),*)
        }
    };
}

/// Upper triangle of X'WX (row-major k x k) and, when `z` is given, X'Wz, added to `gram` and
/// `rhs`, over the columns of `x` listed in `cols`. `weighted` is scratch of at least
/// [`scratch_len`]`(cols.len(), n)` values.
#[allow(clippy::too_many_arguments)]
pub(crate) fn cross_products(
    x: &[f64],
    n: usize,
    cols: &[usize],
    w: &[f64],
    z: Option<&[f64]>,
    gram: &mut [f64],
    rhs: &mut [f64],
    weighted: &mut [f64],
) {
    #[cfg(target_arch = "x86_64")]
    if x86::has_avx2_fma() {
        // SAFETY: the processor has the features the function is compiled for.
        return unsafe { x86::cross_products(x, n, cols, w, z, gram, rhs, weighted) };
    }
    cross_products_body::<false>(x, n, cols, w, z, gram, rhs, weighted);
}

compiled_twice! {
    /// eta = offset + X[:, active] b, each row's sum taken in column order by fused
    /// multiply-adds.
    fn linear_predictor(x: &[f64], n: usize, active: &[usize], b: &[f64], offset: &[f64], eta: &mut [f64]) = linear_predictor_body;
}

compiled_twice! {
    /// Σ x_i, with x_i added into lane i mod 8 and the lanes added as
    /// ((l0 + l1) + (l2 + l3)) + ((l4 + l5) + (l6 + l7)).
    fn lane_sum(x: &[f64]) -> f64 = lane_sum_body;
}

compiled_twice! {
    /// max |x_i - c| (0 for no values; exact in any order).
    fn peak_deviation(x: &[f64], c: f64) -> f64 = peak_deviation_body;
}

compiled_twice! {
    /// Σ ((x_i - c)·r)², each square added by a fused multiply-add into lane i mod 8, lanes
    /// added as in [`lane_sum`].
    fn scaled_square_sum(x: &[f64], c: f64, r: f64) -> f64 = scaled_square_sum_body;
}

compiled_twice! {
    /// out_i = (x_i - c) / s (exact quotients).
    fn standardise(x: &[f64], c: f64, s: f64, out: &mut [f64]) = standardise_body;
}

/// Eight lanes: two vector registers, so that additions overlap instead of waiting for each
/// other.
type Lanes8 = [f64; 8];

#[inline(always)]
fn reduce8(l: Lanes8) -> f64 {
    ((l[0] + l[1]) + (l[2] + l[3])) + ((l[4] + l[5]) + (l[6] + l[7]))
}

/// Folds `term(x_i)` into lane i mod 8 with `add`.
#[inline(always)]
fn fold8(x: &[f64], mut acc: Lanes8, term: impl Fn(f64, f64) -> f64) -> Lanes8 {
    let mut chunks = x.chunks_exact(8);
    for chunk in &mut chunks {
        for l in 0..8 {
            acc[l] = term(chunk[l], acc[l]);
        }
    }
    for (l, &v) in chunks.remainder().iter().enumerate() {
        acc[l] = term(v, acc[l]);
    }
    acc
}

#[inline(always)]
fn lane_sum_body(x: &[f64]) -> f64 {
    reduce8(fold8(x, [0.0; 8], |v, a| a + v))
}

#[inline(always)]
fn peak_deviation_body(x: &[f64], c: f64) -> f64 {
    fold8(x, [0.0; 8], |v, a| a.max((v - c).abs()))
        .into_iter()
        .fold(0.0, f64::max)
}

#[inline(always)]
fn scaled_square_sum_body(x: &[f64], c: f64, r: f64) -> f64 {
    reduce8(fold8(x, [0.0; 8], |v, a| {
        let t = (v - c) * r;
        t.mul_add(t, a)
    }))
}

#[inline(always)]
fn standardise_body(x: &[f64], c: f64, s: f64, out: &mut [f64]) {
    for (o, &v) in out.iter_mut().zip(x) {
        *o = (v - c) / s;
    }
}

/// With `SIMD` the four lanes of a tile are one AVX2 register ([`x86::tile_quads`]); the
/// operations are the same.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn cross_products_body<const SIMD: bool>(
    x: &[f64],
    n: usize,
    cols: &[usize],
    w: &[f64],
    z: Option<&[f64]>,
    gram: &mut [f64],
    rhs: &mut [f64],
    weighted: &mut [f64],
) {
    let k = cols.len();
    assert!(gram.len() >= k * k && rhs.len() >= k && weighted.len() >= scratch_len(k, n) && w.len() >= n);
    assert!(cols.iter().all(|&j| (j + 1) * n <= x.len()) && z.is_none_or(|z| z.len() >= n));
    let stride = block_stride(n);
    let mut start = 0;
    while start < n {
        let end = (start + BLOCK).min(n);
        let len = end - start;
        for (a, &j) in cols.iter().enumerate() {
            let out = &mut weighted[a * stride..a * stride + len];
            for ((o, &xi), &wi) in out.iter_mut().zip(&x[j * n + start..j * n + end]).zip(&w[start..end]) {
                *o = xi * wi;
            }
        }
        let weighted = &weighted[..];
        let wx = |a: usize| &weighted[a * stride..a * stride + len];
        let column = |b: usize| &x[cols[b] * n + start..cols[b] * n + end];
        // Pairs of weighted columns against four columns at a time: 6 loads per 8 products.
        let mut a = 0;
        while a < k {
            let rows = if a + 1 < k { 2 } else { 1 };
            let mut b = a;
            while b < k {
                let width = (k - b).min(4);
                let (u0, u1) = (wx(a), wx(a + rows - 1));
                let sums = match width {
                    4 => widen(tile::<SIMD, 4>(
                        u0,
                        rows,
                        u1,
                        [column(b), column(b + 1), column(b + 2), column(b + 3)],
                    )),
                    3 => widen(tile::<SIMD, 3>(u0, rows, u1, [column(b), column(b + 1), column(b + 2)])),
                    2 => widen(tile::<SIMD, 2>(u0, rows, u1, [column(b), column(b + 1)])),
                    _ => widen(tile::<SIMD, 1>(u0, rows, u1, [column(b)])),
                };
                for r in 0..rows {
                    for c in 0..width {
                        // The second row's entry left of its diagonal is not part of the triangle.
                        if b + c >= a + r {
                            gram[(a + r) * k + b + c] += sums[r][c];
                        }
                    }
                }
                b += width;
            }
            if let Some(z) = z {
                let zb = &z[start..end];
                let sums = tile::<SIMD, 1>(wx(a), rows, wx(a + rows - 1), [zb]);
                for r in 0..rows {
                    rhs[a + r] += sums[r][0];
                }
            }
            a += rows;
        }
        start = end;
    }
}

/// Sums of `u0`·v_c and (when `rows` is 2) `u1`·v_c over one block, for each column v_c:
/// whole quads of rows in four lanes, the remaining rows into lane i mod 4, lanes reduced.
#[inline(always)]
fn tile<const SIMD: bool, const C: usize>(u0: &[f64], rows: usize, u1: &[f64], v: [&[f64]; C]) -> [[f64; C]; 2] {
    let len = u0.len();
    let (u0, u1) = (&u0[..len], &u1[..len]);
    let v = v.map(|c| &c[..len]);
    let quads = len / 4;
    #[cfg(target_arch = "x86_64")]
    let mut acc = if SIMD {
        // SAFETY: only reached from `x86::cross_products`, which runs when the processor has
        // AVX2 and FMA; every slice holds `len` >= 4·quads values.
        unsafe { x86::tile_quads(u0, rows == 2, u1, v, quads) }
    } else {
        tile_quads(u0, rows == 2, u1, v, quads)
    };
    #[cfg(not(target_arch = "x86_64"))]
    let mut acc = tile_quads(u0, rows == 2, u1, v, quads);
    for i in quads * 4..len {
        let l = i % 4;
        for c in 0..C {
            acc[0][c][l] = u0[i].mul_add(v[c][i], acc[0][c][l]);
            acc[1][c][l] = u1[i].mul_add(v[c][i], acc[1][c][l]);
        }
    }
    acc.map(|row| row.map(reduce))
}

/// The four lanes of a tile over the first `quads` quads of rows (lane l: rows 4q + l).
#[inline(always)]
fn tile_quads<const C: usize>(u0: &[f64], two: bool, u1: &[f64], v: [&[f64]; C], quads: usize) -> [[Lanes; C]; 2] {
    let mut acc = [[[0.0f64; 4]; C]; 2];
    for q in 0..quads {
        let i = q * 4;
        for c in 0..C {
            for l in 0..4 {
                acc[0][c][l] = u0[i + l].mul_add(v[c][i + l], acc[0][c][l]);
                if two {
                    acc[1][c][l] = u1[i + l].mul_add(v[c][i + l], acc[1][c][l]);
                }
            }
        }
    }
    acc
}

/// A tile's sums padded to four columns.
#[inline(always)]
fn widen<const C: usize>(s: [[f64; C]; 2]) -> [[f64; 4]; 2] {
    s.map(|r| std::array::from_fn(|c| if c < C { r[c] } else { 0.0 }))
}

/// The AVX2 + FMA compilation (x86-64 processors that have both, detected at run time).
#[cfg(target_arch = "x86_64")]
mod x86 {
    use std::arch::x86_64::{__m256d, _mm256_fmadd_pd, _mm256_loadu_pd, _mm256_setzero_pd, _mm256_storeu_pd};

    use super::Lanes;

    pub(super) fn has_avx2_fma() -> bool {
        std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma")
    }

    #[target_feature(enable = "avx2,fma")]
    #[allow(clippy::too_many_arguments)]
    pub(super) fn cross_products(
        x: &[f64],
        n: usize,
        cols: &[usize],
        w: &[f64],
        z: Option<&[f64]>,
        gram: &mut [f64],
        rhs: &mut [f64],
        weighted: &mut [f64],
    ) {
        super::cross_products_body::<true>(x, n, cols, w, z, gram, rhs, weighted);
    }

    /// [`super::tile_quads`] with each lane quadruple in one register: one fused multiply-add
    /// instruction per quad and column is exactly four of the scalar ones.
    ///
    /// # Safety
    /// The processor must have AVX2 and FMA.
    #[target_feature(enable = "avx2,fma")]
    #[inline]
    pub(super) unsafe fn tile_quads<const C: usize>(
        u0: &[f64],
        two: bool,
        u1: &[f64],
        v: [&[f64]; C],
        quads: usize,
    ) -> [[Lanes; C]; 2] {
        assert!(u0.len() >= quads * 4 && u1.len() >= quads * 4 && v.iter().all(|c| c.len() >= quads * 4));
        let mut acc0: [__m256d; C] = [_mm256_setzero_pd(); C];
        let mut acc1: [__m256d; C] = [_mm256_setzero_pd(); C];
        // SAFETY: every load reads 4 values at 4q < 4·quads <= the slice's length (asserted).
        unsafe {
            if two {
                for q in 0..quads {
                    let p0 = _mm256_loadu_pd(u0.as_ptr().add(q * 4));
                    let p1 = _mm256_loadu_pd(u1.as_ptr().add(q * 4));
                    for c in 0..C {
                        let vc = _mm256_loadu_pd(v[c].as_ptr().add(q * 4));
                        acc0[c] = _mm256_fmadd_pd(p0, vc, acc0[c]);
                        acc1[c] = _mm256_fmadd_pd(p1, vc, acc1[c]);
                    }
                }
            } else {
                for q in 0..quads {
                    let p0 = _mm256_loadu_pd(u0.as_ptr().add(q * 4));
                    for c in 0..C {
                        let vc = _mm256_loadu_pd(v[c].as_ptr().add(q * 4));
                        acc0[c] = _mm256_fmadd_pd(p0, vc, acc0[c]);
                    }
                }
            }
        }
        let mut out = [[[0.0f64; 4]; C]; 2];
        for c in 0..C {
            // SAFETY: each destination is an array of four f64.
            unsafe {
                _mm256_storeu_pd(out[0][c].as_mut_ptr(), acc0[c]);
                _mm256_storeu_pd(out[1][c].as_mut_ptr(), acc1[c]);
            }
        }
        out
    }
}

/// Rows per step of the linear predictor: two vector registers of accumulators.
const ETA_ROWS: usize = 8;

#[inline(always)]
fn linear_predictor_body(x: &[f64], n: usize, active: &[usize], b: &[f64], offset: &[f64], eta: &mut [f64]) {
    assert!(offset.len() >= n && eta.len() >= n && b.len() >= active.len());
    assert!(active.iter().all(|&j| (j + 1) * n <= x.len()));
    let steps = n / ETA_ROWS;
    for s in 0..steps {
        let i = s * ETA_ROWS;
        let mut acc: [f64; ETA_ROWS] = offset[i..i + ETA_ROWS].try_into().expect("eight rows");
        for (a, &j) in active.iter().enumerate() {
            let col = &x[j * n + i..j * n + i + ETA_ROWS];
            for l in 0..ETA_ROWS {
                acc[l] = b[a].mul_add(col[l], acc[l]);
            }
        }
        eta[i..i + ETA_ROWS].copy_from_slice(&acc);
    }
    for i in steps * ETA_ROWS..n {
        let mut e = offset[i];
        for (a, &j) in active.iter().enumerate() {
            e = b[a].mul_add(x[j * n + i], e);
        }
        eta[i] = e;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Deterministic values of mixed sign and magnitude (no randomness needed).
    fn values(n: usize, seed: u64) -> Vec<f64> {
        let mut s = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
        (0..n)
            .map(|_| {
                s ^= s << 13;
                s ^= s >> 7;
                s ^= s << 17;
                ((s >> 11) as f64 / (1u64 << 53) as f64 - 0.3) * 3.0
            })
            .collect()
    }

    /// Every kernel's two compilations give the same bits, and agree with plain sums in a different order
    /// to round-off; every column count from 1 to 9 exercises every tile shape, and row
    /// counts around the block and lane sizes exercise the tails.
    #[test]
    fn both_compilations_agree_to_the_bit_and_with_plain_sums() {
        for k in 1..=9 {
            for n in [1, 3, 4, 7, 255, 256, 257, 1000] {
                let x = values(n * (k + 1), (k * 1000 + n) as u64);
                let w: Vec<f64> = values(n, 7).iter().map(|v| v.abs() + 0.1).collect();
                let z = values(n, 11);
                let coef = values(k, 13);
                let cols: Vec<usize> = (0..k).rev().collect();
                let run = |dispatch: bool| {
                    let (mut g, mut r, mut s) = (vec![0.0; k * k], vec![0.0; k], vec![0.0; scratch_len(k, n)]);
                    let mut eta = vec![0.0; n];
                    if dispatch {
                        cross_products(&x, n, &cols, &w, Some(&z), &mut g, &mut r, &mut s);
                        linear_predictor(&x, n, &cols, &coef, &w, &mut eta);
                    } else {
                        cross_products_body::<false>(&x, n, &cols, &w, Some(&z), &mut g, &mut r, &mut s);
                        linear_predictor_body(&x, n, &cols, &coef, &w, &mut eta);
                    }
                    (g, r, eta)
                };
                let (fast, portable) = (run(true), run(false));
                let bits = |v: &[f64]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&fast.0), bits(&portable.0), "gram k={k} n={n}");
                assert_eq!(bits(&fast.1), bits(&portable.1), "rhs k={k} n={n}");
                assert_eq!(bits(&fast.2), bits(&portable.2), "eta k={k} n={n}");
                let col = |j: usize| &x[j * n..(j + 1) * n];
                for (a, &ja) in cols.iter().enumerate() {
                    for (b, &jb) in cols.iter().enumerate() {
                        let plain: f64 = (0..n).map(|i| col(ja)[i] * w[i] * col(jb)[i]).sum();
                        let got = fast.0[a * k + b];
                        if b >= a {
                            assert!((got - plain).abs() <= 1e-12 * (1.0 + plain.abs()), "{got} vs {plain}");
                        } else {
                            assert_eq!(got, 0.0, "lower triangle untouched");
                        }
                    }
                    let plain: f64 = (0..n).map(|i| col(ja)[i] * w[i] * z[i]).sum();
                    assert!((fast.1[a] - plain).abs() <= 1e-12 * (1.0 + plain.abs()));
                }
                let bits1 = |v: f64| v.to_bits();
                let (c, r) = (0.25, 0.7);
                let (mut out_fast, mut out_portable) = (vec![0.0; n], vec![0.0; n]);
                standardise(&x[..n], c, r, &mut out_fast);
                standardise_body(&x[..n], c, r, &mut out_portable);
                assert_eq!(bits(&out_fast), bits(&out_portable));
                assert_eq!(bits1(lane_sum(&x)), bits1(lane_sum_body(&x)));
                assert_eq!(bits1(peak_deviation(&x, c)), bits1(peak_deviation_body(&x, c)));
                assert_eq!(
                    bits1(scaled_square_sum(&x, c, r)),
                    bits1(scaled_square_sum_body(&x, c, r))
                );
                let plain_sum: f64 = x.iter().sum();
                assert!((lane_sum(&x) - plain_sum).abs() <= 1e-12 * (1.0 + plain_sum.abs()));
                let plain_peak = x.iter().fold(0.0f64, |m, v| m.max((v - c).abs()));
                assert_eq!(peak_deviation(&x, c), plain_peak);
                let plain_squares: f64 = x.iter().map(|v| ((v - c) * r).powi(2)).sum();
                assert!((scaled_square_sum(&x, c, r) - plain_squares).abs() <= 1e-12 * plain_squares);
                for i in 0..n {
                    assert_eq!(out_fast[i], (x[i] - c) / r);
                    let plain = w[i] + cols.iter().enumerate().map(|(a, &j)| coef[a] * col(j)[i]).sum::<f64>();
                    assert!((fast.2[i] - plain).abs() <= 1e-12 * (1.0 + plain.abs()));
                }
            }
        }
    }
}
