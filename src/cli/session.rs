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
    // s3:// paths get their stores from this process's AWS environment variables.
    let mut runtime =
        RuntimeEnvBuilder::new().with_object_store_registry(Arc::new(crate::storage::EnvObjectStores::new()));
    if let Some(limit) = settings.memory_limit {
        runtime = runtime.with_memory_pool(Arc::new(FairSpillPool::new(limit)));
        // Merging spilled runs needs its own reservation; keep it well inside the limit.
        config = config.with_sort_spill_reservation_bytes((limit / 16).clamp(64 << 10, 10 << 20));
        // DataFusion 55's hash repartition can wait forever when two of its inputs spill at once
        // (upstream issue apache/datafusion#24883, fixed after 55). Under a memory limit, keep
        // aggregations, joins and windows on plans without hash repartitioning: the final
        // aggregation then runs on one partition, and spills or fails with a memory error.
        let optimizer = &mut config.options_mut().optimizer;
        optimizer.repartition_aggregations = false;
        optimizer.repartition_joins = false;
        optimizer.repartition_windows = false;
    }
    let ctx = SessionContext::new_with_config_rt(config, runtime.build_arc()?);
    crate::register_functions(&ctx)?;
    Ok(ctx)
}

/// A session whose statements run on the cluster whose scheduler is at `address`: the same
/// functions, settings and table rules as [`new_session`] (tables still open by path; the
/// executors read the files themselves).
pub async fn new_cluster_session(settings: &SessionSettings, address: &str) -> Result<SessionContext> {
    let local = new_session(settings)?;
    crate::cluster::client::connect(local.state(), address).await
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
        Some("csv") | Some("tsv") => Some("csv"),
        Some("xlsx") => Some("xlsx"),
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

/// `name`, or `name_2`, `name_3`, ... if a table of that name is open already.
fn free_name(ctx: &SessionContext, name: String, path: &str) -> Result<String> {
    if !ctx.table_exist(name.as_str())? {
        return Ok(name);
    }
    let mut k = 2;
    while ctx.table_exist(format!("{name}_{k}").as_str())? {
        k += 1;
    }
    let free = format!("{name}_{k}");
    eprintln!("note: a table named {name} is already open; {path} opens as {free}");
    Ok(free)
}

/// Opens `path` as a table named `name` (or a name derived from the path). Returns the name;
/// a workbook opens one table per sheet (`name_sheet` when it has several) and returns the
/// names separated by ", ".
pub async fn open_table(ctx: &SessionContext, path: &str, name: Option<&str>) -> Result<String> {
    let (ctx, owned, name) = (ctx.clone(), path.to_string(), name.map(str::to_string));
    super::guard::without_panics(path, async move { open_unguarded(&ctx, &owned, name.as_deref()).await }).await
}

async fn open_unguarded(ctx: &SessionContext, path: &str, name: Option<&str>) -> Result<String> {
    let base = name.map(str::to_string).unwrap_or_else(|| table_name_for(path));
    if crate::storage::is_remote(path) {
        return open_remote(ctx, path, base).await;
    }
    if let Some((scheme, _)) = path.split_once("://") {
        return Err(DataFusionError::Plan(format!(
            "{path}: {scheme}:// is not a storage ratesheet reads; it opens local paths and s3:// URLs \
             (S3-compatible servers too, through AWS_ENDPOINT_URL)"
        )));
    }
    let format = format_of(path)?;
    let cluster = crate::cluster::client::cluster_of(ctx);
    if let (Some(cluster), "xlsx") = (&cluster, format) {
        return Err(DataFusionError::Plan(format!(
            "{path}: a spreadsheet's tables live in this process's memory and cannot travel to the cluster at {}; \
             save the sheet as CSV or Parquet where the executors can read it",
            cluster.address
        )));
    }
    if format == "xlsx" {
        let sheets = super::workbook::read_workbook(path)?;
        let mut names = Vec::new();
        for sheet in &sheets {
            let wanted = if sheets.len() == 1 {
                base.clone()
            } else {
                format!("{base}_{}", table_name_for(&format!("{}.x", sheet.name)))
            };
            let name = free_name(ctx, wanted, path)?;
            ctx.register_table(name.as_str(), super::workbook::sheet_table(sheet)?)?;
            names.push(name);
        }
        return Ok(names.join(", "));
    }
    let files = files_of(path, format);
    for f in &files {
        if std::fs::metadata(f).is_ok_and(|m| m.len() == 0) {
            return Err(DataFusionError::Plan(format!(
                "{}: the file is empty (0 bytes)",
                f.display()
            )));
        }
    }
    let delimiter = if format == "csv" { csv_layout(&files)? } else { b',' };
    if format == "parquet" {
        same_parquet_schemas(&files)?;
    }
    let name = free_name(ctx, base, path)?;
    let with_path = |e: DataFusionError| DataFusionError::Plan(format!("{path}: {e}"));
    match format {
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
            if delimiter != b',' {
                eprintln!(
                    "note: {path} is separated by {}, not commas; reading it that way",
                    delimiter_name(delimiter)
                );
            }
            let ext = if path.to_ascii_lowercase().ends_with(".tsv") {
                ".tsv"
            } else {
                ".csv"
            };
            let options = CsvReadOptions::new().file_extension(ext).delimiter(delimiter);
            let conversions = number_columns(&files, delimiter);
            if conversions.is_empty() {
                ctx.register_csv(name.as_str(), path, options)
                    .await
                    .map_err(with_path)?
            } else {
                let df = ctx.read_csv(path, options).await.map_err(with_path)?;
                let exprs: Vec<datafusion::prelude::Expr> = df
                    .schema()
                    .fields()
                    .iter()
                    .map(|f| match conversions.iter().find(|c| c.column == *f.name()) {
                        Some(_) if !f.data_type().is_numeric() => text_to_number(f.name()),
                        _ => Ok(datafusion::prelude::ident(f.name())),
                    })
                    .collect::<Result<_>>()?;
                for c in &conversions {
                    eprintln!("note: {path}: column {} {}; read as numbers", c.column, c.what);
                }
                ctx.register_table(name.as_str(), df.select(exprs).map_err(with_path)?.into_view())
                    .map_err(with_path)?;
            }
        }
    }
    if let Err(e) = touch(ctx, &name, path).await {
        let _ = ctx.deregister_table(name.as_str());
        return Err(crate::cluster::client::explain(ctx, e));
    }
    if cluster.is_some()
        && let Err(e) = check_cluster_rows(ctx, &name, path, has_rows(&files, format)).await
    {
        let _ = ctx.deregister_table(name.as_str());
        return Err(e);
    }
    Ok(name)
}

