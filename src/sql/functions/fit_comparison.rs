//! `fit_lr_test(bigger, smaller)`: likelihood-ratio (or F) test of two nested fits of the same rows.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{ArrayRef, Float64Array, StringArray, StructArray};
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};
use statrs::distribution::{ContinuousCDF, FisherSnedecor};

use super::args::{arg_arrays, exec_error};
use crate::glm::distributions::chi2_sf;
use crate::glm::{FamilyKind, SeType};
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::model::fields::Range;
use crate::sql::model::fields::{FitField, FitReader, TermField};

/// The result fields: `chi2` (likelihood-ratio test) or `f` (F test, when the bigger fit has
/// quasi standard errors) with `df` (and `df_denominator`, the F test's), `p_value`,
/// `method` (`lr` or `f`) and `nesting` (`terms` when the smaller fit's terms are all in the
/// bigger one, `assumed` when the caller vouches for it).
const FLOAT_FIELDS: &[&str] = &["chi2", "f", "df", "df_denominator", "p_value"];
const TEXT_FIELDS: &[&str] = &["method", "nesting"];

fn result_fields() -> Fields {
    FLOAT_FIELDS
        .iter()
        .map(|n| Field::new(*n, DataType::Float64, true))
        .chain(TEXT_FIELDS.iter().map(|n| Field::new(*n, DataType::Utf8, true)))
        .collect()
}

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
        Ok(DataType::Struct(result_fields()))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let big = FitReader::new("fit_lr_test", &a[0])?;
        let small = FitReader::new("fit_lr_test", &a[1])?;
        let mut tests = Vec::with_capacity(args.number_rows);
        for r in 0..args.number_rows {
            tests.push(if big.is_null(r) || small.is_null(r) {
                None
            } else {
                compare(&big, &small, r)?
            });
        }
        let float = |f: fn(&Comparison) -> Option<f64>, range: Range| -> ArrayRef {
            Arc::new(Float64Array::from_iter(
                tests.iter().map(|t| range.report(t.as_ref().and_then(f))),
            ))
        };
        let text = |f: fn(&Comparison) -> &'static str| -> ArrayRef {
            Arc::new(StringArray::from_iter(tests.iter().map(|t| t.as_ref().map(f))))
        };
        let columns = vec![
            float(|t| (t.method == Method::Lr).then_some(t.statistic), Range::NonNegative),
            float(|t| (t.method == Method::F).then_some(t.statistic), Range::NonNegative),
            float(|t| Some(t.df), Range::Any),
            float(|t| t.df_resid, Range::Any),
            float(|t| Some(t.p_value), Range::Probability),
            text(|t| t.method.name()),
            text(|t| t.nesting),
        ];
        Ok(ColumnarValue::Array(Arc::new(StructArray::new(
            result_fields(),
            columns,
            None,
        ))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Method {
    /// Likelihood ratio: chi2 = 2 (loglik_bigger - loglik_smaller) on df.
    Lr,
    /// F = (D_smaller - D_bigger) / (df · dispersion_bigger) on (df, df_resid_bigger).
    F,
}

impl Method {
    fn name(&self) -> &'static str {
        match self {
            Method::Lr => "lr",
            Method::F => "f",
        }
    }
}

struct Comparison {
    method: Method,
    statistic: f64,
    df: f64,
    df_resid: Option<f64>,
    p_value: f64,
    nesting: &'static str,
}

/// Compares row `r` of the two fit columns. Refuses pairs that provably cannot be nested:
/// other families, other rows (n_used, totals), a smaller fit that is not smaller (as many
/// estimated coefficients or more) or that fits better (a smaller deviance). Nesting itself
/// cannot be proved from two fit structs; when the term names do not nest (a linear trend
/// against its factor, merged levels) the test is computed with `nesting` = `assumed`.
fn compare(big: &FitReader<'_>, small: &FitReader<'_>, r: usize) -> Result<Option<Comparison>> {
    let same = |field: FitField| match (big.float(field, r), small.float(field, r)) {
        (Some(x), Some(y)) => (x - y).abs() <= 1e-9 * x.abs().max(y.abs()),
        (None, None) => true,
        _ => false,
    };
    if big.family(r) != small.family(r) {
        return Err(exec_error("fit_lr_test: the two fits are of different families".into()));
    }
    // Least-squares fits have no totals; their null deviance (the response's sum of squares
    // about its mean) tells the same rows and response apart instead.
    let gaussian = big.family(r) == Some(FamilyKind::Gaussian);
    if big.uint(FitField::NUsed, r) != small.uint(FitField::NUsed, r)
        || !same(FitField::TotalCount)
        || !same(FitField::TotalExposure)
        || (gaussian && !same(FitField::NullDeviance))
    {
        return Err(exec_error(format!(
            "fit_lr_test: the fits used different rows (n_used {:?} vs {:?}); compare fits of the same rows",
            big.uint(FitField::NUsed, r),
            small.uint(FitField::NUsed, r)
        )));
    }
    let (Some(lb), Some(ls), Some(rb), Some(rs), Some(db), Some(ds)) = (
        big.float(FitField::Loglik, r),
        small.float(FitField::Loglik, r),
        big.uint(FitField::Rank, r),
        small.uint(FitField::Rank, r),
        big.float(FitField::Deviance, r),
        small.float(FitField::Deviance, r),
    ) else {
        return Ok(None);
    };
    if rb < rs {
        return Err(exec_error(format!(
            "fit_lr_test: the first fit must have more estimated coefficients than the second ({rb} vs {rs}); \
             give the bigger fit first"
        )));
    }
    if rb == rs {
        // Nothing to test in this group (a factor with one level here, no events): NULL, so that
        // one such group does not stop a per-group query.
        return Ok(None);
    }
    if ds < db - 1e-9 * db.abs().max(1.0) {
        return Err(exec_error(format!(
            "fit_lr_test: the second fit has the smaller deviance ({ds} vs {db}), so it cannot be a special case \
             of the first; give the bigger fit first"
        )));
    }
    let big_terms: Vec<&str> = big
        .term_range(r)
        .filter_map(|i| big.term_text(TermField::Term, i))
        .collect();
    let nested = small
        .term_range(r)
        .filter_map(|i| small.term_text(TermField::Term, i))
        .all(|t| big_terms.contains(&t));
    let nesting = if nested { "terms" } else { "assumed" };
    let df = (rb - rs) as f64;
    // Families with an estimated scale (least squares), and fits with quasi standard errors,
    // compare by F on the bigger fit's dispersion, as their own model test does.
    let estimated_scale = big.family(r).is_some_and(|f| f.family().scale().uses_t());
    if estimated_scale || big.text(FitField::SeType, r) == Some(SeType::Quasi.name()) {
        let (Some(dispersion), Some(df_resid)) = (big.float(FitField::Dispersion, r), big.uint(FitField::DfResid, r))
        else {
            return Ok(None);
        };
        if !(dispersion > 0.0) || df_resid == 0 {
            return Ok(None);
        }
        let f = (ds - db).max(0.0) / (df * dispersion);
        let Ok(dist) = FisherSnedecor::new(df, df_resid as f64) else {
            return Ok(None);
        };
        return Ok(Some(Comparison {
            method: Method::F,
            statistic: f,
            df,
            df_resid: Some(df_resid as f64),
            p_value: dist.sf(f),
            nesting,
        }));
    }
    let chi2 = (2.0 * (lb - ls)).max(0.0);
    Ok(Some(Comparison {
        method: Method::Lr,
        statistic: chi2,
        df,
        df_resid: None,
        p_value: chi2_sf(chi2, df),
        nesting,
    }))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Compares a bigger fit with a smaller one that is a special case of it, both fitted to the same rows. \
         Returns {chi2, f, df, df_denominator, p_value, method, nesting}. method 'lr': chi2 = 2 (loglik_bigger - \
         loglik_smaller) (the deviance difference for Poisson fits) on df = the difference in estimated \
         coefficients. method 'f' (least-squares fits, and fits whose bigger fit has se=quasi): f = \
         (deviance_smaller - deviance_bigger) / (df * dispersion_bigger) on (df, df_denominator = df_resid of the \
         bigger fit). NULL when the two fits have as many estimated coefficients (nothing to test in that group). nesting is 'terms' when every term of \
         the smaller fit is in the bigger one, and 'assumed' otherwise (a linear trend against its factor, \
         merged levels): the test is then only valid if the smaller model really is a special case. Refuses \
         fits of other families or other rows, and a second fit with as many coefficients or a smaller deviance.",
        "fit_lr_test(bigger_fit, smaller_fit)",
    )
    .with_argument("bigger_fit", "The fit with more estimated coefficients.")
    .with_argument("smaller_fit", "A fit of the same rows whose model is a special case of the bigger one.")
    .with_sql_example(
        "SELECT fit_lr_test(poisson_fit(breaks, km_years, material), poisson_fit(breaks, km_years))['p_value'] AS p\n\
         FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (9, 35.0, 'iron'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});
