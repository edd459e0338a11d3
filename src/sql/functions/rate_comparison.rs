//! `rate_ratio_test(a, exposure_a, b, exposure_b [, level [, method]])`: two rates compared.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, StringArray, StructArray};
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::common::ScalarValue;
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, floats, numeric_args};
use crate::glm::closed_form::{rate_ratio_exact, rate_ratio_wald};
use crate::sql::model::aggregate::DOC_SECTION;

const NUMBERS: &[&str] = &["ratio", "low", "high", "p_value"];

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct RateRatioTest {
    signature: Signature,
}

pub fn rate_ratio_test() -> ScalarUDF {
    ScalarUDF::from(RateRatioTest {
        signature: Signature::user_defined(Volatility::Immutable),
    })
}

fn fields() -> Fields {
    let mut f: Vec<Field> = NUMBERS
        .iter()
        .map(|n| Field::new(*n, DataType::Float64, true))
        .collect();
    f.push(Field::new("method", DataType::Utf8, true));
    Fields::from(f)
}

impl ScalarUDFImpl for RateRatioTest {
    fn name(&self) -> &str {
        "rate_ratio_test"
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        let names = ["events_a", "exposure_a", "events_b", "exposure_b", "level"];
        if arg_types.len() == 6 {
            let mut t = numeric_args("rate_ratio_test", &names, 5, &arg_types[..5])?;
            t.push(DataType::Utf8);
            return Ok(t);
        }
        numeric_args("rate_ratio_test", &names, 4, arg_types)
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Struct(fields()))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let method = match args.args.get(5) {
            None => "exact".to_string(),
            Some(ColumnarValue::Scalar(ScalarValue::Utf8(Some(m)))) => m.to_ascii_lowercase(),
            Some(_) => {
                return Err(DataFusionError::Plan(
                    "rate_ratio_test: method must be the literal 'exact' or 'wald'".into(),
                ));
            }
        };
        if method != "exact" && method != "wald" {
            return Err(DataFusionError::Plan(format!(
                "rate_ratio_test: method '{method}' is not valid; valid methods are exact, wald"
            )));
        }
        let a = arg_arrays(&args)?;
        let v: Vec<_> = a[..4].iter().map(floats).collect::<Result<_>>()?;
        let level = a.get(4).map(floats).transpose()?;
        let mut cols: Vec<Vec<Option<f64>>> = vec![Vec::with_capacity(args.number_rows); 4];
        let mut methods = Vec::with_capacity(args.number_rows);
        for r in 0..args.number_rows {
            let lv = match &level {
                Some(l) if l.is_null(r) => None,
                Some(l) => Some(l.value(r)),
                None => Some(0.95),
            };
            let out = match (v.iter().any(|c| c.is_null(r)), lv) {
                (false, Some(lv)) => {
                    let (x, tx, y, ty) = (v[0].value(r), v[1].value(r), v[2].value(r), v[3].value(r));
                    let result = if method == "exact" {
                        rate_ratio_exact(x, tx, y, ty, lv)
                    } else {
                        rate_ratio_wald(x, tx, y, ty, lv)
                    };
                    Some(result.map_err(|e| exec_error(format!("rate_ratio_test: {e}")))?)
                }
                _ => None,
            };
            let finite = |x: f64| x.is_finite().then_some(x);
            cols[0].push(out.and_then(|o| finite(o.ratio)));
            cols[1].push(out.and_then(|o| finite(o.low)));
            cols[2].push(out.and_then(|o| finite(o.high)));
            cols[3].push(out.map(|o| o.p_value));
            methods.push(out.map(|_| method.clone()));
        }
        let mut arrays: Vec<ArrayRef> = cols
            .into_iter()
            .map(|c| Arc::new(datafusion::arrow::array::Float64Array::from(c)) as ArrayRef)
            .collect();
        arrays.push(Arc::new(StringArray::from(methods)));
        Ok(ColumnarValue::Array(Arc::new(StructArray::new(fields(), arrays, None))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Compares two rates a/exposure_a and b/exposure_b. Returns {ratio, low, high, p_value, method}. \
         'exact' (default): conditional binomial interval (Clopper-Pearson on a out of a + b) and the \
         two-sided binomial test of ratio 1; 'wald': exp(log ratio +/- z*sqrt(1/a + 1/b)) and the z test. \
         An infinite ratio or limit (no events in the second group) is returned as NULL.",
        "rate_ratio_test(events_a, exposure_a, events_b, exposure_b [, level [, method]])",
    )
    .with_argument("events_a", "Events in the first group (whole number >= 0).")
    .with_argument("exposure_a", "Exposure of the first group (> 0).")
    .with_argument("events_b", "Events in the second group.")
    .with_argument("exposure_b", "Exposure of the second group.")
    .with_argument("level", "Confidence level, default 0.95.")
    .with_argument("method", "'exact' (default) or 'wald'.")
    .with_sql_example("SELECT rate_ratio_test(32, 52407, 2, 18790)['p_value'] AS p;")
    .build()
});
