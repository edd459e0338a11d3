//! Hostile files: each named kind of broken file is refused with the file named while the shell
//! goes on, and a corpus of damaged Parquet files never makes the engine panic.

use std::path::{Path, PathBuf};

use rexpect::session::spawn_command;

use crate::support::Seeded;

const DEMO: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/pipe_breaks.parquet");

fn temp_dir(tag: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("ratesheet-{tag}-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Writes one file of each hostile kind into `dir`; returns (path, SQL that reads it, what the
/// error must say besides the file name).
fn hostile_kinds(dir: &Path) -> Vec<(String, String, &'static str)> {
    let demo = std::fs::read(DEMO).unwrap();
    let put = |name: &str, bytes: &[u8]| {
        let p = dir.join(name);
        if let Some(parent) = p.parent() {
            std::fs::create_dir_all(parent).unwrap();
        }
        std::fs::write(&p, bytes).unwrap();
        p.to_string_lossy().into_owned()
    };
    let mut footer = demo.clone();
    let n = footer.len();
    footer[n - 200..n - 8].fill(0xff);
    let mut rows: String = (0..5000).map(|i| format!("{i},{}\n", 2 * i)).collect();
    rows.push_str("5000,oops\n");
    // A folder of Parquet parts whose second part has other columns: written from a CSV so that
    // the test needs no Parquet writer of its own.
    let mixed = dir.join("mixed");
    std::fs::create_dir_all(&mixed).unwrap();
    std::fs::copy(DEMO, mixed.join("part1.parquet")).unwrap();
    let other = put("other.csv", b"other\n1\n");
    let part2 = mixed.join("part2.parquet");
    let status = std::process::Command::new(env!("CARGO_BIN_EXE_ratesheet"))
        .args([
            other.as_str(),
            "--run",
            &format!("COPY (SELECT * FROM other) TO '{}'", part2.display()),
        ])
        .output()
        .unwrap();
    assert!(status.status.success(), "{}", String::from_utf8_lossy(&status.stderr));
    let select = |t: &str| format!("SELECT * FROM {t};");
    vec![
        (put("cut.parquet", &demo[..n / 2]), select("cut"), "Parquet"),
        (put("footer.parquet", &footer), select("footer"), "Parquet error"),
        (
            put("empty.parquet", b""),
            select("empty"),
            "the file is empty (0 bytes)",
        ),
        (
            put("ragged.csv", b"a,b\n1,2\n3\n4,5,6\n"),
            select("ragged"),
            "unequal lengths",
        ),
        (
            put("header.csv", b"a,b\n"),
            select("header"),
            "the file has a header line but no data rows",
        ),
        (
            put("badutf8.csv", b"a,b\n1,x\n2,\xff\xfe\n3,z\n"),
            select("badutf8"),
            "invalid utf-8",
        ),
        (
            put("typechange.csv", format!("a,b\n{rows}").as_bytes()),
            "SELECT SUM(b) FROM typechange;".into(),
            "Error while parsing value 'oops'",
        ),
        (
            dir.join("missing.parquet").to_string_lossy().into_owned(),
            select("missing"),
            "no such file",
        ),
        (
            mixed.to_string_lossy().into_owned(),
            select("mixed"),
            "have different columns",
        ),
    ]
}

#[test]
fn every_hostile_kind_is_refused_naming_the_file_and_the_shell_goes_on() {
    let dir = temp_dir("hostile-kinds");
    let kinds = hostile_kinds(&dir);
    // A wrong delimiter is read with a note, not refused.
    let semi = dir.join("semi.csv");
    std::fs::write(&semi, "a;b\n1;2\n3;4\n").unwrap();

    let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_ratesheet"));
    c.arg(DEMO).env("XDG_DATA_HOME", &dir).env("TERM", "xterm");
    let mut p = spawn_command(c, Some(30_000)).unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    for (path, sql, says) in &kinds {
        p.send_line(&format!("~add {path}")).unwrap();
        // Files refused when opened end here; the others fail when read.
        let mut answer = p.exp_regex(crate::support::PROMPT).unwrap().0;
        if !answer.contains("error:") {
            p.send_line(sql).unwrap();
            answer = p.exp_regex(crate::support::PROMPT).unwrap().0;
        }
        assert!(
            answer.contains(path.as_str())
                && answer.contains(says)
                && !ratesheet::cli::guard::is_caught_panic(&answer)
                && !answer.contains("panicked"),
            "{path}: expected a refusal (not a caught panic) naming the file and saying '{says}', got:\n{answer}"
        );
    }
    p.send_line(&format!("~add {}", semi.display())).unwrap();
    p.exp_string("separated by semicolons").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SELECT SUM(b) * 100 + 1 AS check_value FROM semi;")
        .unwrap();
    p.exp_string("601").unwrap();
    // The table opened at start is still there, and answers.
    p.send_line("SELECT COUNT(*) * 2 AS cells_twice FROM pipe_breaks;")
        .unwrap();
    p.exp_string("3600").unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&dir).ok();
}

/// Damaged copies of the demo Parquet file: truncations, overwritten byte runs anywhere, and
/// overwritten bytes in the footer region (the metadata that every reader trusts).
pub fn damaged_copies(demo: &[u8], count: usize) -> Vec<(String, Vec<u8>)> {
    let mut rng = Seeded(20261202);
    let n = demo.len();
    (0..count)
        .map(|i| {
            let mut b = demo.to_vec();
            let how = match i % 4 {
                0 => {
                    let keep = 1 + rng.below(n - 1);
                    b.truncate(keep);
                    format!("truncated to {keep} bytes")
                }
                1 => {
                    let at = rng.below(n);
                    let len = (1 + rng.below(16)).min(n - at);
                    let byte = rng.next() as u8;
                    b[at..at + len].fill(byte);
                    format!("{len} bytes at {at} set to {byte:#04x}")
                }
                _ => {
                    let footer = u32::from_le_bytes(demo[n - 8..n - 4].try_into().unwrap()) as usize;
                    let at = n - 8 - footer + rng.below(footer + 8);
                    let old = b[at];
                    b[at] ^= 1 << rng.below(8);
                    format!("footer byte {at} {old:#04x} -> {:#04x}", b[at])
                }
            };
            (how, b)
        })
        .collect()
}

/// What happened to one damaged file. A panic that escapes the guard is a problem, not an
/// outcome.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Outcome {
    RefusedWhenOpened,
    RefusedWhenRead,
    Read,
    PanicCaughtWhenOpened,
    PanicCaughtWhenRead,
}

