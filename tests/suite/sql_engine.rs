//! The SQL functions inside the engine: reference values through SQL, results independent of
//! partitioning, file splits, repartitioning and spilling, both accumulator paths agreeing,
//! and every documentation example running.
//!
//! Check values: insurance.json (statsmodels 0.15.0 GLM) for the
//! per-District and pooled fits; the other comparisons are between routes through the engine.

use std::collections::BTreeSet;
use std::sync::Arc;

use datafusion::arrow::array::{Array, AsArray, RecordBatch, StructArray};
use datafusion::arrow::datatypes::UInt32Type;
use datafusion::execution::memory_pool::FairSpillPool;
use datafusion::execution::runtime_env::RuntimeEnvBuilder;
use datafusion::logical_expr::Partitioning;
use datafusion::physical_plan::ExecutionPlan;
use datafusion::physical_plan::aggregates::{AggregateExec, AggregateMode};
use datafusion::prelude::{CsvReadOptions, SessionConfig, SessionContext, col};
use serde_json::Value;

use ratesheet::sql::model::fields::{FitField, FitReader, TermField};

use crate::support::{close, f, fixture_path, load_json};

fn context(partitions: usize) -> SessionContext {
    let ctx = SessionContext::new_with_config(SessionConfig::new().with_target_partitions(partitions));
    ratesheet::register_functions(&ctx).unwrap();
    ctx
}

/// `ctx` with ratesheet's one-phase planning rule taken out, so that fit aggregates run as the
/// engine plans them by itself: a partial phase whose row state crosses the repartition.
fn without_single_phase(ctx: &SessionContext) -> SessionContext {
    use datafusion::execution::session_state::SessionStateBuilder;
    use datafusion::physical_optimizer::optimizer::PhysicalOptimizer;
    let state = ctx.state();
    let rules: Vec<_> = state
        .physical_optimizers()
        .iter()
        .filter(|r| r.name() != ratesheet::sql::single_phase::NAME)
        .cloned()
        .collect();
    assert_eq!(
        rules.len() + 1,
        state.physical_optimizers().len(),
        "the rule is installed once"
    );
    let mut builder = SessionStateBuilder::new_from_existing(state);
    *builder.physical_optimizers() = Some(PhysicalOptimizer::with_rules(rules));
    SessionContext::new_with_state(builder.build())
}

/// The modes of the aggregate nodes in `sql`'s physical plan, top down.
async fn aggregate_modes(ctx: &SessionContext, sql: &str) -> Vec<AggregateMode> {
    fn walk(p: &Arc<dyn ExecutionPlan>, out: &mut Vec<AggregateMode>) {
        if let Some(a) = p.downcast_ref::<AggregateExec>() {
            out.push(*a.mode());
        }
        p.children().into_iter().for_each(|c| walk(c, out));
    }
    let plan = ctx.sql(sql).await.unwrap().create_physical_plan().await.unwrap();
    let mut out = Vec::new();
    walk(&plan, &mut out);
    out
}

async fn register_insurance(ctx: &SessionContext) {
    let path = fixture_path("reference/data/insurance.csv");
    ctx.register_csv("insurance_csv", path.to_str().unwrap(), CsvReadOptions::new())
        .await
        .unwrap();
    ctx.sql(
        "CREATE VIEW insurance AS SELECT CAST(\"District\" AS VARCHAR) AS district, \"Group\" AS car_group, \
         \"Age\" AS age_band, \"Holders\" AS holders, \"Claims\" AS claims FROM insurance_csv",
    )
    .await
    .unwrap();
}

async fn collect(ctx: &SessionContext, sql: &str) -> Vec<RecordBatch> {
    ctx.sql(sql)
        .await
        .unwrap_or_else(|e| panic!("{sql}: {e}"))
        .collect()
        .await
        .unwrap()
}

/// (group key, fit struct) rows of a `SELECT key, fit ... ORDER BY key` query.
fn fits(batches: &[RecordBatch]) -> Vec<(String, StructArray, usize)> {
    let mut out = Vec::new();
    for b in batches {
        let keys =
            datafusion::arrow::compute::cast(b.column(0), &datafusion::arrow::datatypes::DataType::Utf8).unwrap();
        let keys = keys.as_string::<i32>();
        let fit = b.column(1).as_struct().clone();
        for r in 0..b.num_rows() {
            out.push((keys.value(r).to_string(), fit.clone(), r));
        }
    }
    out
}

