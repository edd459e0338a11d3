//! The same SQL on an Apache Ballista cluster: one scheduler and two executors on loopback,
//! started in this process from the code that `ratesheet cluster scheduler|executor` runs, and
//! a client session from the code behind `ratesheet --cluster`. Every number must equal the
//! single-process result to 1e-12 relative. The real processes are tested in `cli`.

use std::time::Duration;

use datafusion::arrow::array::{Array, ArrayRef, AsArray, RecordBatch};
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::arrow::util::display::array_value_to_string;
use datafusion::prelude::SessionContext;
use ratesheet::cli::session::{SessionSettings, new_cluster_session, new_session, open_table};
use ratesheet::cli::statements::statements;
use ratesheet::cluster::executor::ExecutorSettings;
use ratesheet::cluster::scheduler::{SchedulerSettings, bind, serve};

use crate::support::fixture_path;

/// Starts a scheduler on a free loopback port and `executors` executors joined to it; returns
/// the scheduler's `HOST:PORT`. The tasks end with the test's runtime.
pub async fn start_cluster(executors: usize) -> String {
    let listener = bind("127.0.0.1:0".parse().unwrap()).await.unwrap();
    let address = listener.local_addr().unwrap();
    tokio::spawn(async move { serve(listener, &SchedulerSettings::default()).await });
    for _ in 0..executors {
        let mut settings = ExecutorSettings::new("127.0.0.1", address.port());
        settings.slots = Some(2);
        tokio::spawn(ratesheet::cluster::executor::run(settings));
    }
    address.to_string()
}

/// Every value of two results equal: floats to `rel` relative (exactly equal NaN/inf/NULL),
/// everything else by its text; structs and lists compared element by element.
fn assert_same(what: &str, local: &[RecordBatch], remote: &[RecordBatch], rel: f64) {
    let rows = |b: &[RecordBatch]| b.iter().map(|b| b.num_rows()).sum::<usize>();
    assert_eq!(rows(local), rows(remote), "{what}: row counts");
    let local = datafusion::arrow::compute::concat_batches(&local[0].schema(), local).unwrap();
    let remote = datafusion::arrow::compute::concat_batches(&remote[0].schema(), remote).unwrap();
    assert_eq!(local.num_columns(), remote.num_columns(), "{what}: columns");
    for c in 0..local.num_columns() {
        let name = local.schema().field(c).name().clone();
        same_array(
            &format!("{what}: column {name}"),
            local.column(c),
            remote.column(c),
            rel,
        );
    }
}

fn same_array(what: &str, a: &ArrayRef, b: &ArrayRef, rel: f64) {
    assert_eq!(a.len(), b.len(), "{what}: lengths");
    // Ballista reads Parquet text as Utf8 where a local session reads Utf8View: same values.
    let text = |t: &DataType| matches!(t, DataType::Utf8 | DataType::Utf8View | DataType::LargeUtf8);
    if !(text(a.data_type()) && text(b.data_type())) {
        assert_eq!(a.data_type(), b.data_type(), "{what}: types");
    }
    for r in 0..a.len() {
        assert_eq!(a.is_null(r), b.is_null(r), "{what} row {r}: NULL on one side only");
    }
    match a.data_type() {
        DataType::Float64 => {
            let (x, y) = (a.as_primitive::<Float64Type>(), b.as_primitive::<Float64Type>());
            for r in (0..a.len()).filter(|&r| !a.is_null(r)) {
                let (u, v) = (x.value(r), y.value(r));
                let same = u == v || (u.is_nan() && v.is_nan()) || (u - v).abs() <= rel * u.abs().max(v.abs());
                assert!(same, "{what} row {r}: {u:e} locally, {v:e} on the cluster");
            }
        }
        DataType::Struct(fields) => {
            let (x, y) = (a.as_struct(), b.as_struct());
            for (k, f) in fields.iter().enumerate() {
                same_array(&format!("{what}.{}", f.name()), x.column(k), y.column(k), rel);
            }
        }
        DataType::List(_) => {
            let (x, y) = (a.as_list::<i32>(), b.as_list::<i32>());
            assert_eq!(x.value_offsets(), y.value_offsets(), "{what}: list lengths");
            same_array(&format!("{what}[]"), x.values(), y.values(), rel);
        }
        DataType::LargeList(_) => {
            let (x, y) = (a.as_list::<i64>(), b.as_list::<i64>());
            assert_eq!(x.value_offsets(), y.value_offsets(), "{what}: list lengths");
            same_array(&format!("{what}[]"), x.values(), y.values(), rel);
        }
        _ => {
            for r in 0..a.len() {
                let (u, v) = (
                    array_value_to_string(a, r).unwrap(),
                    array_value_to_string(b, r).unwrap(),
                );
                assert_eq!(u, v, "{what} row {r}");
            }
        }
    }
}

