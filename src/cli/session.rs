//! A DataFusion session with ratesheet's functions, and files opened as tables.

use std::path::Path;
use std::sync::Arc;

use datafusion::error::{DataFusionError, Result};
use datafusion::execution::memory_pool::FairSpillPool;
use datafusion::execution::runtime_env::RuntimeEnvBuilder;
use datafusion::prelude::{CsvReadOptions, ParquetReadOptions, SessionConfig, SessionContext};

/// How to build a session.
#[derive(Debug, Clone, Default)]
pub struct SessionSettings {
    /// Worker threads / partitions (default: the number of cores).
    pub threads: Option<usize>,
    /// Memory limit in bytes; with a limit, aggregates spill to disk (fair spilling pool).
    pub memory_limit: Option<usize>,
}

pub fn new_session(settings: &SessionSettings) -> Result<SessionContext> {
    let mut config = SessionConfig::new().with_information_schema(true);
    if let Some(t) = settings.threads {
        config = config.with_target_partitions(t.max(1));
    }
    let mut runtime = RuntimeEnvBuilder::new();
    if let Some(limit) = settings.memory_limit {
        runtime = runtime.with_memory_pool(Arc::new(FairSpillPool::new(limit)));
        // Merging spilled runs needs its own reservation; keep it well inside the limit.
        config = config.with_sort_spill_reservation_bytes((limit / 16).clamp(64 << 10, 10 << 20));
    }
    let ctx = SessionContext::new_with_config_rt(config, runtime.build_arc()?);
    crate::register_functions(&ctx)?;
    Ok(ctx)
}

/// A table name from a path: the file stem, lower-cased, with anything but letters, digits and
/// '_' replaced by '_' (and a leading digit prefixed with 't_').
pub fn table_name_for(path: &str) -> String {
    let stem = Path::new(path.trim_end_matches('/'))
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_else(|| "table".into());
    let stem = stem
        .split('*')
        .next()
        .unwrap_or("")
        .trim_end_matches(['.', '-', '_'])
        .to_string();
    let mut name: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '_'
            }
        })
        .collect();
    if name.is_empty() {
        name = "table".into();
    }
    if name.starts_with(|c: char| c.is_ascii_digit()) {
        name = format!("t_{name}");
    }
    name
}

/// The file format of a path, from its extension or (for folders) from the files inside.
fn format_of(path: &str) -> Result<&'static str> {
    let by_ext = |p: &Path| match p
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .as_deref()
    {
        Some("parquet") | Some("parq") => Some("parquet"),
        Some("csv") => Some("csv"),
        _ => None,
    };
    let p = Path::new(path);
    if p.is_dir() {
        let mut found = None;
        for entry in walk(p) {
            if let Some(f) = by_ext(&entry) {
                if found.is_some_and(|g| g != f) {
                    return Err(DataFusionError::Plan(format!(
                        "{path}: the folder mixes Parquet and CSV files; open them separately"
                    )));
                }
                found = Some(f);
            }
        }
        return found
            .ok_or_else(|| DataFusionError::Plan(format!("{path}: the folder holds no .parquet or .csv files")));
    }
    if let Some(f) = by_ext(p) {
        if !path.contains('*') && !p.exists() {
            return Err(DataFusionError::Plan(format!("{path}: no such file")));
        }
        return Ok(f);
    }
    Err(DataFusionError::Plan(format!(
        "{path}: cannot tell the format; ratesheet opens .parquet and .csv files and folders of them"
    )))
}

fn walk(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    if let Ok(entries) = std::fs::read_dir(dir) {
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                out.extend(walk(&p));
            } else {
                out.push(p);
            }
        }
    }
    out
}

/// Opens `path` as a table named `name` (or a name derived from the path). Returns the name.
pub async fn open_table(ctx: &SessionContext, path: &str, name: Option<&str>) -> Result<String> {
    let mut name = name.map(str::to_string).unwrap_or_else(|| table_name_for(path));
    if ctx.table_exist(name.as_str())? {
        let base = name.clone();
        let mut k = 2;
        while ctx.table_exist(format!("{base}_{k}").as_str())? {
            k += 1;
        }
        name = format!("{base}_{k}");
        eprintln!("note: a table named {base} is already open; {path} opens as {name}");
    }
    let with_path = |e: DataFusionError| DataFusionError::Plan(format!("{path}: {e}"));
    match format_of(path)? {
        "parquet" => {
            let ext = if Path::new(path).is_dir() || path.contains('*') {
                ".parquet"
            } else {
                ""
            };
            let options = ParquetReadOptions {
                file_extension: ext,
                ..Default::default()
            };
            ctx.register_parquet(name.as_str(), path, options)
                .await
                .map_err(with_path)?
        }
        _ => {
            let options = CsvReadOptions::new().file_extension(".csv");
            ctx.register_csv(name.as_str(), path, options)
                .await
                .map_err(with_path)?
        }
    }
    // Reading the schema is not enough to find a broken file: touch the table once.
    ctx.sql(&format!("SELECT * FROM \"{name}\" LIMIT 0"))
        .await
        .map_err(with_path)?
        .collect()
        .await
        .map_err(with_path)?;
    Ok(name)
}
