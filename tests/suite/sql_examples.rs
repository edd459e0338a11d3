//! Runs every `sql-examples/*.slt` file (sqllogictest format) against a fresh session with the
//! ratesheet functions registered. Paths in the files are relative to the repository root.
//!
//! Values print as text; floating-point values are rounded to 8 significant digits so that the
//! expected output is readable and does not depend on the last bits of a sum.

use std::path::PathBuf;

use datafusion::arrow::array::{Array, AsArray};
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::arrow::util::display::{ArrayFormatter, FormatOptions};
use datafusion::prelude::{SessionConfig, SessionContext};
use sqllogictest::{DBOutput, DefaultColumnType};

pub struct Db {
    ctx: SessionContext,
}

#[derive(Debug)]
pub struct DbError(String);

impl std::fmt::Display for DbError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}
impl std::error::Error for DbError {}

/// 8 significant digits, trailing zeros removed; scientific notation outside [1e-4, 1e9).
pub fn format_float(v: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    if !v.is_finite() {
        return v.to_string();
    }
    let a = v.abs();
    if (1e-4..1e9).contains(&a) {
        let decimals = (7 - a.log10().floor() as i32).max(0) as usize;
        let s = format!("{v:.decimals$}");
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    } else {
        format!("{v:.7e}")
    }
}

#[async_trait::async_trait]
impl sqllogictest::AsyncDB for Db {
    type Error = DbError;
    type ColumnType = DefaultColumnType;

    async fn run(&mut self, sql: &str) -> Result<DBOutput<DefaultColumnType>, DbError> {
        let df = self.ctx.sql(sql).await.map_err(|e| DbError(e.to_string()))?;
        let schema = df.schema().as_arrow().clone();
        let batches = df.collect().await.map_err(|e| DbError(e.to_string()))?;
        if schema.fields().is_empty() {
            return Ok(DBOutput::StatementComplete(0));
        }
        let types = schema
            .fields()
            .iter()
            .map(|f| match f.data_type() {
                DataType::Float64 | DataType::Float32 => DefaultColumnType::FloatingPoint,
                t if t.is_integer() => DefaultColumnType::Integer,
                _ => DefaultColumnType::Text,
            })
            .collect();
        let options = FormatOptions::default().with_null("NULL");
        let mut rows = Vec::new();
        for batch in &batches {
            let formatters: Vec<_> = batch
                .columns()
                .iter()
                .map(|c| ArrayFormatter::try_new(c.as_ref(), &options))
                .collect::<Result<_, _>>()
                .map_err(|e| DbError(e.to_string()))?;
            for r in 0..batch.num_rows() {
                let row = batch
                    .columns()
                    .iter()
                    .zip(&formatters)
                    .map(|(c, f)| match c.data_type() {
                        DataType::Float64 if !c.is_null(r) => format_float(c.as_primitive::<Float64Type>().value(r)),
                        _ => f.value(r).to_string(),
                    })
                    .collect();
                rows.push(row);
            }
        }
        Ok(DBOutput::Rows { types, rows })
    }

    async fn shutdown(&mut self) {}

    fn engine_name(&self) -> &str {
        "ratesheet"
    }
}

pub fn example_files() -> Vec<PathBuf> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("sql-examples");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "slt"))
        .collect();
    files.sort();
    files
}

#[tokio::test]
async fn sql_examples_pass() {
    std::env::set_current_dir(env!("CARGO_MANIFEST_DIR")).unwrap();
    let files = example_files();
    assert!(
        files.len() >= 10,
        "expected the topic files in sql-examples/, found {}",
        files.len()
    );
    let mut failures = Vec::new();
    for file in &files {
        let mut runner = sqllogictest::Runner::new(|| async {
            // The information schema makes `SHOW ratesheet.<key>` work, as in the shell.
            let ctx = SessionContext::new_with_config(SessionConfig::new().with_information_schema(true));
            ratesheet::register_functions(&ctx).map_err(|e| DbError(e.to_string()))?;
            Ok(Db { ctx })
        });
        runner.with_column_validator(|_, _| true);
        if let Err(e) = runner.run_file_async(file).await {
            failures.push(format!("{}: {e}", file.display()));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n\n"));
}

/// Ids `[Bnn]` in `text`, in order of first appearance.
fn matrix_ids(text: &str) -> Vec<String> {
    let mut ids = Vec::new();
    for (i, _) in text.match_indices("[B") {
        let id: String = text[i + 1..].chars().take(3).collect();
        let digits = id[1..].chars().all(|c| c.is_ascii_digit());
        if id.len() == 3 && digits && text[i + 4..].starts_with(']') && !ids.contains(&id) {
            ids.push(id);
        }
    }
    ids
}

/// The README's bad-input matrix and the slt files name the same cases (most live in
/// `10_bad_input.slt`, others beside their topic): a row added to one without a test in the
/// other fails here.
#[test]
fn the_bad_input_matrix_matches_its_tests() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let readme = std::fs::read_to_string(root.join("README.md")).unwrap();
    let mut in_readme = matrix_ids(&readme);
    let mut in_tests: Vec<String> = Vec::new();
    for file in example_files() {
        for id in matrix_ids(&std::fs::read_to_string(file).unwrap()) {
            if !in_tests.contains(&id) {
                in_tests.push(id);
            }
        }
    }
    assert!(in_readme.len() >= 32, "README matrix has {} rows", in_readme.len());
    in_readme.sort();
    in_tests.sort();
    assert_eq!(in_readme, in_tests);
}
