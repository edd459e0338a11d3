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
            "-e",
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
    p.exp_string("rates> ").unwrap();
    for (path, sql, says) in &kinds {
        p.send_line(&format!("~open {path}")).unwrap();
        // Files refused when opened end here; the others fail when read.
        let mut answer = p.exp_string("rates> ").unwrap();
        if !answer.contains("error:") {
            p.send_line(sql).unwrap();
            answer = p.exp_string("rates> ").unwrap();
        }
        assert!(
            answer.contains(path.as_str()) && answer.contains(says) && !answer.contains("panicked"),
            "{path}: expected an error naming the file and saying '{says}', got:\n{answer}"
        );
    }
    p.send_line(&format!("~open {}", semi.display())).unwrap();
    p.exp_string("separated by semicolons").unwrap();
    p.exp_string("rates> ").unwrap();
    p.send_line("SELECT SUM(b) * 100 + 1 AS check_value FROM semi;")
        .unwrap();
    p.exp_string("601").unwrap();
    // The table opened at start is still there, and answers.
    p.send_line("SELECT COUNT(*) * 2 AS cells_twice FROM pipe_breaks;")
        .unwrap();
    p.exp_string("3600").unwrap();
    p.send_line("~quit").unwrap();
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

/// What happened to one damaged file.
#[derive(Debug, PartialEq)]
enum Outcome {
    RefusedWhenOpened,
    RefusedWhenRead,
    Read,
}

async fn try_damaged(path: &str) -> Result<Outcome, String> {
    let ctx = ratesheet::cli::session::new_session(&Default::default()).unwrap();
    if let Err(e) = ratesheet::cli::session::open_table(&ctx, path, Some("damaged")).await {
        let text = e.to_string();
        return if text.contains(path) {
            Ok(Outcome::RefusedWhenOpened)
        } else {
            Err(format!("error does not name the file: {text}"))
        };
    }
    let sql = "SELECT COUNT(*), SUM(breaks), poisson_fit(breaks, km_years, material)['status'] FROM damaged";
    let run = tokio::spawn(async move {
        ratesheet::cli::progress::collect_with_progress(&ctx, sql, false, &ratesheet::cli::hints::Hints::new(false))
            .await
            .map_err(|e| e.to_string())
    });
    match run.await {
        Ok(Ok(_)) => Ok(Outcome::Read),
        Ok(Err(text)) if text.contains(path) => Ok(Outcome::RefusedWhenRead),
        Ok(Err(text)) => Err(format!("error does not name the file: {text}")),
        Err(e) => Err(format!("the query panicked: {e}")),
    }
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
    let mut tally = [0usize; 3];
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
    eprintln!(
        "damaged Parquet corpus: {} refused when opened, {} refused when read, {} read",
        tally[0], tally[1], tally[2]
    );
    std::fs::remove_dir_all(&dir).ok();
    assert!(
        problems.is_empty(),
        "{} problems:\n{}",
        problems.len(),
        problems.join("\n")
    );
    assert!(tally[0] > 0 && tally[1] + tally[2] > 0, "{tally:?}");
}