/// A fit-level number that must be present (NULL fails the test).
fn fit_f64(fit: &StructArray, field: FitField, r: usize) -> f64 {
    FitReader::of(fit)
        .expect("a fit column")
        .float(field, r)
        .unwrap_or_else(|| panic!("{field:?} is NULL in row {r}"))
}

/// (term, estimate, std_error) of row `r`, read through the library's fit reader.
fn terms(fit: &StructArray, r: usize) -> Vec<(String, Option<f64>, Option<f64>)> {
    let reader = FitReader::of(fit).expect("a fit column");
    reader
        .term_range(r)
        .map(|i| {
            (
                reader.term_text(TermField::Term, i).unwrap().to_string(),
                reader.term_float(TermField::Estimate, i),
                reader.term_float(TermField::StdError, i),
            )
        })
        .collect()
}

fn sql_name(reference_term: &str) -> String {
    reference_term
        .replace("District=", "district=")
        .replace("Group=", "car_group=")
        .replace("Age=", "age_band=")
}

fn check_against(label: &str, fit: &StructArray, r: usize, block: &Value) {
    // (our field, reference field, relative tolerance, absolute tolerance)
    let statistics = [
        (FitField::Deviance, "deviance", 1e-8, 1e-11),
        (FitField::PearsonChi2, "pearson_chi2", 1e-8, 1e-11),
        (FitField::Loglik, "llf", 1e-8, 0.0),
        (FitField::Aic, "aic", 1e-8, 0.0),
        (FitField::DevianceP, "deviance_gof_p_value", 1e-7, 1e-15),
    ];
    for (ours, theirs, rel, abs) in statistics {
        close(
            &format!("{label} {ours:?}"),
            fit_f64(fit, ours, r),
            f(&block[theirs]),
            rel,
            abs,
        );
    }
    let got = terms(fit, r);
    let want = block["coefficients"].as_array().unwrap();
    assert_eq!(got.len(), want.len(), "{label}");
    for w in want {
        let name = sql_name(w["term"].as_str().unwrap());
        let (_, est, se) = got
            .iter()
            .find(|t| t.0 == name)
            .unwrap_or_else(|| panic!("{label}: no term {name}"));
        close(
            &format!("{label} {name} estimate"),
            est.unwrap(),
            f(&w["estimate"]),
            1e-8,
            1e-12,
        );
        close(
            &format!("{label} {name} se"),
            se.unwrap(),
            f(&w["std_error"]),
            1e-7,
            0.0,
        );
    }
}

const PER_DISTRICT: &str = "SELECT district, poisson_fit(claims, holders, car_group, age_band, \
     'ref.car_group=<1l, ref.age_band=<25') AS fit FROM insurance GROUP BY district ORDER BY district";

#[tokio::test]
async fn per_district_and_pooled_fits_match_the_reference_through_sql() {
    let expected = load_json("reference/expected/insurance.json");
    let ctx = context(4);
    register_insurance(&ctx).await;
    let rows = fits(&collect(&ctx, PER_DISTRICT).await);
    let groups = expected["per_group"][0]["groups"].as_array().unwrap();
    assert_eq!(rows.len(), groups.len());
    for ((key, fit, r), group) in rows.iter().zip(groups) {
        assert_eq!(*key, group["group"].to_string());
        check_against(&format!("district {key}"), fit, *r, &group["poisson"]);
    }
    let pooled = collect(
        &ctx,
        "SELECT 'all', poisson_fit(claims, holders, district, car_group, age_band, \
         'ref.car_group=<1l, ref.age_band=<25') FROM insurance",
    )
    .await;
    let rows = fits(&pooled);
    check_against("pooled", &rows[0].1, rows[0].2, &expected["models"][0]["poisson"]);
}