/// Whether the local files of a table hold rows (Parquet: the footers' row counts; CSV: any
/// file, since a header without rows is refused when opening).
fn has_rows(files: &[std::path::PathBuf], format: &str) -> bool {
    use datafusion::parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    match format {
        "parquet" => files.iter().any(|f| {
            std::fs::File::open(f)
                .ok()
                .and_then(|file| ParquetRecordBatchReaderBuilder::try_new(file).ok())
                .is_some_and(|b| b.metadata().file_metadata().num_rows() > 0)
        }),
        _ => !files.is_empty(),
    }
}

/// On a cluster session, refuses table `name` (opened from `path`) when this machine's files
/// hold rows (`rows_here`) and the cluster finds none: the scheduler lists the files again on
/// its own machine, and a path it cannot see lists as an empty table, which would answer every
/// query with no rows instead of an error.
pub async fn check_cluster_rows(ctx: &SessionContext, name: &str, path: &str, rows_here: bool) -> Result<()> {
    let Some(cluster) = crate::cluster::client::cluster_of(ctx) else {
        return Ok(());
    };
    if !rows_here {
        return Ok(());
    }
    let batches = ctx
        .sql(&format!("SELECT 1 FROM \"{name}\" LIMIT 1"))
        .await?
        .collect()
        .await?;
    if batches.iter().any(|b| b.num_rows() > 0) {
        return Ok(());
    }
    Err(DataFusionError::Plan(format!(
        "{path}: the cluster at {} finds no rows there, while this machine does: on a cluster the scheduler \
         and executors read local paths themselves, so {path} must be readable at the same place on their \
         machines (or give an s3:// path)",
        cluster.address
    )))
}

/// Reading the schema is not enough to find a broken file: touch the new table once.
async fn touch(ctx: &SessionContext, name: &str, path: &str) -> Result<()> {
    let with_path = |e: DataFusionError| DataFusionError::Plan(format!("{path}: {e}"));
    ctx.sql(&format!("SELECT * FROM \"{name}\" LIMIT 0"))
        .await
        .map_err(with_path)?
        .collect()
        .await
        .map_err(with_path)?;
    Ok(())
}

/// The files a path stands for (a folder's files of the format; nothing for globs, which
/// DataFusion expands itself).
fn files_of(path: &str, format: &str) -> Vec<std::path::PathBuf> {
    let p = Path::new(path);
    if p.is_dir() {
        let mut files: Vec<_> = walk(p)
            .into_iter()
            .filter(|f| {
                f.extension()
                    .and_then(|e| e.to_str())
                    .is_some_and(|e| e.eq_ignore_ascii_case(format))
            })
            .collect();
        files.sort();
        files
    } else if p.is_file() {
        vec![p.to_path_buf()]
    } else {
        Vec::new()
    }
}

