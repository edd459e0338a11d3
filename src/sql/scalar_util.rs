//! Helpers shared by the scalar functions: argument arrays, typed access to fit structs.

use std::sync::Arc;

use datafusion::arrow::array::{Array, ArrayRef, AsArray, Float64Array, ListArray, StringArray, StructArray};
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Field, Fields, Float64Type};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::{ColumnarValue, ScalarFunctionArgs};

/// All arguments as arrays of `number_rows` values.
pub fn arg_arrays(args: &ScalarFunctionArgs) -> Result<Vec<ArrayRef>> {
    ColumnarValue::values_to_arrays(&args.args)
}

/// An argument cast to Float64.
pub fn floats(a: &ArrayRef) -> Result<Float64Array> {
    Ok(cast(a, &DataType::Float64)?.as_primitive::<Float64Type>().clone())
}

/// An argument cast to Utf8.
pub fn texts(a: &ArrayRef) -> Result<StringArray> {
    Ok(cast(a, &DataType::Utf8)?.as_string::<i32>().clone())
}

/// Builds a struct of Float64 columns (plus optional extra columns) from per-row options.
pub fn float_struct(names: &[&str], columns: Vec<Vec<Option<f64>>>) -> StructArray {
    let fields = Fields::from(
        names
            .iter()
            .map(|n| Field::new(*n, DataType::Float64, true))
            .collect::<Vec<_>>(),
    );
    let arrays: Vec<ArrayRef> = columns
        .into_iter()
        .map(|c| Arc::new(Float64Array::from(c)) as ArrayRef)
        .collect();
    StructArray::new(fields, arrays, None)
}

pub fn float_struct_type(names: &[&str]) -> DataType {
    DataType::Struct(Fields::from(
        names
            .iter()
            .map(|n| Field::new(*n, DataType::Float64, true))
            .collect::<Vec<_>>(),
    ))
}

pub fn exec_error(msg: String) -> DataFusionError {
    DataFusionError::Execution(msg)
}

/// Read access to a column of fit structs (the result of the fit aggregates).
pub struct FitView<'a> {
    pub fits: &'a StructArray,
    pub terms: &'a ListArray,
    pub term_values: &'a StructArray,
    pub design: &'a ListArray,
    pub design_values: &'a StructArray,
    pub predictors: &'a ListArray,
    pub predictor_values: &'a StructArray,
}

impl<'a> FitView<'a> {
    pub fn new(function: &str, a: &'a ArrayRef) -> Result<FitView<'a>> {
        let bad = || {
            exec_error(format!(
                "{function}: the first argument must be a fit (the result of poisson_fit, poisson_count_fit or linear_fit)"
            ))
        };
        let fits = a.as_struct_opt().ok_or_else(bad)?;
        let list = |name: &str| -> Result<(&'a ListArray, &'a StructArray)> {
            let l = fits
                .column_by_name(name)
                .and_then(|c| c.as_list_opt::<i32>())
                .ok_or_else(bad)?;
            let v = l.values().as_struct_opt().ok_or_else(bad)?;
            Ok((l, v))
        };
        let (terms, term_values) = list("terms")?;
        let (design, design_values) = list("design")?;
        let (predictors, predictor_values) = list("predictors")?;
        Ok(FitView {
            fits,
            terms,
            term_values,
            design,
            design_values,
            predictors,
            predictor_values,
        })
    }

    /// Range of term entries of row `r`.
    pub fn term_range(&self, r: usize) -> std::ops::Range<usize> {
        let o = self.terms.value_offsets();
        o[r] as usize..o[r + 1] as usize
    }

    pub fn predictor_range(&self, r: usize) -> std::ops::Range<usize> {
        let o = self.predictors.value_offsets();
        o[r] as usize..o[r + 1] as usize
    }

    pub fn design_range(&self, r: usize) -> std::ops::Range<usize> {
        let o = self.design.value_offsets();
        o[r] as usize..o[r + 1] as usize
    }

    pub fn fit_text(&self, name: &str, r: usize) -> Option<&'a str> {
        let c = self.fits.column_by_name(name)?.as_string_opt::<i32>()?;
        (!c.is_null(r)).then(|| c.value(r))
    }

    pub fn fit_float(&self, name: &str, r: usize) -> Option<f64> {
        let c = self.fits.column_by_name(name)?.as_primitive_opt::<Float64Type>()?;
        (!c.is_null(r)).then(|| c.value(r))
    }

    pub fn fit_uint(&self, name: &str, r: usize) -> Option<u64> {
        let c = self
            .fits
            .column_by_name(name)?
            .as_primitive_opt::<datafusion::arrow::datatypes::UInt64Type>()?;
        (!c.is_null(r)).then(|| c.value(r))
    }

    pub fn term_text(&self, field: &str, i: usize) -> Option<&'a str> {
        text_at(self.term_values, field, i)
    }

    pub fn term_float(&self, field: &str, i: usize) -> Option<f64> {
        let c = self
            .term_values
            .column_by_name(field)?
            .as_primitive_opt::<Float64Type>()?;
        (!c.is_null(i)).then(|| c.value(i))
    }
}

pub fn text_at<'a>(s: &'a StructArray, field: &str, i: usize) -> Option<&'a str> {
    let c = s.column_by_name(field)?.as_string_opt::<i32>()?;
    (!c.is_null(i)).then(|| c.value(i))
}

pub fn u32_at(s: &StructArray, field: &str, i: usize) -> Option<u32> {
    let c = s
        .column_by_name(field)?
        .as_primitive_opt::<datafusion::arrow::datatypes::UInt32Type>()?;
    (!c.is_null(i)).then(|| c.value(i))
}

/// Coerces all arguments to Float64 after checking their count (`required` of `names`) and that
/// each is numeric.
pub fn numeric_args(function: &str, names: &[&str], required: usize, types: &[DataType]) -> Result<Vec<DataType>> {
    if types.len() < required || types.len() > names.len() {
        return Err(DataFusionError::Plan(format!(
            "{function} takes {} to {} arguments ({}), got {}",
            required,
            names.len(),
            names.join(", "),
            types.len()
        )));
    }
    types
        .iter()
        .zip(names)
        .map(|(t, n)| {
            if t.is_numeric() || matches!(t, DataType::Null) {
                Ok(DataType::Float64)
            } else {
                Err(DataFusionError::Plan(format!(
                    "{function}: {n} must be numeric, got {t}"
                )))
            }
        })
        .collect()
}