/// Every number of every group, as text with full precision, for comparisons between runs.
fn fingerprint(batches: &[RecordBatch]) -> Vec<(String, Vec<f64>)> {
    fits(batches)
        .into_iter()
        .map(|(k, fit, r)| {
            let mut v = vec![
                fit_f64(&fit, FitField::Deviance, r),
                fit_f64(&fit, FitField::PearsonChi2, r),
                fit_f64(&fit, FitField::Loglik, r),
            ];
            for (_, est, se) in terms(&fit, r) {
                v.push(est.unwrap_or(f64::NAN));
                v.push(se.unwrap_or(f64::NAN));
            }
            (k, v)
        })
        .collect()
}

fn assert_same(label: &str, a: &[(String, Vec<f64>)], b: &[(String, Vec<f64>)], tol: f64) {
    assert_eq!(a.len(), b.len(), "{label}: number of groups");
    for ((ka, va), (kb, vb)) in a.iter().zip(b) {
        assert_eq!(ka, kb, "{label}");
        for (x, y) in va.iter().zip(vb) {
            let same = (x.is_nan() && y.is_nan()) || (x - y).abs() <= tol * x.abs().max(1.0);
            assert!(same, "{label} group {ka}: {x} vs {y}");
        }
    }
}

/// A synthetic rate table with many groups, written as several CSV parts.
fn write_parts(dir: &std::path::Path, parts: usize, groups: usize, rows_per_group: usize) {
    std::fs::create_dir_all(dir).unwrap();
    let mut files: Vec<String> = (0..parts)
        .map(|_| "region,material,age,breaks,km_years\n".to_string())
        .collect();
    let mut state: u64 = 12345;
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    for g in 0..groups {
        for i in 0..rows_per_group {
            let material = ["iron", "pvc", "steel"][(next() % 3) as usize];
            let age = (next() % 60) as f64;
            let km = 1.0 + (next() % 200) as f64 / 10.0;
            let breaks = next() % 9;
            files[(g * rows_per_group + i) % parts].push_str(&format!("r{g},{material},{age},{breaks},{km}\n"));
        }
    }
    for (k, text) in files.iter().enumerate() {
        std::fs::write(dir.join(format!("part-{k}.csv")), text).unwrap();
    }
}

/// The synthetic fit; `age` is read as a whole number, so the fit sums covariate patterns.
const SYNTH: &str =
    "SELECT region, poisson_fit(breaks, km_years, material, age) AS fit FROM pipes GROUP BY region ORDER BY region";

/// The synthetic fit with `age` as a real number: the fit buffers rows.
const SYNTH_ROWS: &str = "SELECT region, poisson_fit(breaks, km_years, material, CAST(age AS DOUBLE)) AS fit \
     FROM pipes GROUP BY region ORDER BY region";

