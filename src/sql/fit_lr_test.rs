//! `fit_lr_test(bigger, smaller)`: likelihood-ratio test of two nested fits of the same rows.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::Array;
use datafusion::arrow::datatypes::DataType;
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::fit_aggregate::DOC_SECTION;
use super::scalar_util::{FitView, arg_arrays, exec_error, float_struct, float_struct_type};
use crate::glm::inference::chi2_sf;

const FIELDS: &[&str] = &["chi2", "df", "p_value"];

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FitLrTest {
    signature: Signature,
}

pub fn fit_lr_test() -> ScalarUDF {
    ScalarUDF::from(FitLrTest {
        signature: Signature::any(2, Volatility::Immutable),
    })
}

impl ScalarUDFImpl for FitLrTest {
    fn name(&self) -> &str {
        "fit_lr_test"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(float_struct_type(FIELDS))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let big = FitView::new("fit_lr_test", &a[0])?;
        let small = FitView::new("fit_lr_test", &a[1])?;
        let mut cols = vec![Vec::with_capacity(args.number_rows); 3];
        for r in 0..args.number_rows {
            let test = if big.fits.is_null(r) || small.fits.is_null(r) {
                None
            } else {
                lr_row(&big, &small, r)?
            };
            cols[0].push(test.map(|t| t.0));
            cols[1].push(test.map(|t| t.1));
            cols[2].push(test.map(|t| t.2));
        }
        Ok(ColumnarValue::Array(Arc::new(float_struct(FIELDS, cols))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

/// chi2 = 2 (loglik_bigger - loglik_smaller) on rank_bigger - rank_smaller df (for Poisson fits
/// this is the difference of the deviances).
fn lr_row(big: &FitView<'_>, small: &FitView<'_>, r: usize) -> Result<Option<(f64, f64, f64)>> {
    let same = |name: &str| match (big.fit_float(name, r), small.fit_float(name, r)) {
        (Some(x), Some(y)) => (x - y).abs() <= 1e-9 * x.abs().max(y.abs()),
        (None, None) => true,
        _ => false,
    };
    if big.fit_text("family", r) != small.fit_text("family", r) {
        return Err(exec_error("fit_lr_test: the two fits are of different families".into()));
    }
    if big.fit_uint("n_used", r) != small.fit_uint("n_used", r) || !same("total_count") || !same("total_exposure") {
        return Err(exec_error(format!(
            "fit_lr_test: the fits used different rows (n_used {:?} vs {:?}); compare fits of the same rows",
            big.fit_uint("n_used", r),
            small.fit_uint("n_used", r)
        )));
    }
    let big_terms: Vec<&str> = big.term_range(r).filter_map(|i| big.term_text("term", i)).collect();
    if let Some(missing) = small
        .term_range(r)
        .filter_map(|i| small.term_text("term", i))
        .find(|t| !big_terms.contains(t))
    {
        return Err(exec_error(format!(
            "fit_lr_test: the fits are not nested: term {missing} of the second fit is not in the first; \
             give the bigger fit first"
        )));
    }
    let (Some(lb), Some(ls), Some(rb), Some(rs)) = (
        big.fit_float("loglik", r),
        small.fit_float("loglik", r),
        big.fit_uint("rank", r),
        small.fit_uint("rank", r),
    ) else {
        return Ok(None);
    };
    if rb <= rs {
        return Err(exec_error(format!(
            "fit_lr_test: the first fit must have more estimated coefficients than the second ({rb} vs {rs})"
        )));
    }
    let chi2 = (2.0 * (lb - ls)).max(0.0);
    let df = (rb - rs) as f64;
    Ok(Some((chi2, df, chi2_sf(chi2, df))))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Likelihood-ratio test of a smaller fit nested in a bigger one, fitted to the same rows: returns \
         {chi2, df, p_value} with chi2 = 2 (loglik_bigger - loglik_smaller) (the deviance difference for \
         Poisson fits) on the difference in estimated coefficients. Refuses fits whose terms are not nested \
         or that used different rows.",
        "fit_lr_test(bigger_fit, smaller_fit)",
    )
    .with_argument("bigger_fit", "The fit with more terms.")
    .with_argument("smaller_fit", "A fit of the same rows whose terms are all in the bigger fit.")
    .with_sql_example(
        "SELECT fit_lr_test(poisson_fit(breaks, km_years, material), poisson_fit(breaks, km_years))['p_value'] AS p\n\
         FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (9, 35.0, 'iron'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});
