//! Results as an XLSX workbook, so they reach spreadsheet users directly.
//!
//! A result with fit columns is flattened to one row per (result row, term): the row's other
//! columns, then for each fit its status, rows used, deviance, dispersion and overdispersion
//! p-value, then the term's fields. Numbers stay numbers; NULL is an empty cell.

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch, StructArray};
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::arrow::util::display::{ArrayFormatter, FormatOptions};
use rust_xlsxwriter::Workbook;

use crate::sql::model::fields::{FitField, FitReader, RecordTable, TermField};

/// The fit-level fields repeated on every term row (the term's own fields follow, all of them).
const FIT_FIELDS: &[FitField] = &[
    FitField::Status,
    FitField::NUsed,
    FitField::Deviance,
    FitField::Dispersion,
    FitField::OverdispersionP,
];

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

fn is_fit(a: &ArrayRef) -> bool {
    a.as_struct_opt().and_then(FitReader::of).is_some()
}

/// Header and rows of the flattened result.
fn flatten(batches: &[RecordBatch]) -> (Vec<String>, Vec<Vec<Cell>>) {
    let Some(first) = batches.first() else {
        return (Vec::new(), Vec::new());
    };
    let schema = first.schema();
    let fits: Vec<usize> = (0..first.num_columns()).filter(|&j| is_fit(first.column(j))).collect();
    let plain: Vec<usize> = (0..first.num_columns()).filter(|j| !fits.contains(j)).collect();
    let mut header: Vec<String> = plain.iter().map(|&j| schema.field(j).name().clone()).collect();
    for &j in &fits {
        let name = schema.field(j).name();
        header.extend(FIT_FIELDS.iter().map(|f| format!("{name}.{}", f.name())));
        header.extend(TermField::all().iter().map(|f| format!("{name}.{}", f.name())));
    }
    let mut rows = Vec::new();
    for b in batches {
        for r in 0..b.num_rows() {
            let base: Vec<ArrayRef> = plain.iter().map(|&j| b.column(j).slice(r, 1)).collect();
            if fits.is_empty() {
                rows.push(base.iter().map(|a| cell(a, 0)).collect());
                continue;
            }
            // Terms of the first fit column set the number of output rows; several fit
            // columns are placed side by side, term by term.
            let term_lists: Vec<(&StructArray, Option<StructArray>)> = fits
                .iter()
                .map(|&j| {
                    let fit = b.column(j).as_struct();
                    let terms = FitReader::of(fit)
                        .filter(|reader| !reader.is_null(r))
                        .map(|reader| reader.terms_of(r));
                    (fit, terms)
                })
                .collect();
            let n = term_lists
                .iter()
                .map(|(_, t)| t.as_ref().map_or(0, |t| t.len()))
                .max()
                .unwrap_or(0)
                .max(1);
            for k in 0..n {
                let mut row: Vec<Cell> = base.iter().map(|a| cell(a, 0)).collect();
                for (fit, terms) in &term_lists {
                    for f in FIT_FIELDS {
                        row.push(fit.column_by_name(f.name()).map_or(Cell::Empty, |c| cell(c, r)));
                    }
                    for f in TermField::all() {
                        row.push(match terms {
                            Some(t) if k < t.len() => t.column_by_name(f.name()).map_or(Cell::Empty, |c| cell(c, k)),
                            _ => Cell::Empty,
                        });
                    }
                }
                rows.push(row);
            }
        }
    }
    (header, rows)
}

/// Writes the flattened result to an XLSX file at `path`.
pub fn write_xlsx(batches: &[RecordBatch], path: &std::path::Path) -> Result<(), Box<dyn std::error::Error>> {
    let (header, rows) = flatten(batches);
    if rows.len() >= 1_048_575 {
        return Err(format!(
            "{} rows do not fit in one worksheet (limit 1,048,575); save as .parquet or .csv",
            rows.len()
        )
        .into());
    }
    let mut workbook = Workbook::new();
    let sheet = workbook.add_worksheet();
    sheet.set_name("result")?;
    for (c, h) in header.iter().enumerate() {
        sheet.write_string(0, c as u16, h)?;
    }
    for (r, row) in rows.iter().enumerate() {
        for (c, v) in row.iter().enumerate() {
            let (r, c) = (r as u32 + 1, c as u16);
            match v {
                Cell::Number(x) if x.is_finite() => {
                    sheet.write_number(r, c, *x)?;
                }
                Cell::Number(_) | Cell::Empty => {}
                Cell::Text(s) => {
                    sheet.write_string(r, c, s)?;
                }
            }
        }
    }
    workbook.save(path)?;
    Ok(())
}
