//! The interactive shell driven through a pseudo-terminal, as a user types.

use std::process::Command;

use rexpect::session::{PtySession, spawn_command};

fn shell(data_home: &std::path::Path) -> PtySession {
    let mut c = Command::new(env!("CARGO_BIN_EXE_ratesheet"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"))
        .arg("demo-parquet/pipe_breaks.parquet")
        .env("XDG_DATA_HOME", data_home)
        .env("TERM", "xterm");
    let mut p = spawn_command(c, Some(60_000)).unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p
}

fn temp_home(tag: &str) -> std::path::PathBuf {
    let d = std::env::temp_dir().join(format!("ratesheet-shell-{tag}-{}", std::process::id()));
    std::fs::create_dir_all(&d).unwrap();
    d
}

#[test]
fn multi_line_queries_errors_help_and_history_across_sessions() {
    let home = temp_home("history");
    let mut p = shell(&home);
    p.send_line("SELECT COUNT(*) AS cells").unwrap();
    p.exp_string(crate::support::CONTINUATION).unwrap();
    p.send_line("FROM pipe_breaks;").unwrap();
    p.exp_string("1800").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SELECT nope FROM pipe_breaks;").unwrap();
    p.exp_string("error:").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~guide poisson_fit").unwrap();
    p.exp_string("poisson_fit(count, exposure, predictor").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SELECT SUM(breaks) AS total_breaks FROM pipe_breaks;")
        .unwrap();
    p.exp_string("total_breaks").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_control('d').unwrap();
    p.exp_eof().unwrap();
    let history = std::fs::read_to_string(home.join("ratesheet/history.txt")).unwrap();
    assert!(
        history.contains("SELECT SUM(breaks) AS total_breaks FROM pipe_breaks;"),
        "{history}"
    );

    // A second session recalls the last statement with the Up arrow.
    let mut p = shell(&home);
    p.send("\x1b[A").unwrap();
    p.send_line("").unwrap();
    p.exp_string("total_breaks").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_control('d').unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
}

#[test]
fn ctrl_c_cancels_a_running_query_and_the_shell_goes_on() {
    let home = temp_home("cancel");
    let mut p = shell(&home);
    p.send_line("SELECT COUNT(*) FROM generate_series(1, 4000000000) AS a(x), generate_series(1, 10) AS b(y);")
        .unwrap();
    // Ctrl-C once the statement runs (its progress line shows), not after a fixed delay.
    p.exp_regex(crate::support::PROGRESS_LINE).unwrap();
    p.send_control('c').unwrap();
    p.exp_string("cancelled").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SELECT 41 + 1 AS answer;").unwrap();
    p.exp_string("42").unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
}

#[test]
fn tab_completes_table_names() {
    let home = temp_home("complete");
    let mut p = shell(&home);
    p.send("SELECT COUNT(*) AS n FROM pipe_b").unwrap();
    p.send("\t").unwrap();
    p.send_line(";").unwrap();
    p.exp_string("1800").unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
}

#[test]
fn save_writes_the_last_result_and_never_overwrites_unasked() {
    let home = temp_home("save");
    let target = home.join("counts.csv");
    let target_text = target.to_str().unwrap().to_string();
    let mut p = shell(&home);
    p.send_line("SELECT district, COUNT(*) AS cells FROM pipe_breaks GROUP BY district ORDER BY district;")
        .unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line(&format!("~export {target_text}")).unwrap();
    p.exp_string("wrote 10 rows").unwrap();
    p.send_line(&format!("~export {target_text}")).unwrap();
    p.exp_string("exists; add 'replace' to overwrite it").unwrap();
    p.send_line(&format!("~export {target_text} replace")).unwrap();
    p.exp_string("wrote 10 rows").unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    let text = std::fs::read_to_string(&target).unwrap();
    assert!(text.starts_with("district,cells\nEast Meadows,180\n"), "{text}");
    let leftovers: Vec<_> = std::fs::read_dir(&home)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty(), "temporary files left behind");
    std::fs::remove_dir_all(&home).ok();
}

/// XLSX output flattens fits to one row per (group, term); the workbook holds the term names
/// and the fit's scalar fields as `fit_<field>`; CSV holds the same rows.
#[tokio::test]
async fn xlsx_results_have_one_row_per_group_and_term() {
    let ctx = datafusion::prelude::SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/pipe_breaks.parquet");
    ctx.register_parquet("pipe_breaks", path, Default::default())
        .await
        .unwrap();
    let batches = ctx
        .sql("SELECT district, poisson_fit(breaks, km_years, material) AS fit FROM pipe_breaks GROUP BY district")
        .await
        .unwrap()
        .collect()
        .await
        .unwrap();
    let home = temp_home("xlsx");
    let target = home.join("fits.xlsx");
    // The rows written are reported: 10 districts x 5 terms.
    let rows = ratesheet::cli::output::save_batches(&batches, target.to_str().unwrap(), false, "").unwrap();
    assert_eq!(rows, 50);
    let mut archive = zip::ZipArchive::new(std::fs::File::open(&target).unwrap()).unwrap();
    let mut sheet = String::new();
    std::io::Read::read_to_string(&mut archive.by_name("xl/worksheets/sheet1.xml").unwrap(), &mut sheet).unwrap();
    // A header row plus 10 districts x 5 terms.
    assert_eq!(
        sheet.matches("<row ").count(),
        1 + 10 * 5,
        "{}",
        &sheet[..sheet.len().min(400)]
    );
    let mut strings = String::new();
    std::io::Read::read_to_string(&mut archive.by_name("xl/sharedStrings.xml").unwrap(), &mut strings).unwrap();
    assert!(
        strings.contains("material=steel") && strings.contains("rate_ratio") && strings.contains("fit_dispersion"),
        "{strings}"
    );
    std::fs::remove_dir_all(&home).ok();
}

/// CSV is flat: a fit becomes one row per (group, term) with a `term` column and the fit's
/// scalar fields as `fit_<field>`; another struct becomes one column per field. JSON keeps the
/// nesting: every line is a JSON object whose fit holds its terms as an array.
#[tokio::test]
async fn csv_is_flat_and_json_is_nested() {
    use ratesheet::cli::output::{Format, Style, render};
    let ctx = datafusion::prelude::SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    let path = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-parquet/pipe_breaks.parquet");
    ctx.register_parquet("pipe_breaks", path, Default::default())
        .await
        .unwrap();
    let batches = ctx
        .sql(
            "SELECT district, poisson_fit(breaks, km_years, material) AS fit, rate_interval(SUM(breaks), SUM(km_years)) AS r \
             FROM pipe_breaks GROUP BY district ORDER BY district",
        )
        .await
        .unwrap()
        .collect()
        .await
        .unwrap();
    let style = |format| Style {
        format,
        digits: 17,
        max_rows: usize::MAX,
        width: None,
    };
    let csv = render(&batches, &style(Format::Csv)).unwrap();
    let mut lines = csv.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    for name in [
        "district",
        "fit_status",
        "fit_dispersion",
        "term",
        "estimate",
        "rate_ratio",
        "r_rate",
        "r_low",
        "r_high",
    ] {
        assert!(header.contains(&name), "{name} missing from {header:?}");
    }
    assert!(!header.contains(&"fit"), "the fit is not one cell");
    let rows: Vec<&str> = lines.collect();
    assert_eq!(rows.len(), 10 * 5);
    assert!(rows[0].starts_with("East Meadows,ok,poisson,"), "{}", rows[0]);
    assert!(rows.iter().all(|r| !r.contains('{')), "no struct text left");
    let json = render(&batches, &style(Format::Json)).unwrap();
    let objects: Vec<serde_json::Value> = json.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(objects.len(), 10);
    assert_eq!(objects[0]["fit"]["terms"].as_array().unwrap().len(), 5);
    assert_eq!(objects[0]["fit"]["terms"][1]["term"], "material=cast_iron");
    assert!(objects[0]["r"]["low"].as_f64().unwrap() > 0.0);
    // NULLs are written as null, not left out.
    assert!(objects[0]["fit"].as_object().unwrap().contains_key("f_stat"));
}

/// In the text table a struct result is spread into one column per field, formatted like any
/// number (the digits setting applies), headers lose the engine's qualifiers where that is
/// unambiguous, and the numbers of a column line up on their decimal points.
#[tokio::test]
async fn structs_spread_and_numbers_line_up_in_text_tables() {
    use ratesheet::cli::output::{Format, Style, render};
    let ctx = datafusion::prelude::SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    let style = Style {
        format: Format::Table,
        digits: 4,
        max_rows: 100,
        width: None,
    };
    let sql = "SELECT rate_interval(3, 100.0) AS r, rate_ratio_test(32, 52407, 2, 18790) AS t";
    let text = render(&ctx.sql(sql).await.unwrap().collect().await.unwrap(), &style).unwrap();
    let header: Vec<&str> = text.lines().next().unwrap().split_whitespace().collect();
    assert_eq!(
        header,
        [
            "rate", "r.low", "r.high", "ratio", "t.low", "t.high", "p_value", "method"
        ],
        "{text}"
    );
    assert!(
        !text.contains('{') && text.contains("0.006187") && text.contains("5.737"),
        "{text}"
    );
    let sql = "SELECT v FROM (VALUES (1.335), (1.3182), (1099.0), (0.000012), (-2.5)) AS t(v)";
    let text = render(&ctx.sql(sql).await.unwrap().collect().await.unwrap(), &style).unwrap();
    let points: Vec<Option<usize>> = text.lines().skip(2).map(|l| l.find('.')).collect();
    assert!(points.iter().flatten().all(|p| Some(*p) == points[0]), "{text}");
    let sql = "WITH f AS (SELECT poisson_fit(y, x) AS fit FROM (VALUES (1, 1.0), (3, 2.0), (4, 3.0)) AS t(y, x)) \
               SELECT fit['dispersion'], fit['lr_p'] FROM f";
    let text = render(&ctx.sql(sql).await.unwrap().collect().await.unwrap(), &style).unwrap();
    let header: Vec<&str> = text.lines().next().unwrap().split_whitespace().collect();
    assert_eq!(header, ["dispersion", "lr_p"], "{text}");
}

/// A statement running longer than a second shows a progress line on the terminal's stderr
/// (rows read of the total from the Parquet footer); it is erased when the statement ends.
#[test]
fn long_statements_show_a_progress_line_that_is_erased() {
    let home = temp_home("progress");
    let mut p = shell(&home);
    p.send_line(
        "SELECT COUNT(*) FROM pipe_breaks a, pipe_breaks b, pipe_breaks c WHERE a.breaks + b.breaks + c.breaks < 0;",
    )
    .unwrap();
    // The scans of a join report no total up front, so the line counts rows read.
    p.exp_regex(crate::support::PROGRESS_LINE).unwrap();
    p.send_control('c').unwrap();
    let (shown, _) = p.exp_string("cancelled").map(|s| (s, ())).unwrap();
    assert!(
        shown.contains("\r\x1b[2K"),
        "the progress line was not erased: {shown:?}"
    );
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
}

/// The command set of our own: quoted paths with spaces, preferences said back, a suggestion
/// for a habit from elsewhere, `done` after a statement without a table, and `~fits`.
#[test]
fn commands_take_quoted_paths_say_what_they_did_and_suggest_for_unknown_names() {
    let home = temp_home("commands");
    let spaced = home.join("LC 1977.csv");
    std::fs::write(&spaced, "area,cases\nnorth,3\nsouth,4\n").unwrap();
    let mut p = shell(&home);
    p.send_line(&format!("~add '{}' lc", spaced.display())).unwrap();
    p.exp_string("as lc").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SELECT SUM(cases) * 1000 AS k FROM lc;").unwrap();
    p.exp_string("7000").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~save x.csv").unwrap();
    p.exp_string("unknown command ~save; did you mean ~export?").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~prefer precision 3").unwrap();
    p.exp_string("precision 3").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("SET ratesheet.level = 0.9;").unwrap();
    p.exp_string("done").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line(
        "SELECT district, poisson_fit(breaks, km_years, material) AS fit FROM pipe_breaks WHERE district = 'Kiln Row' GROUP BY district;",
    )
    .unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~fits").unwrap();
    p.exp_string("district=Kiln Row: boundary estimate").unwrap();
    p.exp_string("flagged: material=steel (boundary)").unwrap();
    p.exp_regex(crate::support::PROMPT).unwrap();
    p.send_line("~leave").unwrap();
    p.exp_eof().unwrap();
    std::fs::remove_dir_all(&home).ok();
}