/// An error must name the file; a caught panic is told apart by the guard's mark.
fn classify(text: &str, path: &str, refused: Outcome, caught: Outcome) -> Result<Outcome, String> {
    if !text.contains(path) {
        return Err(format!("error does not name the file: {text}"));
    }
    Ok(if ratesheet::cli::guard::is_caught_panic(text) {
        caught
    } else {
        refused
    })
}

async fn try_damaged(path: &str) -> Result<Outcome, String> {
    // Two partitions whatever the machine, so that the breakdown is the same everywhere.
    let settings = ratesheet::cli::session::SessionSettings {
        threads: Some(2),
        ..Default::default()
    };
    let ctx = ratesheet::cli::session::new_session(&settings).unwrap();
    if let Err(e) = ratesheet::cli::session::open_table(&ctx, path, Some("damaged")).await {
        return classify(
            &e.to_string(),
            path,
            Outcome::RefusedWhenOpened,
            Outcome::PanicCaughtWhenOpened,
        );
    }
    let sql = "SELECT COUNT(*), SUM(breaks), poisson_fit(breaks, km_years, material)['status'] FROM damaged";
    let run = tokio::spawn(async move {
        ratesheet::cli::progress::collect_with_progress(&ctx, sql, false, &ratesheet::cli::hints::Hints::new(false))
            .await
            .map_err(|e| e.to_string())
    });
    match run.await {
        Ok(Ok(_)) => Ok(Outcome::Read),
        Ok(Err(text)) => classify(&text, path, Outcome::RefusedWhenRead, Outcome::PanicCaughtWhenRead),
        Err(e) => Err(format!("a panic escaped the guard: {e}")),
    }
}

/// A panic inside the guard becomes an error that names what was read and carries the mark.
#[tokio::test]
async fn a_panic_inside_the_guard_becomes_a_marked_error_naming_what_was_read() {
    let e = ratesheet::cli::guard::without_panics("x.parquet", async {
        if std::hint::black_box(true) {
            panic!("boom");
        }
        Ok::<(), datafusion::error::DataFusionError>(())
    })
    .await
    .unwrap_err()
    .to_string();
    assert!(
        ratesheet::cli::guard::is_caught_panic(&e) && e.contains("x.parquet") && e.contains("boom"),
        "{e}"
    );
}

/// Corpus size: 400 in the regular run; `RATESHEET_LONG=1` tries 20,000.
fn corpus_size() -> usize {
    if std::env::var_os("RATESHEET_LONG").is_some() {
        20_000
    } else {
        400
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn damaged_parquet_files_never_panic_and_errors_name_the_file() {
    let dir = temp_dir("damaged");
    let demo = std::fs::read(DEMO).unwrap();
    let mut tally = [0usize; 5];
    let mut problems = Vec::new();
    for (i, (how, bytes)) in damaged_copies(&demo, corpus_size()).into_iter().enumerate() {
        let path = dir.join(format!("damaged_{i}.parquet"));
        std::fs::write(&path, &bytes).unwrap();
        match try_damaged(path.to_str().unwrap()).await {
            Ok(o) => tally[o as usize] += 1,
            Err(e) => problems.push(format!("{how}: {e}")),
        }
        std::fs::remove_file(&path).unwrap();
    }
    let summary = format!(
        "{} refused when opened, {} when read, {} read; reader panics caught by the guard: {} when opened, {} when read",
        tally[0], tally[1], tally[2], tally[3], tally[4]
    );
    eprintln!("damaged Parquet corpus ({} files): {summary}", corpus_size());
    std::fs::remove_dir_all(&dir).ok();
    assert!(
        problems.is_empty(),
        "{} problems:\n{}",
        problems.len(),
        problems.join("\n")
    );
    assert_eq!(tally.iter().sum::<usize>(), corpus_size());
    if corpus_size() == 400 {
        // The README states the regular run's breakdown; it must be this run's.
        let readme = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md")).unwrap();
        assert!(
            readme.contains(&summary),
            "README.md does not state this run's breakdown: {summary}"
        );
    }
}
