//! `standardized_rate_ratio(a, b [, 'level=0.9'])`: the ratio of two directly standardised
//! rates (`standardized_rate` results) with the F interval of `glm::standardize`.
//!
//! Both rates must use the same `per` and `method`; the level defaults to the first rate's.
//! Result: `{ratio, low, high, method, level, status}`.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, AsArray, Float64Array, StringArray, StructArray};
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::{
    ColumnarValue, Documentation, ScalarFunctionArgs, ScalarUDF, ScalarUDFImpl, Signature, Volatility,
};

use super::args::{arg_arrays, exec_error, floats, texts};
use crate::glm::standardize::{GammaMoments, direct_rate_ratio};
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::model::options::{parse_level, parse_pairs};

const NAME: &str = "standardized_rate_ratio";

#[derive(Debug, PartialEq, Eq, Hash)]
pub struct StandardizedRateRatio {
    signature: Signature,
}

pub fn standardized_rate_ratio() -> ScalarUDF {
    ScalarUDF::from(StandardizedRateRatio {
        signature: Signature::user_defined(Volatility::Immutable),
    })
}

fn fields() -> Fields {
    Fields::from(vec![
        Field::new("ratio", DataType::Float64, true),
        Field::new("low", DataType::Float64, true),
        Field::new("high", DataType::Float64, true),
        Field::new("method", DataType::Utf8, true),
        Field::new("level", DataType::Float64, true),
        Field::new("status", DataType::Utf8, true),
    ])
}

/// The columns of one `standardized_rate` result argument.
struct RateColumns {
    rate: Float64Array,
    std_error: Float64Array,
    shift_mean: Float64Array,
    shift_variance: Float64Array,
    per: Float64Array,
    level: Float64Array,
    method: StringArray,
}

impl RateColumns {
    fn new(position: &str, a: &ArrayRef) -> Result<RateColumns> {
        let not_a_rate = || {
            exec_error(format!(
                "{NAME}: the {position} argument must be a standardized_rate(...) result (a struct with rate, \
                 std_error, shift_mean, shift_variance, per, level and method), got {}",
                a.data_type()
            ))
        };
        let s: &StructArray = a.as_struct_opt().ok_or_else(not_a_rate)?;
        let column = |name: &str| s.column_by_name(name).ok_or_else(not_a_rate);
        Ok(RateColumns {
            rate: floats(column("rate")?)?,
            std_error: floats(column("std_error")?)?,
            shift_mean: floats(column("shift_mean")?)?,
            shift_variance: floats(column("shift_variance")?)?,
            per: floats(column("per")?)?,
            level: floats(column("level")?)?,
            method: texts(column("method")?)?,
        })
    }

    /// The gamma moments of row `r`; `None` when the rate is NULL.
    fn moments(&self, r: usize) -> Option<GammaMoments> {
        let all = [&self.rate, &self.std_error, &self.shift_mean, &self.shift_variance];
        if all.iter().any(|c| c.is_null(r)) {
            return None;
        }
        Some(GammaMoments {
            mean: self.rate.value(r),
            variance: self.std_error.value(r).powi(2),
            shift_mean: self.shift_mean.value(r),
            shift_variance: self.shift_variance.value(r),
        })
    }

    fn text(&self, r: usize) -> Option<&str> {
        (!self.method.is_null(r)).then(|| self.method.value(r))
    }

    fn number(c: &Float64Array, r: usize) -> Option<f64> {
        (!c.is_null(r)).then(|| c.value(r))
    }
}

fn level_option(text: &str) -> Result<Option<f64>> {
    let mut level = None;
    for (key, value) in parse_pairs(text, NAME, &["level"])? {
        if key != "level" {
            return Err(exec_error(format!("{NAME}: unknown option '{key}'; valid keys: level")));
        }
        let v = parse_level(&value).ok_or_else(|| {
            exec_error(format!(
                "{NAME}: level={value} is not valid: expected a number strictly between 0 and 1"
            ))
        })?;
        level = Some(v);
    }
    Ok(level)
}

