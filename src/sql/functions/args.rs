//! Helpers shared by the scalar functions: argument arrays and result structs. Fits are read
//! with `model::fields::FitReader`.

use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, AsArray, Float64Array, StringArray, StructArray};
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

/// Whether `t` is a text type.
pub fn is_text(t: &DataType) -> bool {
    matches!(t, DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View)
}

/// Refuses a text column given where a number belongs (`names` are the number arguments, in
/// order), naming the column and how to convert it. Coercion lets such columns through so
/// that this check, which sees the columns' names, can speak.
pub fn refuse_text_columns(
    function: &str,
    names: &[&str],
    fields: &[datafusion::arrow::datatypes::FieldRef],
) -> Result<()> {
    for (field, name) in fields.iter().zip(names) {
        if is_text(field.data_type()) {
            let column = field.name();
            return Err(DataFusionError::Plan(format!(
                "{function}: {name} column '{column}' is text; if it holds numbers written with decimal commas or \
                 missing-value markers such as NA, convert it: CAST(NULLIF(REPLACE({column}, ',', '.'), 'NA') AS DOUBLE) \
                 (the ratesheet program converts such CSV columns when it opens a file)"
            )));
        }
    }
    Ok(())
}

/// Argument types of the scoring functions (`fit_expected`, `fit_expected_interval`): a fit,
/// an exposure, then the fit's predictors (and for some an options string); numbers after the
/// fit become Float64, everything else keeps its type. `usage` completes the error message.
pub fn scoring_arg_types(function: &str, usage: &str, arg_types: &[DataType]) -> Result<Vec<DataType>> {
    if arg_types.len() < 2 {
        return Err(DataFusionError::Plan(format!(
            "{function} takes {usage}; got {} arguments",
            arg_types.len()
        )));
    }
    Ok(arg_types
        .iter()
        .enumerate()
        .map(|(i, t)| {
            if i > 0 && t.is_numeric() {
                DataType::Float64
            } else {
                t.clone()
            }
        })
        .collect())
}
