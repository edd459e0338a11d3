//! The command-line program, run as a user would.

use std::process::Command;

fn ratesheet() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_ratesheet"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"));
    c
}

fn run(args: &[&str]) -> (i32, String, String) {
    let out = ratesheet().args(args).output().unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn files_open_as_tables_named_after_their_stem() {
    let (code, out, err) = run(&[
        "demo-parquet/pipe_breaks.parquet",
        "demo-parquet/callouts.csv",
        "--run",
        "SELECT COUNT(*) AS n FROM pipe_breaks; SELECT SUM(callouts) AS total FROM callouts;",
        "--format",
        "csv",
    ]);
    assert_eq!(code, 0, "{err}");
    let csv = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/callouts.csv")).unwrap();
    let total: i64 = csv
        .lines()
        .skip(1)
        .map(|l| l.rsplit(',').next().unwrap().parse::<i64>().unwrap())
        .sum();
    assert_eq!(
        out,
        format!("n\n{}\ntotal\n{total}\n", ratesheet::demo::pipe_breaks().num_rows())
    );
}

#[test]
fn a_failing_statement_stops_the_run_with_a_nonzero_exit() {
    let (code, out, err) = run(&[
        "--run",
        "SELECT 1 AS one; SELECT nope FROM nowhere; SELECT 2;",
        "--format",
        "csv",
    ]);
    assert_eq!(code, 1);
    assert_eq!(out, "one\n1\n");
    assert!(err.contains("error in statement 2") && err.contains("nowhere"), "{err}");
}

#[test]
fn a_missing_file_is_named_in_the_error() {
    let (code, _, err) = run(&["no/such/file.parquet", "--run", "SELECT 1"]);
    assert_eq!(code, 1);
    assert!(err.contains("no/such/file.parquet: no such file"), "{err}");
}

#[test]
fn scripts_and_output_formats() {
    let dir = std::env::temp_dir().join(format!("ratesheet-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let script = dir.join("fits.sql");
    std::fs::write(
        &script,
        "-- per-district fits\nSELECT district, poisson_fit(breaks, km_years, material)['status'] AS status\n\
         FROM pipe_breaks WHERE district IN ('Riverside', 'Kiln Row') GROUP BY district ORDER BY district;\n",
    )
    .unwrap();
    let path = script.to_str().unwrap();
    let (code, out, err) = run(&["demo-parquet/pipe_breaks.parquet", "--script", path, "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(
        out,
        "{\"district\":\"Kiln Row\",\"status\":\"boundary estimate (1 term with an infinite estimate)\"}\n\
         {\"district\":\"Riverside\",\"status\":\"ok\"}\n"
    );
    let (_, out, _) = run(&[
        "demo-parquet/pipe_breaks.parquet",
        "--script",
        path,
        "--format",
        "markdown",
    ]);
    assert!(out.starts_with("| district  | status"), "{out}");
    let (_, out, _) = run(&["demo-parquet/pipe_breaks.parquet", "--script", path]);
    assert!(out.contains("━━━━━") && out.contains("Riverside"), "{out}");
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn the_demo_runs_and_shows_the_cautions() {
    let (code, out, err) = run(&["demo"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("Models are aids to judgement"));
    assert!(out.contains("Quarry Hill") && out.contains("boundary estimate"));
    assert!(out.contains("To explore the same data yourself"));
}

#[test]
fn hostile_files_are_refused_naming_the_file_and_odd_delimiters_are_read() {
    let dir = std::env::temp_dir().join(format!("ratesheet-hostile-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = |name: &str| dir.join(name).to_string_lossy().into_owned();
    std::fs::write(path("empty.parquet"), b"").unwrap();
    std::fs::write(path("header.csv"), "a,b\n").unwrap();
    std::fs::write(path("semi.csv"), "a;b\n1;2\n3;4\n").unwrap();
    let parquet = std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/pipe_breaks.parquet")).unwrap();
    std::fs::write(path("cut.parquet"), &parquet[..parquet.len() / 2]).unwrap();
    for (file, expected) in [
        ("empty.parquet", "the file is empty (0 bytes)"),
        ("header.csv", "the file has a header line but no data rows"),
        ("cut.parquet", "cut.parquet"),
    ] {
        let (code, _, err) = run(&[&path(file), "--run", "SELECT 1"]);
        assert_eq!(code, 1, "{file}: {err}");
        assert!(err.contains(expected) && err.contains(file), "{file}: {err}");
    }
    let (code, out, err) = run(&[
        &path("semi.csv"),
        "--run",
        "SELECT SUM(b) AS s FROM semi",
        "--format",
        "csv",
    ]);
    assert_eq!((code, out.as_str()), (0, "s\n6\n"), "{err}");
    assert!(err.contains("separated by semicolons"), "{err}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn save_to_writes_a_workbook_that_opens_again_as_a_table() {
    let dir = std::env::temp_dir().join(format!("ratesheet-saveto-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let book = dir.join("counts.xlsx").to_string_lossy().into_owned();
    let sql = "SELECT material, SUM(breaks) AS breaks, SUM(km_years) AS km_years FROM pipe_breaks GROUP BY material ORDER BY material";
    let (code, _, err) = run(&["demo-parquet/pipe_breaks.parquet", "--run", sql, "--save-to", &book]);
    assert_eq!(code, 0, "{err}");
    let (code, _, err) = run(&["demo-parquet/pipe_breaks.parquet", "--run", sql, "--save-to", &book]);
    assert_eq!(code, 1);
    assert!(err.contains("exists; add --replace"), "{err}");
    let (_, direct, _) = run(&["demo-parquet/pipe_breaks.parquet", "--run", sql, "--format", "csv"]);
    let (code, reopened, err) = run(&[
        &book,
        "--run",
        "SELECT * FROM counts ORDER BY material",
        "--format",
        "csv",
    ]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(reopened, direct);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Wide results fold into parts that fit the width, each starting with the first column; long
/// text is shortened, numbers never.
#[test]
fn wide_tables_fold_to_the_terminal_width() {
    use datafusion::arrow::array::{ArrayRef, Float64Array, RecordBatch, StringArray};
    use ratesheet::cli::output::{Format, Style, render};
    let mut columns: Vec<(String, ArrayRef)> = vec![(
        "district".into(),
        std::sync::Arc::new(StringArray::from(vec!["Riverside", "Kiln Row"])),
    )];
    for k in 0..8 {
        columns.push((
            format!("rate_ratio_{k}"),
            std::sync::Arc::new(Float64Array::from(vec![1.0 + k as f64 / 3.0, 123456.789])),
        ));
    }
    let long = "a long note ".repeat(10);
    columns.push((
        "note".into(),
        std::sync::Arc::new(StringArray::from(vec![long.as_str(), "short"])),
    ));
    let batch = RecordBatch::try_from_iter(columns).unwrap();
    let style = |width| Style {
        format: Format::Table,
        digits: 6,
        max_rows: 100,
        width,
    };
    let folded = render(std::slice::from_ref(&batch), &style(Some(60))).unwrap();
    let parts = folded.matches("folded to the terminal width").count();
    assert!(parts >= 3, "{folded}");
    assert_eq!(folded.matches("district").count(), parts, "{folded}");
    assert!(folded.lines().all(|l| l.chars().count() <= 60), "{folded}");
    assert!(
        folded.contains("123457") && folded.contains("a long note a long note a lon…"),
        "{folded}"
    );
    for k in 0..8 {
        assert!(folded.contains(&format!("rate_ratio_{k}")), "{folded}");
    }
    // Without a width (output to a file or pipe) nothing is folded or shortened.
    let flat = render(&[batch], &style(None)).unwrap();
    assert!(!flat.contains("folded") && flat.contains(long.trim_end()), "{flat}");
}

/// Workbook input: sheets become tables with inferred types; merged, blank or repeated header
/// cells are refused naming the workbook, the sheet and the cell.
#[test]
fn workbooks_open_as_tables_and_bad_headers_are_refused() {
    use rust_xlsxwriter::{Format, Workbook};
    let dir = std::env::temp_dir().join(format!("ratesheet-books-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let book = |name: &str, fill: &dyn Fn(&mut rust_xlsxwriter::Worksheet)| {
        let mut wb = Workbook::new();
        fill(wb.add_worksheet().set_name("counts").unwrap());
        let path = dir.join(name);
        wb.save(&path).unwrap();
        path.to_string_lossy().into_owned()
    };
    let good = {
        let mut wb = Workbook::new();
        let s = wb.add_worksheet().set_name("counts").unwrap();
        for (c, h) in ["depot", "faults", "hours"].iter().enumerate() {
            s.write_string(0, c as u16, *h).unwrap();
        }
        for (r, (d, f, h)) in [("north", 3, 120.5), ("south", 5, 98.25)].iter().enumerate() {
            s.write_string(1 + r as u32, 0, *d).unwrap();
            s.write_number(1 + r as u32, 1, *f as f64).unwrap();
            s.write_number(1 + r as u32, 2, *h).unwrap();
        }
        wb.add_worksheet()
            .set_name("notes")
            .unwrap()
            .write_string(0, 0, "text")
            .unwrap();
        wb.worksheet_from_name("notes")
            .unwrap()
            .write_string(1, 0, "kept")
            .unwrap();
        let path = dir.join("good.xlsx");
        wb.save(&path).unwrap();
        path.to_string_lossy().into_owned()
    };
    let (code, out, err) = run(&[
        &good,
        "--run",
        "SELECT arrow_typeof(faults) AS t1, arrow_typeof(hours) AS t2, faults * 2 AS f FROM good_counts ORDER BY depot; SELECT * FROM good_notes",
        "--format",
        "csv",
    ]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(out, "t1,t2,f\nInt64,Float64,6\nInt64,Float64,10\ntext\nkept\n");

    let merged = book("merged.xlsx", &|s| {
        s.merge_range(0, 0, 0, 1, "rate", &Format::new()).unwrap();
        s.write_number(1, 0, 1.0).unwrap();
        s.write_number(1, 1, 2.0).unwrap();
    });
    let blank = book("blank.xlsx", &|s| {
        s.write_string(0, 0, "a").unwrap();
        s.write_number(1, 0, 1.0).unwrap();
        s.write_number(1, 1, 2.0).unwrap();
    });
    let twice = book("twice.xlsx", &|s| {
        s.write_string(0, 0, "a").unwrap();
        s.write_string(0, 1, "a").unwrap();
        s.write_number(1, 0, 1.0).unwrap();
    });
    for (path, says) in [
        (&merged, "sheet counts: header cells A1:B1 are merged"),
        (
            &blank,
            "sheet counts: the header cell B1 is blank but its column holds data",
        ),
        (&twice, "sheet counts: the column name a appears twice (again at B1)"),
    ] {
        let (code, _, err) = run(&[path, "--run", "SELECT 1"]);
        assert_eq!(code, 1, "{path}: {err}");
        assert!(err.contains(path.as_str()) && err.contains(says), "{path}: {err}");
    }
    std::fs::remove_dir_all(&dir).ok();
}

/// Dividing two whole-number expressions prints a hint once per session (SQL semantics stay:
/// the result is 10), not for a decimal division, and never with --no-hints.
#[test]
fn whole_number_division_gets_a_hint_once() {
    let sql = "SELECT 1000 * SUM(c) / SUM(p) AS rate FROM (VALUES (10, 1000), (13, 1251)) AS t(c, p); \
               SELECT 1000 * SUM(c) / SUM(p) AS again FROM (VALUES (10, 1000), (13, 1251)) AS t(c, p);";
    let (code, out, err) = run(&["--run", sql, "--format", "csv"]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(out, "rate\n10\nagain\n10\n");
    assert_eq!(err.matches("hint:").count(), 1, "{err}");
    assert!(
        err.contains("hint: (1000 * sum(t.c)) / sum(t.p) divides whole numbers"),
        "{err}"
    );
    let (_, _, err) = run(&["--run", sql, "--format", "csv", "--no-hints"]);
    assert!(!err.contains("hint:"), "{err}");
    let (_, out, err) = run(&[
        "--run",
        "SELECT 1000.0 * SUM(c) / SUM(p) AS rate FROM (VALUES (10, 1000), (13, 1251)) AS t(c, p);",
        "--format",
        "csv",
    ]);
    assert!(out.starts_with("rate\n10.2176"), "{out}");
    assert!(!err.contains("hint:"), "{err}");
}

/// Real-world CSV: decimal commas and missing-value markers in numeric columns are read as
/// numbers (with a note), `.tsv` opens as tab-separated, and a fit on a text column says what
/// to do instead of the engine's coercion message; errors read as one sentence of ours.
#[test]
fn decimal_commas_markers_and_tsv_files_read_as_numbers() {
    let dir = std::env::temp_dir().join(format!("ratesheet-realworld-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let csv = dir.join("cases.csv");
    std::fs::write(
        &csv,
        "area;cases;pop\nnorth;2520,5;1000\nsouth;NA;2000\neast;12;1500,25\nwest;.;10\n",
    )
    .unwrap();
    let (code, out, err) = run(&[
        csv.to_str().unwrap(),
        "--run",
        "SELECT SUM(cases) AS c, SUM(pop) AS p, COUNT(cases) AS n FROM cases",
        "--format",
        "csv",
    ]);
    assert_eq!(code, 0, "{err}");
    assert_eq!(out, "c,p,n\n2532.5,4510.25,2\n");
    assert!(
        err.contains("column cases has decimal commas and missing-value markers")
            && err.contains("column pop has decimal commas"),
        "{err}"
    );
    let tsv = dir.join("rates.tsv");
    std::fs::write(&tsv, "a\tb\n1\t2\n").unwrap();
    let (code, out, _) = run(&[
        tsv.to_str().unwrap(),
        "--run",
        "SELECT a + b AS s FROM rates",
        "--format",
        "csv",
    ]);
    assert_eq!((code, out.as_str()), (0, "s\n3\n"));
    let text = dir.join("text.csv");
    std::fs::write(&text, "area,cases,pop\nnorth,many,1000\n").unwrap();
    let (code, _, err) = run(&[
        text.to_str().unwrap(),
        "--run",
        "SELECT poisson_fit(cases, pop) FROM text",
    ]);
    assert_eq!(code, 1);
    assert!(
        err.starts_with("error in statement 1: poisson_fit: count column 'cases' is text; "),
        "{err}"
    );
    assert!(
        !err.contains("Candidate functions") && !err.contains("Error during planning"),
        "{err}"
    );
    let (_, _, err) = run(&[
        "--run",
        "SELECT poisson_fit(y, 1.0, 'colour=red') FROM (VALUES (1)) AS t(y)",
    ]);
    assert!(
        err.starts_with("error in statement 1: poisson_fit: unknown option 'colour'"),
        "{err}"
    );
    assert!(
        !err.contains("Optimizer rule") && !err.contains("(while reading"),
        "{err}"
    );
    std::fs::remove_dir_all(&dir).ok();
}

#[test]
fn digits_and_memory_limits_are_checked_and_units_accepted() {
    let (code, _, err) = run(&["--digits", "0", "--run", "SELECT 1"]);
    assert_eq!(code, 2, "{err}");
    let (code, _, err) = run(&["--digits", "40", "--run", "SELECT 1"]);
    assert_eq!(code, 2, "{err}");
    for limit in ["2GB", "1.5GiB", "512M", "512mib"] {
        let (code, out, err) = run(&[
            "--memory-limit",
            limit,
            "--run",
            "SELECT 41 + 1 AS a",
            "--format",
            "csv",
        ]);
        assert_eq!((code, out.as_str()), (0, "a\n42\n"), "{limit}: {err}");
    }
    let (code, _, err) = run(&["--memory-limit", "2 parsecs", "--run", "SELECT 1"]);
    assert!(
        code != 0 && err.contains("expected a size such as 512M, 4G, 2GB or 1.5GiB"),
        "{err}"
    );
}