#[tokio::test]
async fn results_do_not_depend_on_partitions_files_or_repartitioning() {
    let dir = std::env::temp_dir().join(format!("ratesheet-parts-{}", std::process::id()));
    write_parts(&dir, 5, 60, 40);
    let mut runs = Vec::new();
    for partitions in [1, 2, 8] {
        // With the one-phase rule (rows cross the repartition as input columns) and without it
        // (rows cross it as fit state): the same numbers, for both buffers.
        for (route, ctx) in [
            ("one phase", context(partitions)),
            ("two phases", without_single_phase(&context(partitions))),
        ] {
            ctx.register_csv("pipes", dir.to_str().unwrap(), CsvReadOptions::new())
                .await
                .unwrap();
            for (buffer, sql) in [("patterns", SYNTH), ("rows", SYNTH_ROWS)] {
                let label = format!("{partitions} partitions, {route}, {buffer}");
                runs.push((label.clone(), fingerprint(&collect(&ctx, sql).await)));
                // An explicit hash repartition on another key before the aggregate.
                let shuffled = ctx
                    .table("pipes")
                    .await
                    .unwrap()
                    .repartition(Partitioning::Hash(vec![col("material")], 7))
                    .unwrap();
                ctx.register_table("pipes_shuffled", shuffled.into_view()).unwrap();
                let repartitioned = collect(&ctx, &sql.replace("FROM pipes", "FROM pipes_shuffled")).await;
                ctx.deregister_table("pipes_shuffled").unwrap();
                runs.push((format!("{label}, repartitioned"), fingerprint(&repartitioned)));
            }
        }
    }
    // The two buffers agree to rounding; within each buffer every route gives the same numbers.
    assert_same("patterns vs rows", &runs[0].1, &runs[2].1, 1e-9);
    let (row_runs, mut runs): (Vec<_>, Vec<_>) = runs.into_iter().partition(|(label, _)| label.contains("rows"));
    // Partial aggregation skipped at once: every input row goes through convert_to_state.
    let skipping = SessionConfig::new()
        .with_target_partitions(2)
        .with_batch_size(64)
        .set_usize("datafusion.execution.skip_partial_aggregation_probe_rows_threshold", 1)
        .set_str(
            "datafusion.execution.skip_partial_aggregation_probe_ratio_threshold",
            "0.0",
        );
    let ctx = SessionContext::new_with_config(skipping);
    ratesheet::register_functions(&ctx).unwrap();
    let (plan, batches) = run_with_plan(&ctx, dir.to_str().unwrap()).await;
    assert!(
        metric_sum(plan.as_ref(), "skipped_aggregation_rows") > 0,
        "partial aggregation was not skipped"
    );
    runs.push(("partial aggregation skipped".into(), fingerprint(&batches)));
    // Rows through `convert_to_state` (only the two-phase plan has a partial phase to skip).
    let ctx = without_single_phase(&ctx);
    let plan = ctx.sql(SYNTH_ROWS).await.unwrap().create_physical_plan().await.unwrap();
    let batches = datafusion::physical_plan::collect(plan.clone(), ctx.task_ctx())
        .await
        .unwrap();
    assert!(
        metric_sum(plan.as_ref(), "skipped_aggregation_rows") > 0,
        "partial aggregation of rows was not skipped"
    );
    assert_same(
        "rows, partial aggregation skipped",
        &row_runs[0].1,
        &fingerprint(&batches),
        1e-12,
    );
    for (label, run) in &row_runs[1..] {
        assert_same(label, &row_runs[0].1, run, 1e-12);
    }
    // The same rows as one file.
    let single = dir.join("single");
    write_parts(&single, 1, 60, 40);
    let ctx = context(2);
    ctx.register_csv("pipes", single.to_str().unwrap(), CsvReadOptions::new())
        .await
        .unwrap();
    runs.push(("one file".into(), fingerprint(&collect(&ctx, SYNTH).await)));
    for (label, run) in &runs[1..] {
        assert_same(label, &runs[0].1, run, 1e-12);
    }
    std::fs::remove_dir_all(&dir).ok();
}

/// Under a memory limit below the working set, with a spilling pool, the aggregate spills and
/// returns identical numbers. (A limit far below it gives a "Resources exhausted" error instead;
/// the reliability suite covers that case.)
#[tokio::test]
async fn a_memory_limited_group_by_spills_and_gives_the_same_numbers() {
    let dir = std::env::temp_dir().join(format!("ratesheet-spill-{}", std::process::id()));
    write_parts(&dir, 4, 4000, 30);
    let free = context(2);
    free.register_csv("pipes", dir.to_str().unwrap(), CsvReadOptions::new())
        .await
        .unwrap();
    let want = fingerprint(&collect(&free, SYNTH).await);

    let pool_bytes: usize = std::env::var("RATESHEET_SPILL_POOL")
        .ok()
        .and_then(|v| v.parse().ok())
        // Small enough that both aggregations spill (asserted below), large enough that the final
        // ORDER BY's merge of fit results (about 1 MB per batch) still gets its memory when the
        // other tests keep both cores busy: at 16 MB it was refused in about one run in five.
        .unwrap_or(24_000_000);
    let runtime = RuntimeEnvBuilder::new()
        .with_memory_pool(Arc::new(FairSpillPool::new(pool_bytes)))
        .build_arc()
        .unwrap();
    // The merge of spilled runs needs its own reservation; DataFusion's default (10 MB) would
    // not fit in the pool.
    let config = SessionConfig::new()
        .with_target_partitions(2)
        .with_batch_size(1024)
        .with_sort_spill_reservation_bytes(256 << 10);
    let ctx = SessionContext::new_with_config_rt(config, runtime);
    ratesheet::register_functions(&ctx).unwrap();
    let (plan, batches) = run_with_plan(&ctx, dir.to_str().unwrap()).await;
    assert_same("spilled", &want, &fingerprint(&batches), 1e-12);
    assert!(spill_count(plan.as_ref()) > 0, "the memory-limited run did not spill");
    // Buffered rows spill too. Under a bounded memory pool the fit keeps the engine's two
    // phases (sql::single_phase is not installed: a partial phase can emit early when memory
    // runs short, which degrades more gently than spilling one phase's whole row state).
    let want = fingerprint(&collect(&free, SYNTH_ROWS).await);
    assert_eq!(
        aggregate_modes(&ctx, SYNTH_ROWS).await,
        [AggregateMode::FinalPartitioned, AggregateMode::Partial]
    );
    let plan = ctx.sql(SYNTH_ROWS).await.unwrap().create_physical_plan().await.unwrap();
    let batches = datafusion::physical_plan::collect(plan.clone(), ctx.task_ctx())
        .await
        .unwrap();
    assert_same("rows spilled", &want, &fingerprint(&batches), 1e-12);
    assert!(
        spill_count(plan.as_ref()) > 0,
        "the memory-limited run of rows did not spill"
    );
    std::fs::remove_dir_all(&dir).ok();
}

