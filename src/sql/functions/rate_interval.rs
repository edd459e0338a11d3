//! `rate_interval(events, exposure [, level])`: a rate with its exact (Garwood) interval.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::Array;
use datafusion::arrow::datatypes::DataType;
use datafusion::error::Result;
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, float_struct, float_struct_type, floats, numeric_args};
use crate::glm::closed_form;
use crate::sql::model::aggregate::DOC_SECTION;

const FIELDS: &[&str] = &["rate", "low", "high"];

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct RateInterval {
    signature: Signature,
}

pub fn rate_interval() -> ScalarUDF {
    ScalarUDF::from(RateInterval {
        signature: Signature::user_defined(Volatility::Immutable),
    })
}

impl ScalarUDFImpl for RateInterval {
    fn name(&self) -> &str {
        "rate_interval"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        numeric_args("rate_interval", &["events", "exposure", "level"], 2, arg_types)
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(float_struct_type(FIELDS))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let events = floats(&a[0])?;
        let exposure = floats(&a[1])?;
        let level = a.get(2).map(floats).transpose()?;
        let mut cols = vec![Vec::with_capacity(args.number_rows); 3];
        for r in 0..args.number_rows {
            let lv = match &level {
                Some(l) if l.is_null(r) => None,
                Some(l) => Some(l.value(r)),
                None => Some(0.95),
            };
            let out = match (events.is_null(r) || exposure.is_null(r), lv) {
                (false, Some(lv)) => Some(
                    closed_form::rate_interval(events.value(r), exposure.value(r), lv)
                        .map_err(|e| exec_error(format!("rate_interval: {e}")))?,
                ),
                _ => None,
            };
            cols[0].push(out.map(|o| o.rate));
            cols[1].push(out.map(|o| o.low));
            cols[2].push(out.map(|o| o.high));
        }
        Ok(ColumnarValue::Array(Arc::new(float_struct(FIELDS, cols))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Returns {rate, low, high}: events / exposure with its exact Poisson (Garwood) confidence interval, \
         low = chi2 quantile((1-level)/2, 2x)/2 / exposure (0 when x = 0), \
         high = chi2 quantile((1+level)/2, 2x+2)/2 / exposure. Events must be a whole number >= 0.",
        "rate_interval(events, exposure [, level])",
    )
    .with_argument("events", "Number of events (whole number >= 0).")
    .with_argument("exposure", "Exposure (> 0).")
    .with_argument("level", "Confidence level, default 0.95.")
    .with_sql_example("SELECT rate_interval(5, 1000)['high'] AS upper_rate;")
    .build()
});