impl ScalarUDFImpl for StandardizedRateRatio {
    fn name(&self) -> &str {
        NAME
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        if !(2..=3).contains(&arg_types.len()) {
            return Err(DataFusionError::Plan(format!(
                "{NAME} takes two standardized_rate(...) results and an optional options string; got {} arguments",
                arg_types.len()
            )));
        }
        Ok(arg_types.to_vec())
    }
    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(DataType::Struct(fields()))
    }
    fn invoke_with_args(&self, args: ScalarFunctionArgs) -> Result<ColumnarValue> {
        let a = arg_arrays(&args)?;
        let num = RateColumns::new("first", &a[0])?;
        let den = RateColumns::new("second", &a[1])?;
        let options = a.get(2).map(texts).transpose()?;
        let n = args.number_rows;
        let (mut ratio, mut low, mut high, mut level_col) = (vec![], vec![], vec![], vec![]);
        let (mut method, mut status) = (Vec::with_capacity(n), Vec::with_capacity(n));
        for r in 0..n {
            let given = match &options {
                Some(o) if !o.is_null(r) => level_option(o.value(r))?,
                _ => None,
            };
            let level = given.or(RateColumns::number(&num.level, r)).unwrap_or(0.95);
            let (pn, pd) = (RateColumns::number(&num.per, r), RateColumns::number(&den.per, r));
            if let (Some(pn), Some(pd)) = (pn, pd) {
                if pn != pd {
                    return Err(exec_error(format!(
                        "{NAME}: the two rates are per different amounts of exposure (per={pn} and per={pd}); \
                         give both standardized_rate calls the same 'per=...'"
                    )));
                }
            }
            let (mn, md) = (num.text(r), den.text(r));
            if let (Some(mn), Some(md)) = (mn, md) {
                if mn != md {
                    return Err(exec_error(format!(
                        "{NAME}: the two rates use different interval methods ({mn} and {md}); give both \
                         standardized_rate calls the same 'method=...'"
                    )));
                }
            }
            let out = match (num.moments(r), den.moments(r)) {
                (Some(x), Some(y)) => {
                    let i = direct_rate_ratio(x, y, level);
                    let note = if i.ratio.is_some() {
                        "ok".to_string()
                    } else {
                        "second rate is 0 (the ratio is undefined and the upper limit infinite; low is reported)"
                            .to_string()
                    };
                    (i.ratio, Some(i.low), i.high.is_finite().then_some(i.high), note)
                }
                _ => (
                    None,
                    None,
                    None,
                    "a rate is NULL (see the standardized_rate status)".to_string(),
                ),
            };
            ratio.push(out.0);
            low.push(out.1);
            high.push(out.2);
            level_col.push(Some(level));
            method.push(mn.or(md).map(str::to_string));
            status.push(Some(out.3));
        }
        let arrays: Vec<ArrayRef> = vec![
            Arc::new(Float64Array::from(ratio)),
            Arc::new(Float64Array::from(low)),
            Arc::new(Float64Array::from(high)),
            Arc::new(StringArray::from(method)),
            Arc::new(Float64Array::from(level_col)),
            Arc::new(StringArray::from(status)),
        ];
        Ok(ColumnarValue::Array(Arc::new(StructArray::new(fields(), arrays, None))))
    }
    fn documentation(&self) -> Option<&Documentation> {
        Some(&DOC)
    }
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Ratio of two directly standardised rates (two standardized_rate results with the same per and \
         method) with an F interval: each rate's gamma distribution (mean rate, variance std_error^2) read \
         as a confidence distribution, low = (y1/y2*) F(alpha/2; 2a1, 2a2*), high = (y1*/y2) F(1-alpha/2; \
         2a1*, 2a2), a = y^2/v, starred moments shifted as in the rate's own upper limit. With one stratum \
         per area this is the exact conditional interval for two Poisson rates. Returns {ratio, low, high, \
         method, level, status}; the level defaults to the first rate's.",
        "standardized_rate_ratio(rate_a, rate_b [, 'level=0.9'])",
    )
    .with_argument("rate_a", "A standardized_rate(...) result (numerator).")
    .with_argument("rate_b", "A standardized_rate(...) result (denominator).")
    .with_argument("options", "Optional literal 'level=...'.")
    .with_sql_example(
        "WITH r AS (SELECT area, standardized_rate(events, exposure, standard) AS dsr\n\
           FROM (VALUES ('north', 3, 1200.0, 0.6), ('north', 9, 800.0, 0.4),\n\
                        ('south', 1, 400.0, 0.6), ('south', 12, 1500.0, 0.4)) AS t(area, events, exposure, standard)\n\
           GROUP BY area)\n\
         SELECT standardized_rate_ratio(n.dsr, s.dsr)['high'] AS upper_north_vs_south\n\
         FROM r AS n, r AS s WHERE n.area = 'north' AND s.area = 'south';",
    )
    .build()
});
