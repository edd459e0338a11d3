//! Results as an XLSX workbook, so they reach spreadsheet users directly.
//!
//! The workbook holds the flattened result (`flat`): a fit is one row per (result row, term),
//! the same rows as the CSV output. Numbers stay numbers; NULL is an empty cell.

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch};
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::arrow::util::display::{ArrayFormatter, FormatOptions};
use rust_xlsxwriter::Workbook;

/// One output cell.
enum Cell {
    Number(f64),
    Text(String),
    Empty,
}

fn cell(a: &ArrayRef, r: usize) -> Cell {
    if a.is_null(r) {
        return Cell::Empty;
    }
    if a.data_type().is_numeric() {
        if let Ok(f) = datafusion::arrow::compute::cast(&a.slice(r, 1), &DataType::Float64) {
            return Cell::Number(f.as_primitive::<Float64Type>().value(0));
        }
    }
    let options = FormatOptions::default();
    match ArrayFormatter::try_new(a.as_ref(), &options) {
        Ok(f) => Cell::Text(f.value(r).to_string()),
        Err(_) => Cell::Empty,
    }
}

/// Writes the flattened result to an XLSX file at `path`; returns the data rows written.
pub fn write_xlsx(batches: &[RecordBatch], path: &std::path::Path) -> Result<usize, Box<dyn std::error::Error>> {
    let flat = super::flat::flatten_all(batches)?;
    let rows: usize = flat.iter().map(RecordBatch::num_rows).sum();
    if rows >= 1_048_575 {
        return Err(
            format!("{rows} rows do not fit in one worksheet (limit 1,048,575); save as .parquet or .csv").into(),
        );
    }
    let mut workbook = Workbook::new();
    let sheet = workbook.add_worksheet();
    sheet.set_name("result")?;
    if let Some(first) = flat.first() {
        for (c, f) in first.schema().fields().iter().enumerate() {
            sheet.write_string(0, c as u16, f.name())?;
        }
    }
    let mut r = 1u32;
    for b in &flat {
        for i in 0..b.num_rows() {
            for (c, a) in b.columns().iter().enumerate() {
                match cell(a, i) {
                    Cell::Number(x) if x.is_finite() => {
                        sheet.write_number(r, c as u16, x)?;
                    }
                    Cell::Number(_) | Cell::Empty => {}
                    Cell::Text(s) => {
                        sheet.write_string(r, c as u16, &s)?;
                    }
                }
            }
            r += 1;
        }
    }
    workbook.save(path)?;
    Ok(rows)
}
