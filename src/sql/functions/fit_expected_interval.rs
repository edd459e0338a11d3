//! `fit_expected_interval(fit, exposure, predictor, ... [, 'options'])`: a row's expected value
//! with a confidence interval.
//!
//! Delta method on the linear predictor: eta = log(exposure) + x'b with variance x' V x (V the
//! coefficient covariance behind the fit's standard errors, stored in the fit), the interval
//! eta ± q·sqrt(x' V x) (q normal, or t on df_resid for least-squares fits), mapped through the
//! inverse link: exp for log-link fits, so the interval stays positive.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, Float64Array, StructArray};
use datafusion::arrow::buffer::NullBuffer;
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, floats, texts};
use super::fit_expected::{ScoringRow, predictor_values, scoring_row};
use crate::glm::Scale;
use crate::glm::inference::wald_quantile;
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::model::fields::{FitField, FitReader};

const FIELDS: &[&str] = &["expected", "low", "high"];

fn fields() -> Fields {
    FIELDS.iter().map(|n| Field::new(*n, DataType::Float64, true)).collect()
}

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FitExpectedInterval {
    signature: Signature,
}

pub fn fit_expected_interval() -> ScalarUDF {
    ScalarUDF::from(FitExpectedInterval {
        signature: Signature::user_defined(Volatility::Immutable),
    })
}

/// The level from an options string `'level=0.9'` (the only key this function takes).
fn level_option(text: &str) -> Result<f64> {
    let mut level = 0.95;
    for item in text.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        match item.split_once('=').map(|(k, v)| (k.trim(), v.trim())) {
            Some(("level", v)) => {
                level = v.parse::<f64>().ok().filter(|l| *l > 0.0 && *l < 1.0).ok_or_else(|| {
                    exec_error(format!(
                        "fit_expected_interval: level={v} is not valid: expected a number strictly between 0 and 1"
                    ))
                })?;
            }
            _ => {
                return Err(exec_error(format!(
                    "fit_expected_interval: option '{item}' is not valid; valid keys: level"
                )));
            }
        }
    }
    Ok(level)
}

impl ScalarUDFImpl for FitExpectedInterval {
    fn name(&self) -> &str {
        "fit_expected_interval"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        super::args::scoring_arg_types(
            "fit_expected_interval",
            "a fit, an exposure, the fit's predictors in order and an optional options string",
            arg_types,
        )
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Struct(fields()))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let view = FitReader::new("fit_expected_interval", &a[0])?;
        let exposure = floats(&a[1])?;
        let given = a.len() - 2;
        // The options string is the argument after the fit's predictors: the fit says how many
        // predictors it has, so a text predictor is never taken for options.
        let values = predictor_values("fit_expected_interval", &a[2..])?;
        let options = if given > 0 { texts(&a[a.len() - 1]).ok() } else { None };
        let mut columns = vec![Vec::with_capacity(args.number_rows); 3];
        let mut valid = Vec::with_capacity(args.number_rows);
        for r in 0..args.number_rows {
            let mut interval = None;
            if !view.is_null(r) {
                let n_predictors = view.predictor_range(r).len();
                let level = match (given.checked_sub(n_predictors), &options) {
                    (Some(0), _) => 0.95,
                    (Some(1), Some(o)) if o.is_null(r) => 0.95,
                    (Some(1), Some(o)) => level_option(o.value(r))?,
                    _ => {
                        return Err(exec_error(format!(
                            "fit_expected_interval: the fit has {n_predictors} predictors but {given} values were \
                             given (the predictors in the order of the fit call, then an optional 'level=...')"
                        )));
                    }
                };
                let values = &values[..n_predictors];
                if let Some(row) = scoring_row("fit_expected_interval", &view, &exposure, values, r)? {
                    interval = interval_of(&view, &row, level, r);
                }
            }
            valid.push(interval.is_some());
            let (e, l, h) = interval.map_or((None, None, None), |(e, l, h)| (Some(e), Some(l), Some(h)));
            columns[0].push(e);
            columns[1].push(l);
            columns[2].push(h);
        }
        let arrays: Vec<ArrayRef> = columns
            .into_iter()
            .map(|c| Arc::new(Float64Array::from(c)) as ArrayRef)
            .collect();
        Ok(ColumnarValue::Array(Arc::new(StructArray::new(
            fields(),
            arrays,
            Some(NullBuffer::from(valid)),
        ))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

/// (expected, low, high) of scored row `r` of `view`.
fn interval_of(view: &FitReader<'_>, row: &ScoringRow, level: f64, r: usize) -> Option<(f64, f64, f64)> {
    let mut variance = 0.0;
    for &(a, xa, _) in &row.parts {
        for &(b, xb, _) in &row.parts {
            variance += xa * xb * view.covariance(r, a, b)?;
        }
    }
    let scale = if row.gaussian { Scale::Estimated } else { Scale::Fixed };
    let df = view.uint(FitField::DfResid, r).map(|d| d as usize);
    let q = wald_quantile(scale, df, level)?;
    let (eta, se) = (row.eta(), variance.max(0.0).sqrt());
    let out = (row.mean(eta), row.mean(eta - q * se), row.mean(eta + q * se));
    (out.0.is_finite() && out.1.is_finite() && out.2.is_finite()).then_some(out)
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Expected value of a row under a fit with a confidence interval: {expected, low, high}. The delta \
         method on the linear predictor (the fit's coefficient covariance, as its se option chose it), mapped \
         through the inverse link, so log-link intervals stay positive. Give the predictors in the order of the \
         fit call, then optionally 'level=0.9' (default 0.95). NULL where fit_expected is NULL.",
        "fit_expected_interval(fit, exposure, predictor, ... [, 'level=0.9'])",
    )
    .with_argument("fit", "A fit returned by one of the fit functions.")
    .with_argument("exposure", "Exposure of the row (use 1 for count fits).")
    .with_argument("predictor", "The row's predictor values, in the order of the fit call.")
    .with_sql_example(
        "WITH rows AS (SELECT * FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (9, 35.0, 'iron'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material)),\n\
         f AS (SELECT poisson_fit(breaks, km_years, material) AS fit FROM rows)\n\
         SELECT fit_expected_interval(fit, 100.0, 'pvc', 'level=0.9')['high'] AS upper_expected_breaks FROM f;",
    )
    .build()
});
