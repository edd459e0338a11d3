//! Every output format in one place: results printed to the terminal or a pipe ([`render`]:
//! text tables, CSV, JSON lines, Markdown) and results saved to a file ([`save_batches`]: CSV,
//! JSON lines, Parquet, or an XLSX workbook with fits one row per term).

use datafusion::arrow::array::RecordBatch;

pub mod flat;
pub mod render;
pub mod spreadsheet;

pub use render::{Format, Style, fit_overview, format_number, format_p, render, terminal_width, write_rendered};

/// Writes batches to `path` (format from the extension) through a temporary file renamed into
/// place; refuses to overwrite an existing file unless `replace` (`how_to_replace` tells the
/// user how to ask). Returns the number of data rows written (CSV and XLSX are flattened, so
/// a fit gives one row per term).
pub fn save_batches(
    batches: &[RecordBatch],
    path: &str,
    replace: bool,
    how_to_replace: &str,
) -> std::result::Result<usize, String> {
    let target = std::path::Path::new(path);
    if target.exists() && !replace {
        return Err(format!("{path} exists; {how_to_replace}"));
    }
    let Some(first) = batches.first() else {
        return Err("there is no result to save yet; run a query first".into());
    };
    let ext = target
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    let tmp = target.with_extension(format!("{ext}.partial"));
    let write = || -> std::result::Result<usize, Box<dyn std::error::Error>> {
        let file = std::fs::File::create(&tmp)?;
        let mut written: usize = batches.iter().map(RecordBatch::num_rows).sum();
        match ext.as_str() {
            "parquet" => {
                let mut w = datafusion::parquet::arrow::ArrowWriter::try_new(file, first.schema(), None)?;
                for b in batches {
                    w.write(b)?;
                }
                w.close()?;
            }
            "csv" | "json" => {
                use std::io::Write;
                let style = Style {
                    format: if ext == "csv" { Format::Csv } else { Format::Json },
                    digits: 17,
                    max_rows: usize::MAX,
                    width: None,
                };
                let mut file = file;
                file.write_all(render(batches, &style)?.as_bytes())?;
                file.sync_all()?;
                if ext == "csv" {
                    written = flat::flatten_all(batches)?.iter().map(RecordBatch::num_rows).sum();
                }
            }
            "xlsx" => {
                drop(file);
                written = spreadsheet::write_xlsx(batches, &tmp)?;
            }
            other => return Err(format!("cannot save as '.{other}': use .csv, .json, .parquet or .xlsx").into()),
        }
        std::fs::rename(&tmp, target)?;
        Ok(written)
    };
    match write() {
        Ok(rows) => Ok(rows),
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            Err(format!("{path}: {e}"))
        }
    }
}

/// As [`save_batches`], for a local path or an `s3://bucket/key` object: an object is written
/// to a temporary local file first and then put into the store the session uses for that
/// bucket (an existing object is kept unless `replace`).
pub async fn save_anywhere(
    ctx: &datafusion::prelude::SessionContext,
    batches: &[RecordBatch],
    path: &str,
    replace: bool,
    how_to_replace: &str,
) -> std::result::Result<usize, String> {
    if !crate::storage::is_remote(path) {
        return save_batches(batches, path, replace, how_to_replace);
    }
    use object_store::ObjectStoreExt;
    let url = url::Url::parse(path).map_err(|e| format!("{path}: {e}"))?;
    let bucket = url.host_str().unwrap_or_default();
    let key = object_store::path::Path::from(url.path().trim_start_matches('/'));
    let base = datafusion::execution::object_store::ObjectStoreUrl::parse(format!("s3://{bucket}"))
        .map_err(|e| format!("{path}: {e}"))?;
    let store = ctx
        .runtime_env()
        .object_store(&base)
        .map_err(|e| format!("{path}: {e}"))?;
    if !replace && store.head(&key).await.is_ok() {
        return Err(format!("{path} exists; {how_to_replace}"));
    }
    let ext = std::path::Path::new(url.path())
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_string();
    let local = std::env::temp_dir().join(format!("ratesheet-upload-{}.{ext}", std::process::id()));
    let rows = save_batches(batches, local.to_str().unwrap_or_default(), true, "")
        .map_err(|e| e.replace(local.to_str().unwrap_or_default(), path))?;
    let bytes = std::fs::read(&local).map_err(|e| format!("{path}: {e}"));
    let _ = std::fs::remove_file(&local);
    store
        .put(&key, bytes?.into())
        .await
        .map_err(|e| format!("{path}: writing the object failed: {e}"))?;
    Ok(rows)
}