fn delimiter_name(d: u8) -> &'static str {
    match d {
        b';' => "semicolons",
        b'\t' => "tabs",
        b'|' => "vertical bars",
        _ => "commas",
    }
}

/// Checks the CSV files of one table and finds their delimiter: each header must be valid
/// UTF-8, be followed by at least one data line, and be the same in every file. The delimiter
/// is the one of `,` `;` tab `|` that occurs most often in the header (commas win ties).
fn csv_layout(files: &[std::path::PathBuf]) -> Result<u8> {
    use std::io::{BufRead, BufReader};
    let mut first: Option<(String, &std::path::PathBuf)> = None;
    for f in files {
        let name = f.display();
        let file = std::fs::File::open(f).map_err(|e| DataFusionError::Plan(format!("{name}: {e}")))?;
        let mut lines = BufReader::new(file).split(b'\n');
        let header = match lines.next() {
            Some(Ok(h)) => h,
            Some(Err(e)) => return Err(DataFusionError::Plan(format!("{name}: {e}"))),
            None => return Err(DataFusionError::Plan(format!("{name}: the file is empty"))),
        };
        let header = String::from_utf8(header)
            .map_err(|_| DataFusionError::Plan(format!("{name}: the header line is not valid UTF-8 text")))?;
        let header = header.trim_end_matches('\r').to_string();
        let has_data = lines.any(|l| l.is_ok_and(|l| !l.iter().all(u8::is_ascii_whitespace)));
        if !has_data {
            return Err(DataFusionError::Plan(format!(
                "{name}: the file has a header line but no data rows"
            )));
        }
        match &first {
            None => first = Some((header, f)),
            Some((h, g)) if *h != header => {
                return Err(DataFusionError::Plan(format!(
                    "{} and {name} have different header lines; a folder opens as one table only when its files share one layout",
                    g.display()
                )));
            }
            Some(_) => {}
        }
    }
    let Some((header, _)) = first else { return Ok(b',') };
    let count = |d: u8| header.bytes().filter(|&b| b == d).count();
    Ok([b';', b'\t', b'|']
        .into_iter()
        .filter(|&d| count(d) > count(b','))
        .max_by_key(|&d| count(d))
        .unwrap_or(b','))
}