/// Runs the synthetic query over the CSV parts in `dir`, keeping the executed plan for its metrics.
async fn run_with_plan(
    ctx: &SessionContext,
    dir: &str,
) -> (Arc<dyn datafusion::physical_plan::ExecutionPlan>, Vec<RecordBatch>) {
    ctx.register_csv("pipes", dir, CsvReadOptions::new()).await.unwrap();
    let plan = ctx.sql(SYNTH).await.unwrap().create_physical_plan().await.unwrap();
    let batches = datafusion::physical_plan::collect(plan.clone(), ctx.task_ctx())
        .await
        .unwrap();
    (plan, batches)
}

fn metric_sum(plan: &dyn datafusion::physical_plan::ExecutionPlan, name: &str) -> usize {
    let own = plan
        .metrics()
        .and_then(|m| m.sum_by_name(name))
        .map_or(0, |v| v.as_usize());
    own + plan
        .children()
        .iter()
        .map(|c| metric_sum(c.as_ref(), name))
        .sum::<usize>()
}

fn spill_count(plan: &dyn datafusion::physical_plan::ExecutionPlan) -> usize {
    let own = plan.metrics().and_then(|m| m.spill_count()).unwrap_or(0);
    own + plan.children().iter().map(|c| spill_count(c.as_ref())).sum::<usize>()
}

/// With no GROUP BY DataFusion uses the plain accumulator; with one it uses the groups
/// accumulator. Both must give the same fit.
/// Per aggregate node of `sql`'s plan: whether it has no GROUP BY (DataFusion then runs the
/// plain `Accumulator`; otherwise our `GroupsAccumulator`).
async fn no_grouping(ctx: &SessionContext, sql: &str) -> Vec<bool> {
    fn walk(p: &Arc<dyn ExecutionPlan>, out: &mut Vec<bool>) {
        if let Some(a) = p.downcast_ref::<AggregateExec>() {
            out.push(a.group_expr().is_true_no_grouping());
        }
        p.children().into_iter().for_each(|c| walk(c, out));
    }
    let plan = ctx.sql(sql).await.unwrap().create_physical_plan().await.unwrap();
    let mut out = Vec::new();
    walk(&plan, &mut out);
    assert!(!out.is_empty(), "no aggregate in the plan of {sql}");
    out
}

