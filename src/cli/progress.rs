//! Running a statement with a progress line on stderr.
//!
//! DataFusion has no progress callback, but its file scans count the rows they have produced in
//! their live `output_rows` metric. While a query runs, a ticker reads that metric from every
//! scan of the physical plan and shows it against the total the scans know before reading
//! (Parquet footers give exact row counts; CSV scans do not, so only rows read are shown).
//! The line appears after [`QUIET_PERIOD`] and is erased before the result prints.

use std::io::Write;
use std::sync::Arc;
use std::time::{Duration, Instant};

use datafusion::arrow::array::RecordBatch;
use datafusion::common::stats::Precision;
use datafusion::datasource::physical_plan::FileScanConfig;
use datafusion::datasource::source::DataSourceExec;
use datafusion::error::{DataFusionError, Result};
use datafusion::execution::memory_pool::MemoryLimit;
use datafusion::physical_plan::{ExecutionPlan, collect};
use datafusion::prelude::SessionContext;

use super::hints::Hints;

/// Queries quicker than this show no progress line.
pub const QUIET_PERIOD: Duration = Duration::from_secs(1);
const TICK: Duration = Duration::from_millis(200);

/// The leaf nodes (file scans and other sources) of a plan.
fn scans(plan: &Arc<dyn ExecutionPlan>) -> Vec<Arc<dyn ExecutionPlan>> {
    if plan.children().is_empty() {
        return vec![plan.clone()];
    }
    plan.children().into_iter().flat_map(scans).collect()
}

/// The file scans among the leaves (other leaves, such as literal rows, read no files).
fn file_scans(leaves: &[Arc<dyn ExecutionPlan>]) -> Vec<Arc<dyn ExecutionPlan>> {
    let files: Vec<_> = leaves
        .iter()
        .filter(|l| l.downcast_ref::<DataSourceExec>().is_some())
        .cloned()
        .collect();
    if files.is_empty() { leaves.to_vec() } else { files }
}

/// Rows the scans will read, when every scan knows it: the plan's statistics, or else the row
/// counts in the footers of local Parquet files (DataFusion 55 may leave a scan's statistics
/// absent until it runs). CSV files give no total.
fn total_rows(scans: &[Arc<dyn ExecutionPlan>]) -> Option<usize> {
    let mut total = 0;
    for s in scans {
        #[allow(deprecated)]
        let stats = s.partition_statistics(None);
        match stats.ok().map(|s| s.num_rows) {
            Some(Precision::Exact(n) | Precision::Inexact(n)) => total += n,
            _ => total += footer_rows(s)?,
        }
    }
    Some(total)
}

/// Rows in the Parquet footers of a scan's files (local files only).
fn footer_rows(scan: &Arc<dyn ExecutionPlan>) -> Option<usize> {
    use datafusion::parquet::file::metadata::ParquetMetaDataReader;
    let source = scan.downcast_ref::<DataSourceExec>()?;
    let config = source.data_source().downcast_ref::<FileScanConfig>()?;
    let mut total = 0usize;
    // A file split into byte ranges across partitions appears once per range: count it once.
    let mut seen = std::collections::HashSet::new();
    for group in &config.file_groups {
        for f in group.files() {
            let path = format!("/{}", f.object_meta.location);
            if !path.to_ascii_lowercase().ends_with(".parquet") {
                return None;
            }
            if !seen.insert(path.clone()) {
                continue;
            }
            let file = std::fs::File::open(&path).ok()?;
            let meta = ParquetMetaDataReader::new().parse_and_finish(&file).ok()?;
            total += usize::try_from(meta.file_metadata().num_rows()).ok()?;
        }
    }
    Some(total)
}

fn rows_read(scans: &[Arc<dyn ExecutionPlan>]) -> usize {
    scans.iter().filter_map(|s| s.metrics()?.output_rows()).sum()
}

/// "12.3k", "4.56M": row counts in a short form.
fn short_count(n: usize) -> String {
    let v = n as f64;
    match n {
        0..1_000 => n.to_string(),
        1_000..1_000_000 => format!("{:.1}k", v / 1e3),
        1_000_000..1_000_000_000 => format!("{:.2}M", v / 1e6),
        _ => format!("{:.2}G", v / 1e9),
    }
}

/// Groups handed to the fit and fitted since the statement started.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Fitting {
    pub started: usize,
    pub fitted: usize,
}

/// The progress text for `read` of `total` rows after `elapsed`; once groups are being fitted,
/// how many of those handed over so far are done.
pub fn progress_text(read: usize, total: Option<usize>, fitting: Fitting, elapsed: Duration) -> String {
    let secs = elapsed.as_secs_f64();
    if fitting.started > 0 {
        let rows = match total {
            Some(t) if read >= t => format!("all {} rows read", short_count(t)),
            _ => format!("{} rows read", short_count(read)),
        };
        return format!(
            "{rows}; fitting: {} of {} groups… {secs:.1} s",
            short_count(fitting.fitted),
            short_count(fitting.started)
        );
    }
    match total {
        Some(t) if t > 0 && read >= t => format!("all {} rows read, computing… {secs:.1} s", short_count(t)),
        Some(t) if t > 0 => format!(
            "reading {} of {} rows ({:.0}%)… {secs:.1} s",
            short_count(read),
            short_count(t),
            100.0 * read as f64 / t as f64
        ),
        _ => format!("{} rows read… {secs:.1} s", short_count(read)),
    }
}

