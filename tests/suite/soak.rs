//! One shell process through 1,000 mixed statements (good, failing, cancelled, commands): it
//! answers correctly to the end and its memory does not keep growing.

use std::process::Command;
use std::time::Duration;

use rexpect::session::spawn_command;

fn resident_kib(pid: i32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap()
}

/// The process whose environment sets `key` to `value` (the PTY session does not expose its pid).
fn pid_with_env(key: &str, value: &std::path::Path) -> i32 {
    let wanted = format!("{key}={}", value.display()).into_bytes();
    for _ in 0..100 {
        for entry in std::fs::read_dir("/proc").unwrap().flatten() {
            let Ok(pid) = entry.file_name().to_string_lossy().parse::<i32>() else {
                continue;
            };
            let Ok(env) = std::fs::read(format!("/proc/{pid}/environ")) else {
                continue;
            };
            if env.split(|&b| b == 0).any(|v| v == wanted.as_slice()) {
                return pid;
            }
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    panic!("no process with {key}={}", value.display());
}

#[test]
fn a_thousand_mixed_statements_in_one_shell() {
    let home = std::env::temp_dir().join(format!("ratesheet-soak-{}", std::process::id()));
    std::fs::create_dir_all(&home).unwrap();
    let mut c = Command::new(env!("CARGO_BIN_EXE_ratesheet"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"))
        .arg("demo-parquet/pipe_breaks.parquet")
        .env("XDG_DATA_HOME", &home)
        .env("TERM", "xterm");
    let mut p = spawn_command(c, Some(60_000)).unwrap();
    let pid = pid_with_env("XDG_DATA_HOME", &home);
    p.exp_regex(crate::support::PROMPT).unwrap();
    for command in ["~prefer layout csv", "~prefer clock off"] {
        p.send_line(command).unwrap();
        p.exp_regex(crate::support::PROMPT).unwrap();
    }
    // The number of districts whose fit is "ok", as the first run of the fit statement gives it.
    let fit_sql = "SELECT 'fits-' || CAST(COUNT(*) AS VARCHAR) AS r FROM (SELECT district, \
                   poisson_fit(breaks, km_years, material, install_decade) AS fit FROM pipe_breaks \
                   GROUP BY district) WHERE fit.status = 'ok';";
    p.send_line(fit_sql).unwrap();
    let (_, first_fit) = p.exp_regex("fits-[0-9]+").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();

    let (mut good, mut failed, mut cancelled, mut fits, mut commands) = (0, 0, 0, 1, 0);
    let mut rss_after_warm_up = 0;
    for i in 1..1000u64 {
        match i % 20 {
            // A statement that runs until cancelled with Ctrl-C.
            0 => {
                p.send_line(
                    "SELECT COUNT(*) FROM generate_series(1, 4000000000) AS a(x), generate_series(1, 10) AS b(y);",
                )
                .unwrap();
                // Ctrl-C once the statement runs (its progress line shows).
                p.exp_regex(crate::support::PROGRESS_LINE).unwrap();
                p.send_control('c').unwrap();
                p.exp_string("cancelled").unwrap();
                cancelled += 1;
            }
            1 | 11 => {
                p.send_line(fit_sql).unwrap();
                let (_, got) = p.exp_regex("fits-[0-9]+").unwrap();
                assert_eq!(got, first_fit, "statement {i}");
                fits += 1;
            }
            2 | 7 | 13 => {
                p.send_line(&format!("SELECT nope_{i} FROM pipe_breaks;")).unwrap();
                p.exp_string("error:").unwrap();
                failed += 1;
            }
            5 => {
                p.send_line("~sources").unwrap();
                p.exp_string("pipe_breaks").unwrap();
                commands += 1;
            }
            _ => {
                // The answer text does not occur in the typed statement (echoed by the terminal).
                p.send_line(&format!("SELECT 'ok-' || CAST({i} * 7 AS VARCHAR) AS r;"))
                    .unwrap();
                p.exp_string(&format!("ok-{}", i * 7)).unwrap();
                good += 1;
            }
        }
        p.exp_regex(crate::support::PROMPT).unwrap();
        if i == 100 {
            rss_after_warm_up = resident_kib(pid);
        }
    }
    let rss_end = resident_kib(pid);
    p.send_line("SELECT SUM(breaks) * 0 + 12345 AS still_here FROM pipe_breaks;")
        .unwrap();
    p.exp_string("12345").unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
    eprintln!(
        "soak: {good} good, {fits} fits, {failed} failing, {cancelled} cancelled, {commands} commands; \
         resident memory {rss_after_warm_up} KiB after 100, {rss_end} KiB after 1,000"
    );
    assert_eq!(good + fits + failed + cancelled + commands, 1000);
    // Growth allowance: allocator caches and history; a per-statement leak of the size of one
    // result or plan would exceed it.
    assert!(
        rss_end < rss_after_warm_up + 48 * 1024,
        "resident memory grew from {rss_after_warm_up} KiB to {rss_end} KiB"
    );
}