async fn run(ctx: &SessionContext, sql: &str) -> Vec<RecordBatch> {
    ctx.sql(sql)
        .await
        .unwrap_or_else(|e| panic!("{sql}: {e}"))
        .collect()
        .await
        .unwrap_or_else(|e| panic!("{sql}: {e}"))
}

/// Opens the same tables in both sessions.
async fn open_both(local: &SessionContext, remote: &SessionContext, paths: &[String]) {
    for p in paths {
        let a = open_table(local, p, None).await.unwrap();
        let b = open_table(remote, p, None)
            .await
            .unwrap_or_else(|e| panic!("{p} on the cluster: {e}"));
        assert_eq!(a, b, "{p}: the same table name locally and on the cluster");
    }
}

/// Statements run in both sessions; each result compared.
async fn compare(local: &SessionContext, remote: &SessionContext, sql: &[&str]) -> usize {
    let mut compared = 0;
    for statement in sql {
        let (a, b) = (run(local, statement).await, run(remote, statement).await);
        if a.is_empty() && b.is_empty() {
            continue;
        }
        assert_same(statement, &a, &b, 1e-12);
        compared += 1;
    }
    compared
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn fits_on_an_in_process_cluster_equal_the_single_process_results() {
    let address = start_cluster(2).await;
    let settings = SessionSettings::default();
    let local = new_session(&settings).unwrap();
    let remote = tokio::time::timeout(Duration::from_secs(60), new_cluster_session(&settings, &address))
        .await
        .expect("connecting within 60 s")
        .unwrap();

    // Held-in reference data (tests/fixtures/reference): one statement per family and helper.
    let data = |f: &str| {
        fixture_path(&format!("reference/data/{f}"))
            .to_string_lossy()
            .to_string()
    };
    open_both(
        &local,
        &remote,
        &[
            data("insurance.csv"),
            data("breslow.csv"),
            data("doctorvisits.csv"),
            data("mmmec.csv"),
        ],
    )
    .await;
    let reference = [
        "SELECT \"District\", poisson_fit(\"Claims\", \"Holders\", \"Group\", \"Age\", 'ref.Group=<1l, ref.Age=<25') AS fit \
         FROM insurance GROUP BY \"District\" ORDER BY 1",
        "SELECT negbin_fit(y, n, smoke, age) AS fit FROM breslow",
        "CREATE VIEW breslow_groups AS SELECT *, CAST(age AS VARCHAR) AS age_group FROM breslow",
        "SELECT fit_lr_test(poisson_fit(y, n, smoke, age_group), poisson_fit(y, n, smoke, age)) AS t FROM breslow_groups",
        "SELECT gender, negbin_count_fit(visits, age, income, illness) AS fit FROM doctorvisits GROUP BY gender ORDER BY 1",
        "SELECT linear_fit(ln(visits + 1), age, income, gender) AS fit FROM doctorvisits",
        "SELECT nation, standardized_ratio(deaths, expected) AS oe FROM mmmec GROUP BY nation ORDER BY 1",
        "SELECT poisson_fit(y, n, smoke, age, 'ci=profile') AS fit FROM breslow",
    ];
    assert_eq!(compare(&local, &remote, &reference).await, reference.len() - 1);

    // A session default changes the cluster's result exactly as it changes the local one.
    let by_district = reference[0];
    assert!(by_district.contains("GROUP BY \"District\""));
    let at_95 = run(&remote, by_district).await;
    for ctx in [&local, &remote] {
        run(ctx, "SET ratesheet.level = 0.9").await;
    }
    assert_eq!(compare(&local, &remote, &[by_district]).await, 1);
    let at_90 = run(&remote, by_district).await;
    let level = |b: &[RecordBatch]| {
        let fit = b[0].column(1).as_struct();
        fit.column_by_name("level")
            .unwrap()
            .as_primitive::<Float64Type>()
            .value(0)
    };
    assert_eq!(
        (level(&at_95), level(&at_90)),
        (0.95, 0.9),
        "SET ratesheet.level reached the cluster"
    );

    // The demo script, statement by statement, on the demo's Parquet file and CSV file.
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = root.join("demo-parquet");
    open_both(
        &local,
        &remote,
        &[
            demo.join("pipe_breaks.parquet").to_string_lossy().to_string(),
            demo.join("callouts.csv").to_string_lossy().to_string(),
        ],
    )
    .await;
    let script = std::fs::read_to_string(root.join("sql-examples/demo.sql")).unwrap();
    let demo_statements = statements(&script);
    let refs: Vec<&str> = demo_statements.iter().map(String::as_str).collect();
    assert!(compare(&local, &remote, &refs).await >= 6);

    // A multi-file Parquet table, its files split across the executors.
    let parts = std::env::temp_dir().join(format!("ratesheet-cluster-parts-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&parts);
    std::fs::create_dir_all(&parts).unwrap();
    for (k, district) in ["Harbour Flats", "Kiln Row", "Quarry Hill"].iter().enumerate() {
        let file = parts.join(format!("part-{k}.parquet"));
        run(
            &local,
            &format!(
                "COPY (SELECT * FROM pipe_breaks WHERE district = '{district}') TO '{}'",
                file.display()
            ),
        )
        .await;
    }
    run(
        &local,
        &format!(
            "COPY (SELECT * FROM pipe_breaks WHERE district NOT IN ('Harbour Flats', 'Kiln Row', 'Quarry Hill')) TO '{}'",
            parts.join("part-3.parquet").display()
        ),
    )
    .await;
    open_both(&local, &remote, &[parts.to_string_lossy().to_string()]).await;
    let table = ratesheet::cli::session::table_name_for(&parts.to_string_lossy());
    let split = format!(
        "SELECT district, poisson_fit(breaks, km_years, material, diameter_class, soil_corrosivity) AS fit \
         FROM {table} GROUP BY district ORDER BY district"
    );
    assert_eq!(compare(&local, &remote, &[split.as_str()]).await, 1);
    let whole = split.replace(&format!("FROM {table}"), "FROM pipe_breaks");
    assert_same(
        "split vs whole file",
        &run(&local, &whole).await,
        &run(&remote, &split).await,
        1e-12,
    );
    let _ = std::fs::remove_dir_all(&parts);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_dropped_statement_has_its_job_cancelled_on_the_scheduler() {
    use ballista_core::serde::protobuf::scheduler_grpc_client::SchedulerGrpcClient;
    use ballista_core::serde::protobuf::{GetJobStatusParams, job_status};
    use ratesheet::cluster::client::{CancelOnDrop, finish_cancels, job_ids};

    let address = start_cluster(2).await;
    let settings = SessionSettings::default();
    let (local, remote) = (
        new_session(&settings).unwrap(),
        new_cluster_session(&settings, &address).await.unwrap(),
    );
    // A job of a few seconds: the demo rows 1,000 times in four files, a continuous predictor.
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    open_table(
        &local,
        &root.join("demo-parquet/pipe_breaks.parquet").to_string_lossy(),
        None,
    )
    .await
    .unwrap();
    let big = std::env::temp_dir().join(format!("ratesheet-cluster-cancel-{}", std::process::id()));
    std::fs::create_dir_all(&big).unwrap();
    for k in 0..4 {
        let file = big.join(format!("part-{k}.parquet"));
        run(
            &local,
            &format!(
                "COPY (SELECT pipe_breaks.* FROM pipe_breaks CROSS JOIN generate_series(1, 250)) TO '{}'",
                file.display()
            ),
        )
        .await;
    }
    let table = open_table(&remote, &big.to_string_lossy(), None).await.unwrap();
    let sql = format!(
        "SELECT district, poisson_fit(breaks, km_years, material, (2010 - install_decade) / 10.0, diameter_class) AS fit \
         FROM {table} GROUP BY district"
    );
    let plan = remote.sql(&sql).await.unwrap().create_physical_plan().await.unwrap();
    let guard = CancelOnDrop::new(&remote, &plan);
    let running = tokio::spawn(datafusion::physical_plan::collect(plan.clone(), remote.task_ctx()));
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    let job = loop {
        if let Some(job) = job_ids(&plan).into_iter().next() {
            break job;
        }
        assert!(std::time::Instant::now() < deadline, "the statement never got a job id");
        tokio::time::sleep(Duration::from_millis(5)).await;
    };
    // What Ctrl-C does: the statement's future is dropped with its guard armed.
    running.abort();
    drop(guard);
    finish_cancels(Duration::from_secs(5)).await;
    let mut scheduler = SchedulerGrpcClient::connect(format!("http://{address}")).await.unwrap();
    let mut last = None;
    for _ in 0..100 {
        let status = scheduler
            .get_job_status(GetJobStatusParams { job_id: job.clone() })
            .await
            .unwrap()
            .into_inner()
            .status
            .and_then(|s| s.status);
        if let Some(job_status::Status::Failed(failed)) = &status {
            assert_eq!(failed.error, "Cancelled", "job {job}");
            let _ = std::fs::remove_dir_all(&big);
            return;
        }
        last = status;
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("job {job} was not cancelled on the scheduler; last status {last:?}");
}

/// `ratesheet_version()` as an executor of another build would answer it.
#[derive(Debug, PartialEq, Eq, Hash)]
struct OtherVersion(datafusion::logical_expr::Signature);

impl datafusion::logical_expr::ScalarUDFImpl for OtherVersion {
    fn name(&self) -> &str {
        "ratesheet_version"
    }
    fn signature(&self) -> &datafusion::logical_expr::Signature {
        &self.0
    }
    fn return_type(&self, _: &[DataType]) -> datafusion::error::Result<DataType> {
        Ok(DataType::Utf8)
    }
    fn invoke_with_args(
        &self,
        args: datafusion::logical_expr::ScalarFunctionArgs,
    ) -> datafusion::error::Result<datafusion::logical_expr::ColumnarValue> {
        let values = datafusion::arrow::array::StringArray::from(vec!["0.0.1-other"; args.number_rows]);
        Ok(datafusion::logical_expr::ColumnarValue::Array(std::sync::Arc::new(
            values,
        )))
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_cluster_of_another_version_is_refused_by_name() {
    let listener = bind("127.0.0.1:0".parse().unwrap()).await.unwrap();
    let address = listener.local_addr().unwrap();
    tokio::spawn(async move { serve(listener, &SchedulerSettings::default()).await });
    let mut config =
        ratesheet::cluster::executor::process_config(&ExecutorSettings::new("127.0.0.1", address.port())).unwrap();
    let state = ratesheet::cluster::cluster_state(ratesheet::cluster::cluster_config()).unwrap();
    let mut registry = ballista_core::registry::BallistaFunctionRegistry::from(&state);
    let other = OtherVersion(datafusion::logical_expr::Signature::nullary(
        datafusion::logical_expr::Volatility::Volatile,
    ));
    registry.scalar_functions.insert(
        "ratesheet_version".into(),
        std::sync::Arc::new(datafusion::logical_expr::ScalarUDF::new_from_impl(other)),
    );
    config.override_function_registry = Some(std::sync::Arc::new(registry));
    tokio::spawn(ballista_executor::executor_process::start_executor_process(
        std::sync::Arc::new(config),
    ));
    let e = match new_cluster_session(&SessionSettings::default(), &address.to_string()).await {
        Err(e) => e.to_string(),
        Ok(_) => panic!("a cluster of another version was accepted"),
    };
    assert!(e.contains("version mismatch"), "{e}");
    assert!(e.contains("run ratesheet 0.0.1-other"), "{e}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_unreachable_scheduler_is_named_within_seconds() {
    // A port that was free a moment ago: nothing listens there.
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let address = format!("127.0.0.1:{port}");
    let started = std::time::Instant::now();
    let e = match new_cluster_session(&SessionSettings::default(), &address).await {
        Err(e) => e.to_string(),
        Ok(_) => panic!("connected to {address}, where nothing listens"),
    };
    assert!(
        started.elapsed() < Duration::from_secs(10),
        "took {:?}",
        started.elapsed()
    );
    assert!(e.contains(&format!("cannot reach the scheduler at {address}")), "{e}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn spreadsheets_and_unreadable_paths_are_refused_on_a_cluster() {
    let address = start_cluster(1).await;
    let remote = new_cluster_session(&SessionSettings::default(), &address)
        .await
        .unwrap();
    let book = std::env::temp_dir().join(format!("ratesheet-cluster-{}.xlsx", std::process::id()));
    std::fs::write(&book, b"not opened").unwrap();
    let e = open_table(&remote, &book.to_string_lossy(), None)
        .await
        .unwrap_err()
        .to_string();
    assert!(e.contains("cannot travel to the cluster at"), "{e}");
    let _ = std::fs::remove_file(&book);
    // A file this machine reads and the cluster does not: on one machine every process sees the
    // same files, so the file is removed after it was opened (the scheduler then lists none).
    let csv = std::env::temp_dir().join(format!("ratesheet-cluster-gone-{}.csv", std::process::id()));
    std::fs::copy(fixture_path("reference/data/breslow.csv"), &csv).unwrap();
    let name = open_table(&remote, &csv.to_string_lossy(), None).await.unwrap();
    std::fs::remove_file(&csv).unwrap();
    let e = ratesheet::cli::session::check_cluster_rows(&remote, &name, &csv.to_string_lossy(), true)
        .await
        .unwrap_err()
        .to_string();
    assert!(e.contains("finds no rows there, while this machine does"), "{e}");
    assert!(e.contains("scheduler and executors read local paths themselves"), "{e}");
}

/// The real processes: `ratesheet cluster scheduler`, two `ratesheet cluster executor`s and
/// `ratesheet --cluster`, all on loopback.
pub mod processes {
    use std::io::{BufRead, BufReader};
    use std::process::{Child, Command, Stdio};
    use std::time::{Duration, Instant};

    /// A started process, killed when dropped (a failing test leaves nothing running); its
    /// stderr lines arrive on `lines`.
    pub struct Running {
        child: Child,
        pub lines: std::sync::mpsc::Receiver<String>,
    }

    impl Drop for Running {
        fn drop(&mut self) {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }

    /// Starts the program with `args`; `log` is its RATESHEET_LOG.
    fn start(args: &[&str], log: &str) -> Running {
        start_with(args, log, &[])
    }

    /// As [`start`], with extra environment variables.
    pub fn start_with(args: &[&str], log: &str, env: &[(&str, String)]) -> Running {
        let mut child = Command::new(env!("CARGO_BIN_EXE_ratesheet"))
            .current_dir(env!("CARGO_MANIFEST_DIR"))
            .envs(env.iter().map(|(k, v)| (*k, v.as_str())))
            .env("RATESHEET_LOG", log)
            .args(args)
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let stderr = child.stderr.take().unwrap();
        let (tx, lines) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                let _ = tx.send(line);
            }
        });
        Running { child, lines }
    }

    /// Waits until the process writes a line containing `text` to stderr.
    pub fn await_line(p: &Running, text: &str, limit: Duration) -> bool {
        let deadline = Instant::now() + limit;
        while Instant::now() < deadline {
            if let Ok(line) = p.lines.recv_timeout(Duration::from_millis(50))
                && line.contains(text)
            {
                return true;
            }
        }
        false
    }

    fn sigterm(p: &Running) {
        // SAFETY: kill(2) on the pid of a child we own.
        unsafe {
            libc::kill(p.child.id() as i32, libc::SIGTERM);
        }
    }

    /// Waits for a process to exit; its status, or None after `limit`.
    fn exit_within(p: &mut Running, limit: Duration) -> Option<std::process::ExitStatus> {
        let deadline = Instant::now() + limit;
        while Instant::now() < deadline {
            if let Ok(Some(status)) = p.child.try_wait() {
                return Some(status);
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        None
    }

    /// Runs the client to the end (or kills it after `limit`): exit code, stdout, stderr, time.
    fn client(args: &[&str], limit: Duration) -> (Option<i32>, String, String, Duration) {
        client_with(args, limit, &[])
    }

    /// As [`client`], with extra environment variables.
    pub fn client_with(
        args: &[&str],
        limit: Duration,
        env: &[(&str, String)],
    ) -> (Option<i32>, String, String, Duration) {
        let started = Instant::now();
        let mut child = Command::new(env!("CARGO_BIN_EXE_ratesheet"))
            .current_dir(env!("CARGO_MANIFEST_DIR"))
            .envs(env.iter().map(|(k, v)| (*k, v.as_str())))
            .args(args)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let (mut out, mut err) = (child.stdout.take().unwrap(), child.stderr.take().unwrap());
        let out = std::thread::spawn(move || {
            let mut s = String::new();
            let _ = std::io::Read::read_to_string(&mut out, &mut s);
            s
        });
        let err = std::thread::spawn(move || {
            let mut s = String::new();
            let _ = std::io::Read::read_to_string(&mut err, &mut s);
            s
        });
        let (_, lines) = std::sync::mpsc::channel();
        let mut child = Running { child, lines };
        let status = exit_within(&mut child, limit);
        drop(child);
        (
            status.and_then(|s| s.code()),
            out.join().unwrap(),
            err.join().unwrap(),
            started.elapsed(),
        )
    }

    /// The duration at the end of an executor's "Finished task : [...] in 1.25s" line.
    fn task_seconds(line: &str) -> f64 {
        let tail = line.rsplit(" in ").next().unwrap_or("");
        if let Some(ms) = tail.strip_suffix("ms") {
            ms.parse::<f64>().map_or(0.0, |v| v / 1e3)
        } else if let Some(us) = tail.strip_suffix("µs") {
            us.parse::<f64>().map_or(0.0, |v| v / 1e6)
        } else {
            tail.strip_suffix('s')
                .and_then(|s| s.parse::<f64>().ok())
                .unwrap_or(0.0)
        }
    }

    pub fn free_port() -> u16 {
        std::net::TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port()
    }

    const PER_DISTRICT: &str = "SELECT district, poisson_fit(breaks, km_years, material, install_decade, diameter_class, soil_corrosivity) AS fit \
                                FROM pipe_breaks GROUP BY district ORDER BY district";

    #[test]
    fn a_cluster_of_real_processes_prints_what_a_local_run_prints_and_survives_a_lost_executor() {
        let port = free_port();
        let address = format!("127.0.0.1:{port}");
        let mut scheduler = start(
            &["cluster", "scheduler", "--bind", &address, "--lost-after", "5"],
            "warn",
        );
        assert!(await_line(
            &scheduler,
            "scheduler listening on",
            Duration::from_secs(30)
        ));
        let work = std::env::temp_dir().join(format!("ratesheet-cluster-work-{}", std::process::id()));
        let dirs = [work.join("a"), work.join("b")];
        let mut executors: Vec<Running> = dirs
            .iter()
            .map(|d| {
                let work_dir = d.to_string_lossy().to_string();
                let args = [
                    "cluster",
                    "executor",
                    "--scheduler",
                    &address,
                    "--slots",
                    "2",
                    "--work-dir",
                    &work_dir,
                ];
                // Its task log lines tell the test when the executor has finished a task.
                let e = start(&args, "ballista_executor=info");
                assert!(await_line(&e, "executor joining", Duration::from_secs(30)));
                e
            })
            .collect();

        // 1. The per-district fit, given on the command line: stdout as in a local run.
        let file = "demo-parquet/pipe_breaks.parquet";
        let local = client(
            &[file, "--run", PER_DISTRICT, "--format", "csv"],
            Duration::from_secs(60),
        );
        assert_eq!(local.0, Some(0), "local run: {}", local.2);
        let remote = client(
            &["--cluster", &address, file, "--run", PER_DISTRICT, "--format", "csv"],
            Duration::from_secs(90),
        );
        assert_eq!(remote.0, Some(0), "cluster run failed: {}", remote.2);
        assert_eq!(remote.1, local.1, "stdout on the cluster differs from the local run");
        assert!(local.1.lines().count() > 5);

        // 2. A heavier job (the demo rows 1,000 times, a continuous predictor so that rows are
        // buffered and shuffled); one executor is killed while it runs.
        // Four files, so that the first stage has a task on each executor.
        let big = work.join("big");
        std::fs::create_dir_all(&big).unwrap();
        let copies: Vec<String> = (0..4)
            .map(|k| {
                format!(
                    "COPY (SELECT pipe_breaks.* FROM pipe_breaks CROSS JOIN generate_series(1, 250)) TO '{}'",
                    big.join(format!("part-{k}.parquet")).display()
                )
            })
            .collect();
        assert_eq!(
            client(&[file, "--run", &copies.join(";")], Duration::from_secs(60)).0,
            Some(0)
        );
        let big = big.to_string_lossy().to_string();
        let heavy = "SELECT district, poisson_fit(breaks, km_years, material, (2010 - install_decade) / 10.0, diameter_class, soil_corrosivity) AS fit \
                     FROM big GROUP BY district ORDER BY district";
        let want = client(&[&big, "--run", heavy, "--format", "csv"], Duration::from_secs(120));
        assert_eq!(want.0, Some(0), "local heavy run: {}", want.2);
        for e in &executors {
            while e.lines.try_recv().is_ok() {}
        }
        // The first executor to finish a task of the job is killed (SIGKILL: no goodbye to the
        // scheduler) right then: the job's next stage still has to fetch that task's output.
        // The client's small jobs before it (handshake, opening the table) take milliseconds;
        // the job's tasks, a quarter of a second or more.
        let watched = std::mem::take(&mut executors);
        let killer = std::thread::spawn(move || {
            let deadline = Instant::now() + Duration::from_secs(60);
            let mut watched = watched;
            while Instant::now() < deadline {
                for k in 0..watched.len() {
                    while let Ok(line) = watched[k].lines.try_recv() {
                        if line.contains("Finished task") && task_seconds(&line) >= 0.25 {
                            drop(watched.remove(k));
                            return Some(watched);
                        }
                    }
                }
                std::thread::sleep(Duration::from_millis(5));
            }
            None
        });
        let got = client(
            &["--cluster", &address, &big, "--run", heavy, "--format", "csv"],
            Duration::from_secs(120),
        );
        let mut executors = killer.join().unwrap().expect("no executor finished a task of the job");
        eprintln!(
            "lost executor: exit {:?} after {:.1} s; stderr: {}",
            got.0,
            got.3.as_secs_f64(),
            got.2.trim()
        );
        match got.0 {
            Some(0) => assert_eq!(got.1, want.1, "after a lost executor the numbers changed"),
            Some(_) => assert!(
                got.2.trim_start().starts_with("error") && got.2.trim().lines().count() == 1 && got.1.is_empty(),
                "a failure must be one clear error line and no partial result: {}",
                got.2
            ),
            None => panic!("the client hung for 120 s after an executor was lost"),
        }

        // 3. SIGTERM stops the remaining processes cleanly.
        let mut rest = executors.remove(0);
        sigterm(&rest);
        let status = exit_within(&mut rest, Duration::from_secs(15)).expect("the executor stops on SIGTERM");
        assert!(status.success(), "executor exit status {status:?}");
        sigterm(&scheduler);
        let status = exit_within(&mut scheduler, Duration::from_secs(15)).expect("the scheduler stops on SIGTERM");
        assert!(status.success(), "scheduler exit status {status:?}");
        let _ = std::fs::remove_dir_all(&work);
    }

    #[test]
    fn a_scheduler_without_executors_is_reported_not_waited_on_forever() {
        let port = free_port();
        let address = format!("127.0.0.1:{port}");
        let scheduler = start(&["cluster", "scheduler", "--bind", &address], "warn");
        assert!(await_line(
            &scheduler,
            "scheduler listening on",
            Duration::from_secs(30)
        ));
        let got = client(&["--cluster", &address, "--run", "SELECT 1"], Duration::from_secs(90));
        assert_eq!(got.0, Some(1), "stderr: {}", got.2);
        assert!(got.2.contains("waiting for an executor"), "{}", got.2);
        assert!(got.2.contains("does it have executors?"), "{}", got.2);
        assert!(got.1.is_empty());
    }
}
