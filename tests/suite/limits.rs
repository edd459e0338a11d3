//! Resource limits: a memory limit far below the working set spills or fails naming the limit,
//! and cancelled queries give all their memory back.

use std::time::{Duration, Instant};

use ratesheet::cli::hints::Hints;
use ratesheet::cli::progress::collect_with_progress;
use ratesheet::cli::session::{SessionSettings, new_session};

/// 1,000,000 rows in 50,000 groups of a two-parameter Poisson fit (rows buffered per group).
/// Sums are rounded so that the answer does not depend on the order groups are added in.
const BIG_GROUP_BY: &str = "SELECT COUNT(*) AS groups, ROUND(SUM(fit.deviance), 6) AS deviance_sum, \
     ROUND(SUM(fit['terms'][2]['estimate']), 6) AS slope_sum FROM (SELECT v % 50000 AS g, \
     poisson_fit((v * v) % 7, 1.0 + v % 3, (v % 11) * 1.0) AS fit FROM generate_series(1, 1000000) t(v) GROUP BY g)";

fn run_limited(limit: Option<&str>) -> (Option<i32>, String, String) {
    let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_ratesheet"));
    c.args(["--threads", "2", "--run", BIG_GROUP_BY, "--format", "csv"]);
    if let Some(l) = limit {
        c.args(["--memory-limit", l]);
    }
    let out = c.output().unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn a_memory_limit_far_below_the_working_set_spills_or_names_the_limit() {
    let (code, unlimited, err) = run_limited(None);
    assert_eq!(code, Some(0), "{err}");
    // About 60 MB of rows and group state: 4 MiB spills and gives the same numbers.
    let (code, limited, err) = run_limited(Some("4M"));
    assert_eq!(code, Some(0), "{err}");
    assert_eq!(limited, unlimited);
    // 1 MiB cannot hold one partition's merge buffers: a memory error that names the limit,
    // an exit status of 1, never a kill by a signal.
    let (code, out, err) = run_limited(Some("1M"));
    assert_eq!(code, Some(1), "{out}{err}");
    assert!(
        err.contains("more memory than the limit of 1.0 MiB (set with --memory-limit)"),
        "{err}"
    );
}

/// Cancels the same query 200 times: 150 times once the aggregation holds memory (plus 0 to
/// 60 ms), 50 times at once; after each cancel the session's memory pool must return to zero,
/// and the session must still answer correctly at the end.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_hundred_cancelled_queries_return_the_memory_pool_to_zero() {
    let ctx = new_session(&SessionSettings {
        threads: Some(2),
        memory_limit: Some(512 << 20),
    })
    .unwrap();
    let pool = ctx.runtime_env().memory_pool.clone();
    let endless = "SELECT v % 2000 AS g, poisson_fit(v % 5, 1.0 + v % 2, (v % 7) * 1.0) AS fit \
                   FROM generate_series(1, 1000000000) t(v) GROUP BY g";
    let mut held_when_cancelled = 0;
    for cycle in 0..200u64 {
        let task_ctx = ctx.clone();
        let task =
            tokio::spawn(async move { collect_with_progress(&task_ctx, endless, false, &Hints::new(false)).await });
        // Every fourth cycle cancels at once (before or while the statement starts); the others
        // wait until the aggregation holds memory, then a further 0-60 ms.
        if cycle % 4 != 0 {
            let started = Instant::now();
            while pool.reserved() == 0 {
                assert!(!task.is_finished(), "cycle {cycle}: the query ended by itself");
                assert!(
                    started.elapsed() < Duration::from_secs(60),
                    "cycle {cycle}: no memory reserved after 60 s"
                );
                tokio::time::sleep(Duration::from_millis(1)).await;
            }
            tokio::time::sleep(Duration::from_millis(cycle * 37 % 61)).await;
        }
        if pool.reserved() > 0 {
            held_when_cancelled += 1;
        }
        task.abort();
        assert!(
            task.await.is_err_and(|e| e.is_cancelled()),
            "cycle {cycle}: the query ended by itself"
        );
        let deadline = Instant::now() + Duration::from_secs(30);
        while pool.reserved() > 0 {
            assert!(
                Instant::now() < deadline,
                "cycle {cycle}: {} bytes still reserved 30 s after the cancel",
                pool.reserved()
            );
            tokio::time::sleep(Duration::from_millis(2)).await;
        }
    }
    eprintln!("200 cancel cycles: memory held at the cancel in {held_when_cancelled}, all returned");
    assert!(
        held_when_cancelled >= 150,
        "only {held_when_cancelled} of the 150 waiting cycles held memory when cancelled"
    );
    let batches = collect_with_progress(
        &ctx,
        "SELECT SUM(v) AS s FROM generate_series(1, 1000) t(v)",
        false,
        &Hints::new(false),
    )
    .await
    .unwrap();
    let text = datafusion::arrow::util::pretty::pretty_format_batches(&batches)
        .unwrap()
        .to_string();
    assert!(text.contains("500500"), "{text}");
    assert_eq!(pool.reserved(), 0);
}
