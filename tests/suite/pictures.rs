//! Pictures: the SVG of a known forest plot parsed and measured (marks, intervals, the
//! reference line at 1, the log axis, a boundary row without a mark); a PNG written by
//! `--draw-to` decoded and looked at; funnel limits against scipy (extra_checks.json
//! `funnel_limits`: scipy.stats.poisson.ppf/cdf with the interpolation written out in
//! scripts/make_fixtures.py); terminal pictures at 80 and 200 columns against golden files
//! (tests/fixtures/pictures/, reviewed by eye when written).

use std::process::Command;

use datafusion::arrow::array::RecordBatch;
use datafusion::prelude::SessionContext;
use ratesheet::cli::picture::{ASCII, Picture, Request, UNICODE};
use ratesheet::glm::standardize::{funnel_limit, poisson_at_most};

use crate::support::{close, f, fixture_path, load_json};

async fn result(sql: &str) -> Vec<RecordBatch> {
    let ctx = SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    ctx.sql(sql).await.unwrap().collect().await.unwrap()
}

/// Four terms: two ordinary, one at exactly 1, one boundary term with no estimate.
const TERMS: &str = "SELECT * FROM (VALUES
    ('material=pvc', 0.5, 0.25, 1.0, NULL),
    ('material=steel', 2.0, 1.5, 2.667, NULL),
    ('decade', 1.0, 0.9, 1.111, NULL),
    ('soil=high', CAST(NULL AS DOUBLE), CAST(NULL AS DOUBLE), 3.0, 'boundary (lower limit infinite)')
  ) AS t(term, rate_ratio, rr_low, rr_high, flag)";

fn attr(n: &roxmltree::Node, name: &str) -> f64 {
    n.attribute(name).unwrap().parse().unwrap()
}

#[tokio::test]
async fn the_forest_svg_has_its_marks_where_the_log_axis_puts_them() {
    let batches = result(TERMS).await;
    let picture = Picture::of(&batches, &Request::parse(&["forest".to_string()]).unwrap()).unwrap();
    let svg = picture.svg().unwrap();
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let circles: Vec<(f64, f64)> = doc
        .descendants()
        .filter(|n| n.has_tag_name("circle"))
        .map(|n| (attr(&n, "cx"), attr(&n, "cy")))
        .collect();
    // Three marks: the boundary row has none.
    assert_eq!(circles.len(), 3, "{svg}");
    // The reference line: the one vertical grey polyline.
    let vertical: Vec<Vec<(f64, f64)>> = doc
        .descendants()
        .filter(|n| n.has_tag_name("polyline") && n.attribute("stroke") == Some("#8A8A8A"))
        .map(|n| {
            n.attribute("points")
                .unwrap()
                .split_whitespace()
                .map(|p| {
                    let (x, y) = p.split_once(',').unwrap();
                    (x.parse().unwrap(), y.parse().unwrap())
                })
                .collect()
        })
        .collect();
    assert_eq!(vertical.len(), 1);
    let x1 = vertical[0][0].0;
    assert_eq!(vertical[0][1].0, x1);
    // Rows in the query's order, top to bottom; the estimate 1 sits on the reference line.
    assert!(circles[0].1 < circles[1].1 && circles[1].1 < circles[2].1);
    assert_eq!(circles[2].0, x1);
    // The log axis: pixels from the line are proportional to log(estimate), so 0.5 and 2 sit
    // at the same distance on either side (to the pixel rounding).
    let (left, right) = (x1 - circles[0].0, circles[1].0 - x1);
    assert!(left > 50.0 && (left - right).abs() <= 1.0, "{left} {right}");
    // Interval lines: three rows with both limits, one with only an upper limit (an arrow).
    let intervals = doc
        .descendants()
        .filter(|n| n.has_tag_name("polyline") && n.attribute("stroke-width") == Some("2"))
        .count();
    assert_eq!(intervals, 4);
    assert_eq!(doc.descendants().filter(|n| n.has_tag_name("polygon")).count(), 1);
    // Text: the title with the level, each label, the boundary row's note.
    let texts: Vec<String> = doc
        .descendants()
        .filter(|n| n.has_tag_name("text"))
        .map(|n| n.text().unwrap_or("").trim().to_string())
        .collect();
    assert!(
        texts
            .iter()
            .any(|t| t.starts_with("Rate ratios with intervals (level not in the result"))
    );
    assert!(texts.iter().any(|t| t == "boundary (lower limit infinite)"));
    assert!(texts.iter().any(|t| t == "0.5 (0.25 to 1)"));
}

