//! Spreadsheet input: every sheet of an `.xlsx` workbook becomes an in-memory table.
//!
//! The first row of a sheet's used range holds the column names. Column types are inferred from
//! all the cells below it: only whole numbers -> Int64, numbers -> Float64, only booleans ->
//! Boolean, anything else (text, dates, a mix) -> Utf8 with each cell's text, so no value is
//! lost. Empty cells are NULL. Merged header cells, blank or repeated column names and error
//! cells (`#DIV/0!` and the like) are refused with the sheet and cell named.

use std::path::Path;
use std::sync::Arc;

use calamine::{Data, Range, Reader, Xlsx, open_workbook};
use datafusion::arrow::array::{ArrayRef, BooleanArray, Float64Array, Int64Array, RecordBatch, StringArray};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::datasource::MemTable;
use datafusion::error::{DataFusionError, Result};

/// One sheet read into a batch.
pub struct Sheet {
    pub name: String,
    pub batch: RecordBatch,
}

fn plan_error(path: &str, what: String) -> DataFusionError {
    DataFusionError::Plan(format!("{path}: {what}"))
}

/// Spreadsheet column letters of a zero-based index: 0 -> A, 27 -> AB.
fn column_letters(mut c: u32) -> String {
    let mut s = Vec::new();
    loop {
        s.push(b'A' + (c % 26) as u8);
        if c < 26 {
            break;
        }
        c = c / 26 - 1;
    }
    s.reverse();
    String::from_utf8(s).unwrap_or_default()
}

fn cell_name(row: u32, col: u32) -> String {
    format!("{}{}", column_letters(col), row + 1)
}

/// Reads every sheet of the workbook at `path`.
pub fn read_workbook(path: &str) -> Result<Vec<Sheet>> {
    let mut book: Xlsx<_> =
        open_workbook(Path::new(path)).map_err(|e| plan_error(path, format!("not a readable .xlsx workbook: {e}")))?;
    let names = book.sheet_names();
    let mut sheets = Vec::new();
    for name in names {
        let range = book
            .worksheet_range(&name)
            .map_err(|e| plan_error(path, format!("sheet {name}: {e}")))?;
        let header_row = range.start().map_or(0, |(r, _)| r);
        let merged = book
            .merge_cells_by_sheet_name(&name)
            .map_err(|e| plan_error(path, format!("sheet {name}: cannot read merged cells: {e}")))?;
        for dims in merged {
            if dims.start.0 <= header_row && header_row <= dims.end.0 {
                return Err(plan_error(
                    path,
                    format!(
                        "sheet {name}: header cells {}:{} are merged; unmerge them so each column has its own name",
                        cell_name(dims.start.0, dims.start.1),
                        cell_name(dims.end.0, dims.end.1)
                    ),
                ));
            }
        }
        if range.is_empty() {
            continue;
        }
        sheets.push(Sheet {
            batch: sheet_batch(path, &name, &range)?,
            name,
        });
    }
    if sheets.is_empty() {
        return Err(plan_error(path, "the workbook has no sheet with data".into()));
    }
    Ok(sheets)
}

#[derive(Clone, Copy, PartialEq)]
enum Inferred {
    Empty,
    Int,
    Float,
    Bool,
    Text,
}

fn infer(current: Inferred, cell: &Data) -> Inferred {
    use Inferred::*;
    let this = match cell {
        Data::Empty => return current,
        Data::Int(_) => Int,
        Data::Float(f) if f.fract() == 0.0 && f.abs() < 9.0e15 => Int,
        Data::Float(_) => Float,
        Data::Bool(_) => Bool,
        _ => Text,
    };
    match (current, this) {
        (Empty, t) => t,
        (a, b) if a == b => a,
        (Int | Float, Int | Float) => Float,
        _ => Text,
    }
}

fn sheet_batch(path: &str, sheet: &str, range: &Range<Data>) -> Result<RecordBatch> {
    let (row0, col0) = range.start().unwrap_or((0, 0));
    let mut rows = range.rows();
    let header = rows.next().unwrap_or(&[]);
    let data: Vec<&[Data]> = rows.collect();
    let mut names: Vec<String> = Vec::new();
    let mut kept: Vec<usize> = Vec::new();
    for (c, cell) in header.iter().enumerate() {
        let name = cell.to_string().trim().to_string();
        let letter = cell_name(row0, col0 + c as u32);
        let column_empty = data
            .iter()
            .all(|row| row.get(c).is_none_or(|d| matches!(d, Data::Empty)));
        if name.is_empty() && column_empty {
            continue;
        }
        if name.is_empty() {
            return Err(plan_error(
                path,
                format!(
                    "sheet {sheet}: the header cell {letter} is blank but its column holds data; give every column a name"
                ),
            ));
        }
        if names.contains(&name) {
            return Err(plan_error(
                path,
                format!("sheet {sheet}: the column name {name} appears twice (again at {letter})"),
            ));
        }
        names.push(name);
        kept.push(c);
    }
    for (r, row) in data.iter().enumerate() {
        for (c, cell) in row.iter().enumerate() {
            if let Data::Error(e) = cell {
                return Err(plan_error(
                    path,
                    format!(
                        "sheet {sheet}: cell {} holds the error {e}; fix or clear it",
                        cell_name(row0 + 1 + r as u32, col0 + c as u32)
                    ),
                ));
            }
        }
    }
    let mut fields = Vec::new();
    let mut columns: Vec<ArrayRef> = Vec::new();
    for (&c, name) in kept.iter().zip(&names) {
        let cells = || data.iter().map(move |row| row.get(c).unwrap_or(&Data::Empty));
        let kind = cells().fold(Inferred::Empty, infer);
        let (t, array): (DataType, ArrayRef) = match kind {
            Inferred::Int => (
                DataType::Int64,
                Arc::new(Int64Array::from_iter(cells().map(|d| match d {
                    Data::Int(i) => Some(*i),
                    Data::Float(f) => Some(*f as i64),
                    _ => None,
                }))),
            ),
            Inferred::Float => (
                DataType::Float64,
                Arc::new(Float64Array::from_iter(cells().map(|d| match d {
                    Data::Int(i) => Some(*i as f64),
                    Data::Float(f) => Some(*f),
                    _ => None,
                }))),
            ),
            Inferred::Bool => (
                DataType::Boolean,
                Arc::new(BooleanArray::from_iter(cells().map(|d| match d {
                    Data::Bool(b) => Some(*b),
                    _ => None,
                }))),
            ),
            Inferred::Text | Inferred::Empty => (
                DataType::Utf8,
                Arc::new(StringArray::from_iter(cells().map(|d| match d {
                    Data::Empty => None,
                    other => Some(other.to_string()),
                }))),
            ),
        };
        fields.push(Field::new(name, t, true));
        columns.push(array);
    }
    Ok(RecordBatch::try_new(Arc::new(Schema::new(fields)), columns)?)
}

/// A MemTable of one sheet.
pub fn sheet_table(sheet: &Sheet) -> Result<Arc<MemTable>> {
    Ok(Arc::new(MemTable::try_new(
        sheet.batch.schema(),
        vec![vec![sheet.batch.clone()]],
    )?))
}
