//! `fit_expected(fit, exposure, predictor, ...)`: expected value of each row under a fit.
//!
//! For Poisson fits: exposure x exp(x'b); for linear fits: x'b (the exposure is ignored). The
//! predictors are given in the same order as in the fit call. NULL when the fit or a value is
//! NULL, when a factor value did not occur in the fitted group (no coefficient exists for it),
//! or when the row needs a coefficient that has no finite estimate (boundary, not estimated).
//! Aliased terms count as 0, as they carry no information beyond the other terms.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, Float64Array, StringArray};
use datafusion::arrow::datatypes::DataType;
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, floats, texts};
use crate::glm::{FamilyKind, TermState};
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::model::fields::{DesignField, FitReader, PredictorField, TermField};
use crate::sql::model::spec::PredictorKind;

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FitExpected {
    signature: Signature,
}

pub fn fit_expected() -> ScalarUDF {
    ScalarUDF::from(FitExpected {
        signature: Signature::user_defined(Volatility::Immutable),
    })
}

/// A row's predictor value.
/// One predictor argument's values.
pub(crate) enum Value {
    Number(Float64Array),
    Text(StringArray),
}

/// The predictor arguments, decoded with the same rule as the fits: text, boolean and
/// dictionary values are factor levels, numbers are numbers.
pub(crate) fn predictor_values(function: &str, arrays: &[ArrayRef]) -> Result<Vec<Value>> {
    arrays
        .iter()
        .enumerate()
        .map(|(k, x)| {
            let kind = PredictorKind::of(function, &format!("{}", k + 1), x.data_type())?;
            Ok(if kind.is_factor() {
                Value::Text(texts(x)?)
            } else {
                Value::Number(floats(x)?)
            })
        })
        .collect()
}

impl ScalarUDFImpl for FitExpected {
    fn name(&self) -> &str {
        "fit_expected"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        super::args::scoring_arg_types(
            "fit_expected",
            "a fit, an exposure and the fit's predictors in order",
            arg_types,
        )
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Float64)
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let view = FitReader::new("fit_expected", &a[0])?;
        let exposure = floats(&a[1])?;
        let values = predictor_values("fit_expected", &a[2..])?;
        let mut out = Vec::with_capacity(args.number_rows);
        for r in 0..args.number_rows {
            let row = scoring_row("fit_expected", &view, &exposure, &values, r)?;
            out.push(row.map(|row| row.mean(row.eta())).filter(|v| v.is_finite()));
        }
        Ok(ColumnarValue::Array(Arc::new(Float64Array::from(out)) as ArrayRef))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

/// A row to score: the fit's coefficients that the row's design vector meets.
pub(crate) struct ScoringRow {
    /// (term index within the row's terms, x_j, b_j) for every estimated term.
    pub parts: Vec<(usize, f64, f64)>,
    /// log(exposure), or 0 for least-squares fits.
    pub offset: f64,
    pub gaussian: bool,
}

impl ScoringRow {
    /// x'b plus the offset.
    pub fn eta(&self) -> f64 {
        self.offset + self.parts.iter().map(|(_, x, b)| x * b).sum::<f64>()
    }

