//! A result flattened for formats without nesting (CSV, XLSX): a fit column becomes one row per
//! (result row, term) with a `term` column and the term's fields, the fit's scalar fields
//! repeated on each of its rows as `<column>_<field>`; any other struct column becomes one
//! column per field (`r_low`, `r_high`); remaining lists are written as JSON text. Values keep
//! their Arrow types (rows are picked with `take`), so numbers stay numbers.

use std::sync::Arc;

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch, StringArray, StructArray, UInt32Array};
use datafusion::arrow::compute::take;
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::arrow::error::ArrowError;
use datafusion::arrow::util::display::{ArrayFormatter, FormatOptions};

use crate::sql::model::fields::FitReader;

fn is_fit(a: &ArrayRef) -> bool {
    a.as_struct_opt().and_then(FitReader::of).is_some()
}

/// Lists (and anything else nested that is left) as JSON-like text.
fn as_text(a: &ArrayRef) -> Result<ArrayRef, ArrowError> {
    let options = FormatOptions::default();
    let fmt = ArrayFormatter::try_new(a.as_ref(), &options)?;
    let text: StringArray = (0..a.len())
        .map(|r| (!a.is_null(r)).then(|| fmt.value(r).to_string()))
        .collect();
    Ok(Arc::new(text))
}

/// Pushes column `a` named `name`, struct fields spread into `<name><sep><field>` columns.
fn push_spread(
    name: &str,
    sep: &str,
    a: &ArrayRef,
    fields: &mut Vec<Field>,
    columns: &mut Vec<ArrayRef>,
) -> Result<(), ArrowError> {
    match a.data_type() {
        DataType::Struct(_) => {
            let s = a.as_struct();
            for (f, c) in s.fields().iter().zip(s.columns()) {
                push_spread(
                    &format!("{name}{sep}{}", f.name()),
                    sep,
                    &with_parent_nulls(s, c)?,
                    fields,
                    columns,
                )?;
            }
        }
        DataType::List(_) | DataType::LargeList(_) | DataType::FixedSizeList(_, _) | DataType::Map(_, _) => {
            fields.push(Field::new(name, DataType::Utf8, true));
            columns.push(as_text(a)?);
        }
        t => {
            fields.push(Field::new(name, t.clone(), true));
            columns.push(a.clone());
        }
    }
    Ok(())
}

/// Field `c` of struct `s`, NULL wherever the struct is NULL.
fn with_parent_nulls(s: &StructArray, c: &ArrayRef) -> Result<ArrayRef, ArrowError> {
    match s.nulls() {
        Some(n) => {
            let merged = datafusion::arrow::buffer::NullBuffer::union(Some(n), c.nulls());
            Ok(datafusion::arrow::array::make_array(
                c.to_data().into_builder().nulls(merged).build()?,
            ))
        }
        None => Ok(c.clone()),
    }
}

/// One batch flattened.
pub fn flatten(b: &RecordBatch) -> Result<RecordBatch, ArrowError> {
    let schema = b.schema();
    let fits: Vec<usize> = (0..b.num_columns()).filter(|&j| is_fit(b.column(j))).collect();
    // Output rows: (input row, term index within each fit's term list).
    let mut rows: Vec<u32> = Vec::new();
    let mut term_at: Vec<Vec<Option<u32>>> = vec![Vec::new(); fits.len()];
    let readers: Vec<FitReader> = fits
        .iter()
        .filter_map(|&j| FitReader::of(b.column(j).as_struct()))
        .collect();
    for r in 0..b.num_rows() {
        let ranges: Vec<std::ops::Range<usize>> = readers
            .iter()
            .map(|f| if f.is_null(r) { 0..0 } else { f.term_range(r) })
            .collect();
        let n = ranges.iter().map(|t| t.len()).max().unwrap_or(0).max(1);
        for k in 0..n {
            rows.push(r as u32);
            for (i, t) in ranges.iter().enumerate() {
                term_at[i].push((k < t.len()).then(|| (t.start + k) as u32));
            }
        }
    }
    let rows = UInt32Array::from(rows);
    let mut fields = Vec::new();
    let mut columns: Vec<ArrayRef> = Vec::new();
    for (j, f) in schema.fields().iter().enumerate() {
        let column = take(b.column(j).as_ref(), &rows, None)?;
        let Some(i) = fits.iter().position(|&k| k == j) else {
            push_spread(f.name(), "_", &column, &mut fields, &mut columns)?;
            continue;
        };
        // The fit's scalar fields, repeated on each of its term rows.
        let fit = column.as_struct();
        for (ff, c) in fit.fields().iter().zip(fit.columns()) {
            if !matches!(
                ff.data_type(),
                DataType::List(_) | DataType::LargeList(_) | DataType::Struct(_)
            ) {
                fields.push(Field::new(
                    format!("{}_{}", f.name(), ff.name()),
                    ff.data_type().clone(),
                    true,
                ));
                columns.push(with_parent_nulls(fit, c)?);
            }
        }
        // The term's fields: plain names for a single fit column, prefixed otherwise.
        let terms: &StructArray = readers[i].term_values();
        let index = UInt32Array::from(term_at[i].clone());
        for (tf, c) in terms.fields().iter().zip(terms.columns()) {
            let name = if fits.len() == 1 {
                tf.name().to_string()
            } else {
                format!("{}_{}", f.name(), tf.name())
            };
            fields.push(Field::new(name, tf.data_type().clone(), true));
            columns.push(take(c.as_ref(), &index, None)?);
        }
    }
    RecordBatch::try_new(Arc::new(Schema::new(fields)), columns)
}

/// A batch for display: struct columns other than fits spread into `<column>.<field>`
/// columns (fits stay whole: the text table summarises them).
pub fn spread_for_display(b: &RecordBatch) -> Result<RecordBatch, ArrowError> {
    let mut fields = Vec::new();
    let mut columns: Vec<ArrayRef> = Vec::new();
    for (f, c) in b.schema().fields().iter().zip(b.columns()) {
        if matches!(c.data_type(), DataType::Struct(_)) && !is_fit(c) {
            push_spread(f.name(), ".", c, &mut fields, &mut columns)?;
        } else {
            fields.push(f.as_ref().clone());
            columns.push(c.clone());
        }
    }
    RecordBatch::try_new(Arc::new(Schema::new(fields)), columns)
}

/// Every batch flattened.
pub fn flatten_all(batches: &[RecordBatch]) -> Result<Vec<RecordBatch>, ArrowError> {
    batches.iter().map(flatten).collect()
}