/// Plans and runs `sql`, collecting its result: the one run path of the shell, `--run`, `--script`
/// and the demo, planning and execution both under the panic guard. With `show`, a progress
/// line is kept on stderr while it runs longer than [`QUIET_PERIOD`]; `hints` may print a hint
/// about the plan first.
pub async fn collect_with_progress(
    ctx: &SessionContext,
    sql: &str,
    show: bool,
    hints: &Hints,
) -> Result<Vec<RecordBatch>> {
    // Planning reads file metadata too, so it runs under the guard as well.
    let planning = {
        let (ctx, sql) = (ctx.clone(), sql.to_string());
        super::guard::without_panics("planning the statement", async move {
            let df = ctx.sql(&sql).await?;
            let logical = df.logical_plan().clone();
            Ok((logical, df.create_physical_plan().await?))
        })
    };
    let (logical, plan) = planning.await.map_err(|e| crate::cluster::client::explain(ctx, e))?;
    hints.after_planning(&logical);
    let leaves = scans(&plan);
    let files = file_scans(&leaves);
    let progress = &crate::sql::model::evaluate::FIT_PROGRESS;
    let fit_counts = || {
        (
            progress.groups_started.load(std::sync::atomic::Ordering::Relaxed),
            progress.groups_fitted.load(std::sync::atomic::Ordering::Relaxed),
        )
    };
    let at_start = fit_counts();
    // On a cluster, a statement abandoned mid-way (Ctrl-C) has its job cancelled on the scheduler.
    let cancel = crate::cluster::client::CancelOnDrop::new(ctx, &plan);
    let run = super::guard::without_panics("the query", collect(plan, ctx.task_ctx()));
    let explain = |e| crate::cluster::client::explain(ctx, naming_files(naming_limit(e, ctx), &leaves));
    if !show {
        let result = run.await.map_err(explain);
        cancel.disarm();
        return result;
    }
    let total = total_rows(&files);
    let on_cluster = crate::cluster::client::cluster_of(ctx).map(|c| c.address.clone());
    let start = Instant::now();
    tokio::pin!(run);
    let mut line = ProgressLine { shown: false };
    let mut ticker = tokio::time::interval_at(tokio::time::Instant::now() + QUIET_PERIOD, TICK);
    let result = loop {
        tokio::select! {
            r = &mut run => break r,
            _ = ticker.tick() => {
                let now = fit_counts();
                let fitting = Fitting { started: now.0 - at_start.0, fitted: now.1 - at_start.1 };
                // On a cluster the work and its counters are in other processes: say where it runs.
                let text = match &on_cluster {
                    Some(address) => format!("running on the cluster at {address}… {:.1} s", start.elapsed().as_secs_f64()),
                    None => progress_text(rows_read(&files), total, fitting, start.elapsed()),
                };
                line.show(&text);
            }
        }
    };
    drop(line);
    cancel.disarm();
    result.map_err(explain)
}

/// An error as one readable line of ours: the root cause without the engine's wrappers
/// (`Optimizer rule ... failed`, `caused by`), without repeated kind prefixes (`Execution
/// error: Execution error:`), without a backtrace. Messages of our functions (they start with
/// the function's name) read as they were written; other engine messages keep their text once.
pub fn describe(e: &DataFusionError) -> String {
    let root = e.find_root();
    let text = match root {
        DataFusionError::Execution(m)
        | DataFusionError::Plan(m)
        | DataFusionError::Configuration(m)
        | DataFusionError::NotImplemented(m)
        | DataFusionError::ResourcesExhausted(m) => m.clone(),
        other => other.strip_backtrace(),
    };
    let mut text = text.trim().to_string();
    let prefixes = [
        "Execution error: ",
        "Error during planning: ",
        "External error: ",
        "This feature is not implemented: ",
        "Invalid or Unsupported Configuration: ",
    ];
    // An argument refused by one of our functions arrives inside the engine's coercion
    // message: keep ours alone.
    if let Some(i) = text.find("coercion failed with: ") {
        text = text[i + "coercion failed with: ".len()..].to_string();
        if let Some(j) = text.find(". No function matches") {
            text.truncate(j);
        }
    }
    while let Some(p) = prefixes.iter().find(|p| text.starts_with(**p)) {
        text = text[p.len()..].to_string();
    }
    text
}