/// The group buffers ("rows", "pattern sums") whose states the partial aggregation of `sql`
/// emits, read from the state's codec field (sql::model::state: version << 8 | layout).
async fn partial_layouts(ctx: &SessionContext, sql: &str) -> BTreeSet<&'static str> {
    fn partial(p: &Arc<dyn ExecutionPlan>) -> Option<Arc<dyn ExecutionPlan>> {
        if p.downcast_ref::<AggregateExec>()
            .is_some_and(|a| *a.mode() == AggregateMode::Partial)
        {
            return Some(p.clone());
        }
        p.children().into_iter().find_map(partial)
    }
    let plan = ctx.sql(sql).await.unwrap().create_physical_plan().await.unwrap();
    let node = partial(&plan).unwrap_or_else(|| {
        panic!(
            "no partial aggregation:\n{}",
            datafusion::physical_plan::displayable(plan.as_ref()).indent(true)
        )
    });
    let schema = node.schema();
    let codec = schema
        .fields()
        .iter()
        .position(|f| f.name().ends_with("[codec]"))
        .expect("a codec field in the partial state");
    let mut out = BTreeSet::new();
    for b in datafusion::physical_plan::collect(node, ctx.task_ctx()).await.unwrap() {
        for v in b.column(codec).as_primitive::<UInt32Type>().values() {
            out.insert(match v & 0xff {
                0 => "rows",
                1 => "pattern sums",
                other => panic!("layout {other}"),
            });
        }
    }
    out
}

#[tokio::test]
async fn plain_and_groups_accumulators_agree() {
    let expected = load_json("reference/expected/insurance.json");
    let district1 = &expected["per_group"][0]["groups"][0];
    assert_eq!(district1["group"], 1);
    let ctx = context(2);
    register_insurance(&ctx).await;
    let fit = "poisson_fit(claims, holders, car_group, age_band, 'ref.car_group=<1l, ref.age_band=<25')";
    let plain_sql = format!("SELECT '1', {fit} FROM insurance WHERE district = '1'");
    let grouped_sql = format!("SELECT district, {fit} FROM insurance WHERE district = '1' GROUP BY district");
    assert!(
        no_grouping(&ctx, &plain_sql).await.iter().all(|&g| g),
        "the plain query was planned with a GROUP BY"
    );
    assert!(
        no_grouping(&ctx, &grouped_sql).await.iter().all(|&g| !g),
        "the grouped query lost its GROUP BY"
    );
    let (plain, grouped) = (collect(&ctx, &plain_sql).await, collect(&ctx, &grouped_sql).await);
    // Both paths against statsmodels (insurance.json per_group District 1), then against each other.
    for (label, batches) in [("plain", &plain), ("groups", &grouped)] {
        let rows = fits(batches);
        assert_eq!(rows.len(), 1, "{label}");
        check_against(label, &rows[0].1, rows[0].2, &district1["poisson"]);
    }
    assert_same("plain vs groups", &fingerprint(&plain), &fingerprint(&grouped), 1e-13);
}

/// The SQL example in every function's documentation returns the value statsmodels or scipy
/// give for it (extra_checks.json `documentation_examples`, written by scripts/make_fixtures.py).
#[tokio::test]
async fn every_documentation_example_returns_its_reference_value() {
    let ctx = context(2);
    let reference = load_json("extra_checks.json")["documentation_examples"].clone();
    let mut docs: Vec<(String, Option<String>)> = Vec::new();
    for udf in ratesheet::sql::scalar_functions() {
        let doc = udf
            .documentation()
            .unwrap_or_else(|| panic!("{} has no documentation", udf.name()));
        docs.push((udf.name().to_string(), doc.sql_example.clone()));
    }
    for udaf in ratesheet::sql::aggregate_functions() {
        let doc = udaf
            .documentation()
            .unwrap_or_else(|| panic!("{} has no documentation", udaf.name()));
        docs.push((udaf.name().to_string(), doc.sql_example.clone()));
    }
    assert_eq!(docs.len(), 16);
    for (name, sql) in docs {
        let sql = sql.unwrap_or_else(|| panic!("{name} has no SQL example"));
        let batches = collect(&ctx, &sql).await;
        if name == "ratesheet_version" {
            // Not a number: the build's version, as Cargo.toml states it.
            let version = datafusion::arrow::util::display::array_value_to_string(batches[0].column(0), 0).unwrap();
            assert_eq!(version, env!("CARGO_PKG_VERSION"));
            continue;
        }
        assert_eq!(
            batches.iter().map(RecordBatch::num_rows).sum::<usize>(),
            1,
            "{name} example"
        );
        let column = batches.iter().find(|b| b.num_rows() > 0).unwrap().column(0).clone();
        assert!(!column.is_null(0), "{name} example returned NULL:\n{sql}");
        let got = column
            .as_primitive::<datafusion::arrow::datatypes::Float64Type>()
            .value(0);
        let want = &reference[name.as_str()];
        assert!(!want.is_null(), "{name}: no reference value in extra_checks.json");
        close(
            &format!("{name} documentation example"),
            got,
            f(&want["value"]),
            1e-8,
            1e-15,
        );
    }
}