/// At 60 rows with long labels nothing is cut: every text lies inside the picture (its width
/// taken as 0.6 em per character of the monospaced font, which the shipped font's advance is).
#[tokio::test]
async fn sixty_long_rows_fit_in_the_picture_without_cut_text() {
    let sql = "SELECT 'district number ' || CAST(v AS VARCHAR) || ' of the eastern supply zone' AS area,
               'material=ductile_iron' AS term, 1.0 + v / 100.0 AS rate_ratio, 0.5 AS rr_low, 3.0 + v AS rr_high
               FROM unnest(range(60)) AS t(v)";
    let picture = Picture::of(&result(sql).await, &Request::default()).unwrap();
    let svg = picture.svg().unwrap();
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let root = doc.root_element();
    let (width, height) = (attr(&root, "width"), attr(&root, "height"));
    let mut texts = 0;
    for n in doc.descendants().filter(|n| n.has_tag_name("text")) {
        let chars = n.text().unwrap_or("").trim().chars().count() as f64;
        let size = attr(&n, "font-size");
        let (x, y) = (attr(&n, "x"), attr(&n, "y"));
        let extent = chars * 0.6 * size;
        let (left, right) = match n.attribute("text-anchor") {
            Some("middle") => (x - extent / 2.0, x + extent / 2.0),
            Some("end") => (x - extent, x),
            _ => (x, x + extent),
        };
        assert!(
            left >= 0.0 && right <= width && y >= 0.0 && y + size <= height,
            "cut: {:?}",
            n.text()
        );
        texts += 1;
    }
    // Title, 60 labels, 60 values, axis labels and caption.
    assert!(texts >= 122, "{texts}");
    let funnel = Picture::of(
        &result("SELECT * FROM (VALUES ('North', 30, 18.5), ('South', 12, 15.0)) AS t(area, observed, expected)").await,
        &Request::default(),
    )
    .unwrap()
    .svg()
    .unwrap();
    let doc = roxmltree::Document::parse(&funnel).unwrap();
    assert_eq!(doc.descendants().filter(|n| n.has_tag_name("circle")).count(), 2);
}