    /// The mean at linear predictor `eta`: exp(eta) for log-link fits, eta for least squares.
    pub fn mean(&self, eta: f64) -> f64 {
        if self.gaussian { eta } else { eta.exp() }
    }
}

/// The design vector of row `r` against the fit of that row, or `None` when the row cannot be
/// scored (a NULL value, a factor level the fit never saw, a needed coefficient without a
/// finite estimate).
pub(crate) fn scoring_row(
    function: &str,
    view: &FitReader<'_>,
    exposure: &Float64Array,
    values: &[Value],
    r: usize,
) -> Result<Option<ScoringRow>> {
    if view.is_null(r) || exposure.is_null(r) {
        return Ok(None);
    }
    let predictors = view.predictor_range(r);
    if predictors.len() != values.len() {
        return Err(exec_error(format!(
            "{function}: the fit has {} predictors but {} were given (give them in the order of the fit call)",
            predictors.len(),
            values.len()
        )));
    }
    // Check kinds and find unseen factor levels.
    for (k, p) in predictors.clone().enumerate() {
        let name = view.predictor_text(PredictorField::Name, p).unwrap_or("?");
        let factor = view.predictor_is_factor(p);
        match (&values[k], factor) {
            (Value::Number(v), false) if v.is_null(r) => return Ok(None),
            (Value::Number(_), false) => {}
            (Value::Text(v), true) => {
                if v.is_null(r) {
                    return Ok(None);
                }
                let level = v.value(r);
                let known = view.predictor_text(PredictorField::Reference, p) == Some(level)
                    || view.design_range(r).any(|d| {
                        (view.design_index(DesignField::Predictor, d) == Some(k as u32)
                            && view.design_text(DesignField::Level, d) == Some(level))
                            || (view.design_index(DesignField::Predictor2, d) == Some(k as u32)
                                && view.design_text(DesignField::Level2, d) == Some(level))
                    });
                if !known {
                    return Ok(None);
                }
            }
            (_, true) => {
                return Err(exec_error(format!(
                    "{function}: predictor {} ({name}) is a factor in the fit, so its value must be text or boolean",
                    k + 1
                )));
            }
            (_, false) => {
                return Err(exec_error(format!(
                    "{function}: predictor {} ({name}) is numeric in the fit, so its value must be a number",
                    k + 1
                )));
            }
        }
    }
    let part_value = |p: Option<u32>, level: Option<&str>| -> f64 {
        match (p, level) {
            (None, _) => 1.0,
            (Some(k), None) => match &values[k as usize] {
                Value::Number(v) => v.value(r),
                Value::Text(_) => f64::NAN,
            },
            (Some(k), Some(l)) => match &values[k as usize] {
                Value::Text(v) => f64::from(u8::from(v.value(r) == l)),
                Value::Number(_) => f64::NAN,
            },
        }
    };
    let terms = view.term_range(r);
    let design = view.design_range(r);
    if terms.len() != design.len() || terms.is_empty() {
        return Ok(None);
    }
    let mut parts = Vec::new();
    for (j, (t, d)) in terms.zip(design).enumerate() {
        let x = part_value(
            view.design_index(DesignField::Predictor, d),
            view.design_text(DesignField::Level, d),
        ) * match view.design_index(DesignField::Predictor2, d) {
            None => 1.0,
            Some(k) => part_value(Some(k), view.design_text(DesignField::Level2, d)),
        };
        match (
            view.term_float(TermField::Estimate, t),
            view.term_text(TermField::Flag, t),
        ) {
            (Some(b), _) => parts.push((j, x, b)),
            (None, Some(flag)) if flag == TermState::Aliased.flag().unwrap_or_default() => {}
            (None, _) if x == 0.0 => {}
            (None, _) => return Ok(None),
        }
    }
    let gaussian = view.family(r) == Some(FamilyKind::Gaussian);
    Ok(Some(ScoringRow {
        parts,
        offset: if gaussian { 0.0 } else { exposure.value(r).ln() },
        gaussian,
    }))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Expected count of a row under a fit: exposure * exp(x'b) for Poisson and negative binomial fits (x'b for \
         linear fits). \
         Give the predictors in the order of the fit call. NULL when a factor value did not occur in the \
         fitted group or a needed coefficient has no finite estimate. Join fits back to rows to compare \
         observed with expected counts: SUM(count) / SUM(fit_expected(...)) per area.",
        "fit_expected(fit, exposure, predictor, ...)",
    )
    .with_argument("fit", "A fit returned by one of the fit functions.")
    .with_argument("exposure", "Exposure of the row (use 1 for count fits).")
    .with_argument("predictor", "The row's predictor values, in the order of the fit call.")
    .with_sql_example(
        "WITH rows AS (SELECT * FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (9, 35.0, 'iron'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material)),\n\
         f AS (SELECT poisson_fit(breaks, km_years, material) AS fit FROM rows)\n\
         SELECT SUM(breaks) / SUM(fit_expected(fit, km_years, material)) AS observed_over_expected FROM rows CROSS JOIN f;",
    )
    .build()
});