/// Factor/integer Poisson designs are fitted from pattern sums; the same model with the integer
/// predictor cast to DOUBLE is fitted from rows. Identity checked: both routes agree on every
/// reported number (glm::collapse states the formulas), on 1, 2 and 8 partitions.
#[tokio::test]
async fn pattern_sums_and_row_buffers_give_the_same_fits() {
    let fields = [
        FitField::Deviance,
        FitField::PearsonChi2,
        FitField::Loglik,
        FitField::Aic,
        FitField::Dispersion,
        FitField::NullDeviance,
    ];
    // The age band as a whole number 1..4: BIGINT routes to pattern sums, DOUBLE to rows.
    let sql = |age_type: &str| {
        format!(
            "SELECT district, poisson_fit(claims, holders, car_group, CAST(age AS {age_type}), 'se=hc1') AS fit \
             FROM (SELECT district, claims, holders, car_group, CASE age_band WHEN '<25' THEN 1 \
             WHEN '25-29' THEN 2 WHEN '30-35' THEN 3 ELSE 4 END AS age FROM insurance) \
             GROUP BY district ORDER BY district"
        )
    };
    // Which buffer each query used, read from the partial aggregation's state (two partitions,
    // and even this small CSV read in two ranges, so that the plan has a partial aggregation).
    let probe = SessionContext::new_with_config(
        SessionConfig::new()
            .with_target_partitions(2)
            .with_repartition_file_min_size(0),
    );
    ratesheet::register_functions(&probe).unwrap();
    register_insurance(&probe).await;
    assert_eq!(
        partial_layouts(&probe, &sql("BIGINT")).await,
        BTreeSet::from(["pattern sums"])
    );
    // A row-buffering fit runs in one phase over hash-partitioned input (sql::single_phase); the
    // engine's own two-phase plan, without that rule, shows its partial state.
    assert_eq!(
        aggregate_modes(&probe, &sql("DOUBLE")).await,
        [AggregateMode::SinglePartitioned]
    );
    assert_eq!(
        aggregate_modes(&probe, &sql("BIGINT")).await,
        [AggregateMode::FinalPartitioned, AggregateMode::Partial]
    );
    let probe = without_single_phase(&probe);
    assert_eq!(partial_layouts(&probe, &sql("DOUBLE")).await, BTreeSet::from(["rows"]));
    for partitions in [1, 2, 8] {
        let ctx = context(partitions);
        register_insurance(&ctx).await;
        let run = |sql: String| {
            let ctx = ctx.clone();
            async move { fits(&collect(&ctx, &sql).await) }
        };
        let patterns = run(sql("BIGINT")).await;
        let rows = run(sql("DOUBLE")).await;
        assert_eq!(patterns.len(), rows.len());
        for ((ka, fa, ra), (kb, fb, rb)) in patterns.iter().zip(&rows) {
            assert_eq!(ka, kb);
            for f in fields {
                let (a, b) = (fit_f64(fa, f, *ra), fit_f64(fb, f, *rb));
                assert!((a - b).abs() <= 1e-9 * (1.0 + b.abs()), "{ka} {f:?}: {a} vs {b}");
            }
            for ((na, ea, sa), (nb, eb, sb)) in terms(fa, *ra).iter().zip(terms(fb, *rb).iter()) {
                assert_eq!(na, nb);
                let close = |x: &Option<f64>, y: &Option<f64>| match (x, y) {
                    (Some(x), Some(y)) => (x - y).abs() <= 1e-8 * (1.0 + y.abs()),
                    (None, None) => true,
                    _ => false,
                };
                assert!(
                    close(ea, eb) && close(sa, sb),
                    "{ka} {na}: {ea:?}/{sa:?} vs {eb:?}/{sb:?}"
                );
            }
        }
    }
}