#[test]
fn draw_to_writes_a_png_that_decodes_and_is_not_blank() {
    let dir = std::env::temp_dir().join(format!("ratesheet-png-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("fits.png");
    let out = Command::new(env!("CARGO_BIN_EXE_ratesheet"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args([
            "demo-parquet/pipe_breaks.parquet",
            "--run",
            "SELECT district, poisson_fit(breaks, km_years, material) AS fit FROM pipe_breaks GROUP BY district ORDER BY district",
            "--format",
            "csv",
            "--draw-to",
            path.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{err}");
    assert!(err.contains("wrote a forest plot of 40 rows"), "{err}");
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&path).unwrap()));
    let mut reader = decoder.read_info().unwrap();
    let mut pixels = vec![0; reader.output_buffer_size().unwrap()];
    let info = reader.next_frame(&mut pixels).unwrap();
    // The size the layout states: 40 rows of 24 pixels between a 64-pixel top and 56 below.
    assert_eq!(info.height, 64 + 40 * 24 + 56);
    assert!(info.width >= 600);
    let channels = info.color_type.samples();
    let dark = pixels[..info.buffer_size()]
        .chunks(channels)
        .filter(|p| p[..3].iter().map(|&c| c as u32).sum::<u32>() < 300)
        .count();
    let share = dark as f64 / (info.width * info.height) as f64;
    assert!(share > 0.01 && share < 0.5, "dark share {share}");
    // Refused without --replace.
    let again = Command::new(env!("CARGO_BIN_EXE_ratesheet"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args([
            "--run",
            "SELECT 1 AS ratio, 0.5 AS low, 2 AS high",
            "--draw-to",
            path.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("exists"));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn funnel_limits_match_scipy_poisson_quantiles() {
    let cases = load_json("extra_checks.json")["funnel_limits"]["cases"].clone();
    let mut n = 0;
    for c in cases.as_array().unwrap() {
        let (e, p) = (f(&c["expected"]), f(&c["p"]));
        close(
            &format!("funnel limit E={e} p={p}"),
            funnel_limit(e, p),
            f(&c["limit"]),
            1e-10,
            1e-12,
        );
        // The quantile behind the limit comes from the same Poisson tail as the p-value.
        let r = f(&c["quantile"]);
        assert!(poisson_at_most(r, e) >= p && poisson_at_most(r - 1.0, e) < p);
        n += 1;
    }
    assert!(n >= 16);
}

async fn golden_pictures() -> Vec<(String, String)> {
    let forest = Picture::of(
        &result(TERMS).await,
        &Request::parse(&["level=0.95".to_string()]).unwrap(),
    )
    .unwrap();
    let areas = result(
        "SELECT * FROM (VALUES ('North', 30, 18.5), ('South', 12, 15.0), ('East', 102, 96.2), ('West', 41, 60.1),
           ('Centre', 7, 3.1)) AS t(area, observed, expected)",
    )
    .await;
    let funnel = Picture::of(&areas, &Request::default()).unwrap();
    let mut out = Vec::new();
    for width in [80, 200] {
        out.push((format!("forest_{width}.txt"), forest.text(width, &UNICODE)));
        out.push((format!("funnel_{width}.txt"), funnel.text(width, &UNICODE)));
    }
    out.push(("forest_80_ascii.txt".to_string(), forest.text(80, &ASCII)));
    out
}

/// Rewrite the golden files with `RATESHEET_WRITE_GOLDEN=1 cargo test -q --test suite -- golden`
/// and look at them before committing.
#[tokio::test]
async fn terminal_pictures_match_their_golden_files() {
    for (name, text) in golden_pictures().await {
        let path = fixture_path(&format!("pictures/{name}"));
        if std::env::var_os("RATESHEET_WRITE_GOLDEN").is_some() {
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(&path, &text).unwrap();
        }
        let want = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
        assert_eq!(text, want, "{name} differs from its golden file");
        if name.ends_with("ascii.txt") {
            assert!(text.is_ascii());
        }
        if name.ends_with("_80.txt") {
            assert!(
                text.lines().all(|l| l.chars().count() <= 80),
                "{name} is wider than 80 columns"
            );
        }
    }
}

#[tokio::test]
async fn pictures_refuse_results_they_cannot_draw() {
    let no_estimate = result("SELECT 'a' AS area, 3 AS n").await;
    let e = Picture::of(&no_estimate, &Request::default()).unwrap_err();
    assert!(e.contains("no estimate to draw"), "{e}");
    let all_null = result(
        "SELECT 'a' AS term, 1.5 AS rate_ratio, CAST(NULL AS DOUBLE) AS rr_low, CAST(NULL AS DOUBLE) AS rr_high",
    )
    .await;
    let e = Picture::of(&all_null, &Request::default()).unwrap_err();
    assert!(e.contains("every interval in the result is NULL"), "{e}");
    let negative = result("SELECT 'a' AS term, 1.5 AS rate_ratio, -1.0 AS rr_low, 2.0 AS rr_high").await;
    let e = Picture::of(&negative, &Request::default()).unwrap_err();
    assert!(e.contains("log axis"), "{e}");
    let swapped = result("SELECT 'a' AS area, 1.5 AS rr, 2.0 AS lo, 1.0 AS hi").await;
    let request = Request::parse(&["forest", "area", "rr", "lo", "hi"].map(String::from)).unwrap();
    let e = Picture::of(&swapped, &request).unwrap_err();
    assert!(e.contains("does not hold its estimate"), "{e}");
    let many = result("SELECT CAST(v AS VARCHAR) AS term, 1.5 AS rate_ratio, 1.0 AS rr_low, 2.0 AS rr_high FROM unnest(range(84)) AS t(v)").await;
    let p = Picture::of(&many, &Request::default()).unwrap();
    assert!(
        p.text(100, &ASCII)
            .contains("drew the first 60 of 84 rows; choose which with WHERE or LIMIT")
    );
    let e = Picture::of(
        &result("SELECT 'x' AS area, 3 AS observed, 0.0 AS expected").await,
        &Request::default(),
    )
    .unwrap_err();
    assert!(e.contains("a funnel plot needs observed >= 0 and expected > 0"), "{e}");
}