/// Whether an error is one of our scalar functions refusing its arguments (its message starts
/// with the function's name): about the call, not the files. A fit refusing a row's value
/// keeps the file context, since the value came from a file.
fn from_our_scalar_function(e: &DataFusionError) -> bool {
    let text = describe(e);
    crate::sql::scalar_functions()
        .iter()
        .any(|f| text.starts_with(&format!("{}:", f.name())) || text.starts_with(&format!("{} ", f.name())))
}

/// Adds the session's memory limit to an out-of-memory error (DataFusion names the bytes it
/// could not reserve, not the limit the user set).
fn naming_limit(e: DataFusionError, ctx: &SessionContext) -> DataFusionError {
    let MemoryLimit::Finite(limit) = ctx.runtime_env().memory_pool.memory_limit() else {
        return e;
    };
    match e.find_root() {
        DataFusionError::ResourcesExhausted(why) => DataFusionError::ResourcesExhausted(format!(
            "the query needs more memory than the limit of {} (set with --memory-limit); \
             raise the limit, or reduce the number of groups or predictors. Details: {why}",
            short_bytes(limit)
        )),
        _ => e,
    }
}

/// Bytes in binary units (`64 MiB`).
fn short_bytes(b: usize) -> String {
    let units = ["bytes", "KiB", "MiB", "GiB", "TiB"];
    let mut v = b as f64;
    let mut unit = 0;
    while v >= 1024.0 && unit + 1 < units.len() {
        v /= 1024.0;
        unit += 1;
    }
    if unit == 0 {
        format!("{b} bytes")
    } else {
        format!("{v:.1} {}", units[unit])
    }
}

/// Adds the files the query was reading to an execution error (DataFusion's parse errors name
/// the line and column, not the file).
fn naming_files(e: DataFusionError, leaves: &[Arc<dyn ExecutionPlan>]) -> DataFusionError {
    let mut files = Vec::new();
    for leaf in leaves {
        let Some(source) = leaf.downcast_ref::<DataSourceExec>() else {
            continue;
        };
        let Some(config) = source.data_source().downcast_ref::<FileScanConfig>() else {
            continue;
        };
        for group in &config.file_groups {
            files.extend(group.files().iter().map(|f| format!("/{}", f.object_meta.location)));
        }
    }
    files.sort();
    files.dedup();
    let reading = match files.len() {
        0 => return e,
        1..=3 => files.join(", "),
        n => format!("{}, {} and {} more files", files[0], files[1], n - 2),
    };
    match e {
        // Memory errors keep their kind (callers tell them apart), also when they arrive
        // wrapped by the task that hit them.
        e if matches!(e.find_root(), DataFusionError::ResourcesExhausted(_)) => e,
        // Our functions' refusals and planning errors are not about the files.
        e if from_our_scalar_function(&e)
            || matches!(e.find_root(), DataFusionError::Plan(_) | DataFusionError::SQL(..)) =>
        {
            e
        }
        other => DataFusionError::Execution(format!("{} (while reading {reading})", other.strip_backtrace())),
    }
}

/// The line on stderr; erased when dropped, also when the query is cancelled mid-way.
struct ProgressLine {
    shown: bool,
}

impl ProgressLine {
    fn show(&mut self, text: &str) {
        let mut err = std::io::stderr().lock();
        let _ = write!(err, "\r\x1b[2K{text}");
        let _ = err.flush();
        self.shown = true;
    }
}

impl Drop for ProgressLine {
    fn drop(&mut self) {
        if self.shown {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_line_moves_from_reading_to_fitting() {
        let t = Duration::from_millis(2400);
        let none = Fitting::default();
        assert_eq!(
            progress_text(1_230_000, Some(5_400_000), none, t),
            "reading 1.23M of 5.40M rows (23%)… 2.4 s"
        );
        assert_eq!(
            progress_text(5_400_000, Some(5_400_000), none, t),
            "all 5.40M rows read, computing… 2.4 s"
        );
        let fitting = Fitting {
            started: 1000,
            fitted: 120,
        };
        assert_eq!(
            progress_text(5_400_000, Some(5_400_000), fitting, t),
            "all 5.40M rows read; fitting: 120 of 1.0k groups… 2.4 s"
        );
        assert_eq!(
            progress_text(42, None, fitting, t),
            "42 rows read; fitting: 120 of 1.0k groups… 2.4 s"
        );
    }

    /// A local Parquet file's rows come from its footer, once even when the scan reads it in
    /// several byte ranges.
    #[tokio::test]
    async fn parquet_totals_come_from_the_footer() {
        let ctx = SessionContext::new_with_config(datafusion::prelude::SessionConfig::new().with_target_partitions(4));
        let path = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/pipe_breaks.parquet");
        ctx.register_parquet("p", path, Default::default()).await.unwrap();
        let plan = ctx
            .sql("SELECT SUM(breaks) FROM p")
            .await
            .unwrap()
            .create_physical_plan()
            .await
            .unwrap();
        assert_eq!(total_rows(&file_scans(&scans(&plan))), Some(1800));
    }
}