/// Parquet parts of one table must agree on column names and types.
fn same_parquet_schemas(files: &[std::path::PathBuf]) -> Result<()> {
    use datafusion::parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let mut first: Option<(Vec<(String, String)>, &std::path::PathBuf)> = None;
    if files.len() < 2 {
        return Ok(());
    }
    for f in files {
        let name = f.display();
        let file = std::fs::File::open(f).map_err(|e| DataFusionError::Plan(format!("{name}: {e}")))?;
        let builder = ParquetRecordBatchReaderBuilder::try_new(file)
            .map_err(|e| DataFusionError::Plan(format!("{name}: not a readable Parquet file: {e}")))?;
        let columns: Vec<(String, String)> = builder
            .schema()
            .fields()
            .iter()
            .map(|c| (c.name().clone(), c.data_type().to_string()))
            .collect();
        match &first {
            None => first = Some((columns, f)),
            Some((c, g)) if *c != columns => {
                let describe = |cols: &[(String, String)]| {
                    cols.iter()
                        .map(|(n, t)| format!("{n} {t}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                };
                return Err(DataFusionError::Plan(format!(
                    "{} ({}) and {name} ({}) have different columns; a folder opens as one table only when its files share one schema",
                    g.display(),
                    describe(c),
                    describe(&columns)
                )));
            }
            Some(_) => {}
        }
    }
    Ok(())
}

/// Text that stands for a missing number in CSV extracts.
const MISSING_MARKERS: &[&str] = &["", "NA", "N/A", "na", "n/a", ".", "-"];

/// A CSV column of numbers written as text.
#[derive(Debug, Clone, PartialEq)]
pub struct NumberColumn {
    pub column: String,
    /// What was found, for the note: decimal commas and/or missing-value markers.
    pub what: String,
}

/// The columns of the first file whose values (the first 2,000 rows) are all numbers written
/// with a decimal comma (when the separator is not a comma) or a decimal point, or missing
/// markers (`NA`, `N/A`, `.`, `-`, empty), with at least one number and at least one decimal
/// comma or non-empty marker: the engine's CSV reader would read them as text (it has no
/// decimal-comma setting). Parsing is the engine's CSV reader with every column as text.
pub fn number_columns(files: &[std::path::PathBuf], delimiter: u8) -> Vec<NumberColumn> {
    use datafusion::arrow::array::{Array, AsArray};
    use datafusion::arrow::datatypes::{DataType, Field, Schema};
    let Some(first) = files.first() else { return Vec::new() };
    let header = match std::fs::read_to_string(first) {
        Ok(t) => t.lines().next().unwrap_or("").to_string(),
        Err(_) => return Vec::new(),
    };
    let names: Vec<String> = header
        .trim_end_matches('\r')
        .split(delimiter as char)
        .map(|h| h.trim().trim_matches('"').to_string())
        .collect();
    let schema = Arc::new(Schema::new(
        names
            .iter()
            .map(|n| Field::new(n, DataType::Utf8, true))
            .collect::<Vec<_>>(),
    ));
    let Ok(file) = std::fs::File::open(first) else {
        return Vec::new();
    };
    let Ok(reader) = datafusion::arrow::csv::ReaderBuilder::new(schema)
        .with_header(true)
        .with_delimiter(delimiter)
        .with_batch_size(2000)
        .build(file)
    else {
        return Vec::new();
    };
    let Some(Ok(batch)) = reader.into_iter().next() else {
        return Vec::new();
    };
    let number = |v: &str| {
        v.starts_with(|c: char| c.is_ascii_digit() || c == '-' || c == '+' || c == '.') && v.parse::<f64>().is_ok()
    };
    let mut out = Vec::new();
    for (j, name) in names.iter().enumerate() {
        let values = batch.column(j).as_string::<i32>();
        let (mut numbers, mut commas, mut markers, mut other) = (0, 0, 0, 0);
        for i in 0..values.len() {
            let v = if values.is_null(i) { "" } else { values.value(i).trim() };
            if MISSING_MARKERS.contains(&v) {
                markers += usize::from(!v.is_empty());
            } else if number(v) {
                numbers += 1;
            } else if delimiter != b','
                && v.matches(',').count() == 1
                && !v.contains('.')
                && number(&v.replace(',', "."))
            {
                numbers += 1;
                commas += 1;
            } else {
                other += 1;
            }
        }
        if other == 0 && numbers > 0 && (commas > 0 || markers > 0) {
            let what = match (commas > 0, markers > 0) {
                (true, true) => "has decimal commas and missing-value markers (NA, ., -)",
                (true, false) => "has decimal commas",
                _ => "has missing-value markers (NA, ., -), read as NULL",
            };
            out.push(NumberColumn {
                column: name.clone(),
                what: what.to_string(),
            });
        }
    }
    out
}

/// `column` (text) as Float64: markers become NULL, a decimal comma a point.
fn text_to_number(column: &str) -> Result<datafusion::prelude::Expr> {
    use datafusion::prelude::{Expr, cast, ident, lit, when};
    let trimmed = datafusion::functions::expr_fn::btrim(vec![ident(column)]);
    let markers: Vec<Expr> = MISSING_MARKERS.iter().map(|m| lit(*m)).collect();
    let is_missing = trimmed.clone().in_list(markers, false).or(ident(column).is_null());
    let value = datafusion::functions::expr_fn::replace(trimmed, lit(","), lit("."));
    let converted = when(is_missing, lit(datafusion::common::ScalarValue::Utf8(None))).otherwise(value)?;
    Ok(cast(converted, datafusion::arrow::datatypes::DataType::Float64).alias(column))
}

/// An object-storage path (`s3://bucket/key.parquet`, a prefix ending in `/`, or a glob) as a
/// table. The format comes from the extension (a prefix holds Parquet unless it ends in `.csv`
/// parts); the local file checks (empty files, layouts) do not apply: the engine reads the
/// objects when the table is touched, and its errors name the path.
async fn open_remote(ctx: &SessionContext, path: &str, base: String) -> Result<String> {
    let lower = path.to_ascii_lowercase();
    let name = free_name(ctx, base, path)?;
    let with_path = |e: DataFusionError| DataFusionError::Plan(format!("{path}: {e}"));
    if lower.ends_with(".csv") {
        ctx.register_csv(name.as_str(), path, CsvReadOptions::new())
            .await
            .map_err(with_path)?;
    } else if lower.ends_with(".parquet") || lower.ends_with('/') || lower.contains('*') {
        let ext = if lower.ends_with(".parquet") { "" } else { ".parquet" };
        let options = ParquetReadOptions {
            file_extension: ext,
            ..Default::default()
        };
        ctx.register_parquet(name.as_str(), path, options)
            .await
            .map_err(with_path)?;
    } else {
        return Err(DataFusionError::Plan(format!(
            "{path}: cannot tell the format; name a .parquet or .csv object, or a prefix ending in '/'"
        )));
    }
    touch(ctx, &name, path).await?;
    Ok(name)
}