/// Queries after `unnest` whose answers depend on every key (ORDER BY, a join, GROUP BY of the
/// key alone and of the key and the unnested column), with the right answer written out. No
/// ratesheet function is involved.
const AFTER_UNNEST: &[(&str, &str)] = &[
    ("SELECT k, v FROM u ORDER BY k, v", "1 1|1 2|1 3|2 4|2 5"),
    (
        "SELECT COUNT(*) AS c FROM u JOIN (VALUES (1), (2)) AS keys(k) ON u.k = keys.k",
        "5",
    ),
    ("SELECT k, COUNT(*) AS c FROM u GROUP BY k ORDER BY k", "1 3|2 2"),
    (
        "SELECT k, v, COUNT(*) AS c FROM u GROUP BY k, v ORDER BY k, v",
        "1 1 1|1 2 1|1 3 1|2 4 1|2 5 1",
    ),
];

/// The queries of [`AFTER_UNNEST`] that plain DataFusion 55 answers wrongly.
const WRONG_IN_PLAIN_DATAFUSION: usize = 3;

const LISTED: &str = "CREATE VIEW u AS SELECT k, unnest(vs) AS v FROM \
    (SELECT k, array_agg(v) AS vs FROM (VALUES (1, 3), (1, 1), (1, 2), (2, 5), (2, 4)) AS t(k, v) GROUP BY k)";

async fn rows_as_text(ctx: &SessionContext, sql: &str) -> String {
    let batches = collect(ctx, sql).await;
    let mut rows = Vec::new();
    for b in &batches {
        for r in 0..b.num_rows() {
            let cells: Vec<String> = b
                .columns()
                .iter()
                .map(|c| datafusion::arrow::util::display::array_value_to_string(c, r).unwrap())
                .collect();
            rows.push(cells.join(" "));
        }
    }
    rows.join("|")
}

/// With ratesheet's session correction (`sql::unnest_keys`), every key applies after `unnest`.
#[tokio::test]
async fn keys_apply_after_unnest_in_a_ratesheet_session() {
    let ctx = context(2);
    collect(&ctx, LISTED).await;
    for (sql, expected) in AFTER_UNNEST {
        assert_eq!(&rows_as_text(&ctx, sql).await, expected, "{sql}");
    }
}

/// Canary: plain DataFusion 55 still drops these keys (its `Unnest` keeps its input's
/// uniqueness). When this test fails, DataFusion has fixed it: remove `sql::unnest_keys`
/// (DEVELOPERS.md says so too).
#[tokio::test]
async fn plain_datafusion_still_drops_keys_after_unnest() {
    let ctx = SessionContext::new_with_config(SessionConfig::new().with_target_partitions(2));
    collect(&ctx, LISTED).await;
    let mut wrong = 0;
    for (sql, expected) in AFTER_UNNEST {
        if &rows_as_text(&ctx, sql).await != expected {
            wrong += 1;
        }
    }
    assert_eq!(
        wrong, WRONG_IN_PLAIN_DATAFUSION,
        "DataFusion now keeps (some) keys after unnest"
    );
}

/// The correction sits before every rule that reads functional dependencies, in the default
/// rule list of this DataFusion version, with the analyzer rule for implicit grouping keys; it
/// is installed once however often functions are registered.
#[test]
fn the_unnest_correction_precedes_every_rule_that_reads_dependencies() {
    use ratesheet::sql::unnest_keys::{DEPENDENCY_READERS, IMPLICIT_KEYS_NAME, RULE_NAME};
    let ctx = SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    ratesheet::register_functions(&ctx).unwrap();
    let state = ctx.state();
    let names: Vec<&str> = state.optimizers().iter().map(|r| r.name()).collect();
    for reader in DEPENDENCY_READERS {
        let at = names
            .iter()
            .position(|n| n == reader)
            .unwrap_or_else(|| panic!("{reader} not in {names:?}"));
        assert_eq!(names[at - 1], RULE_NAME, "{names:?}");
    }
    assert_eq!(
        names.iter().filter(|n| **n == RULE_NAME).count(),
        DEPENDENCY_READERS.len()
    );
    let analyzers: Vec<&str> = state.analyzer().rules.iter().map(|r| r.name()).collect();
    assert_eq!(
        analyzers.iter().filter(|n| **n == IMPLICIT_KEYS_NAME).count(),
        1,
        "{analyzers:?}"
    );
}
