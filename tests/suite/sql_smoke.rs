//! The shortest route a user takes: per-District fits read back through `unnest(fit.terms)`
//! and through dot access on the fit, against statsmodels 0.15.0 (insurance.json `per_group`,
//! MASS::Insurance).

use datafusion::arrow::array::{Array, AsArray, RecordBatch};
use datafusion::arrow::datatypes::{Float64Type, UInt64Type};
use datafusion::arrow::util::display::array_value_to_string as text;
use datafusion::prelude::*;

use crate::support::{close, f, fixture_path, load_json};

const FIT: &str = "poisson_fit(\"Claims\", \"Holders\", \"Group\", \"Age\", 'ref.Group=<1l, ref.Age=<25')";

fn float(b: &RecordBatch, c: usize, r: usize) -> f64 {
    assert!(!b.column(c).is_null(r), "column {c} row {r} is NULL");
    b.column(c).as_primitive::<Float64Type>().value(r)
}

#[tokio::test]
async fn smoke() {
    let expected = load_json("reference/expected/insurance.json");
    let groups = expected["per_group"][0]["groups"].as_array().unwrap().clone();
    let group = |d: &str| {
        groups
            .iter()
            .find(|g| g["group"].to_string() == d)
            .unwrap_or_else(|| panic!("no group {d}"))
            .clone()
    };
    let ctx = SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    let path = fixture_path("reference/data/insurance.csv");
    ctx.register_csv("insurance", path.to_str().unwrap(), CsvReadOptions::new())
        .await
        .unwrap();
    let (mut terms, mut districts) = (0, 0);
    let sql = format!(
        "WITH f AS (SELECT \"District\" AS d, {FIT} AS fit FROM insurance GROUP BY \"District\"), \
         t AS (SELECT d, unnest(fit.terms) AS t FROM f) SELECT d, t.term, t.estimate, t.std_error FROM t ORDER BY d, t.term"
    );
    for b in ctx.sql(&sql).await.unwrap().collect().await.unwrap() {
        for r in 0..b.num_rows() {
            let (d, term) = (text(b.column(0), r).unwrap(), text(b.column(1), r).unwrap());
            let want = group(&d)["poisson"]["coefficients"]
                .as_array()
                .unwrap()
                .iter()
                .find(|c| c["term"] == term.as_str())
                .unwrap_or_else(|| panic!("{d}: no reference term {term}"))
                .clone();
            close(
                &format!("{d} {term} estimate"),
                float(&b, 2, r),
                f(&want["estimate"]),
                1e-8,
                1e-12,
            );
            close(
                &format!("{d} {term} se"),
                float(&b, 3, r),
                f(&want["std_error"]),
                1e-7,
                0.0,
            );
            terms += 1;
        }
    }
    let sql = format!(
        "SELECT \"District\" AS d, fit.status, fit.deviance, fit['dispersion'], fit.n_used \
         FROM (SELECT \"District\", {FIT} AS fit FROM insurance GROUP BY \"District\") ORDER BY 1"
    );
    for b in ctx.sql(&sql).await.unwrap().collect().await.unwrap() {
        for r in 0..b.num_rows() {
            let d = text(b.column(0), r).unwrap();
            let want = group(&d)["poisson"].clone();
            assert_eq!(text(b.column(1), r).unwrap(), "ok", "district {d}");
            close(
                &format!("{d} deviance"),
                float(&b, 2, r),
                f(&want["deviance"]),
                1e-8,
                1e-11,
            );
            close(
                &format!("{d} dispersion"),
                float(&b, 3, r),
                f(&want["dispersion_pearson"]),
                1e-8,
                1e-12,
            );
            assert_eq!(
                b.column(4).as_primitive::<UInt64Type>().value(r),
                want["nobs"].as_u64().unwrap()
            );
            districts += 1;
        }
    }
    assert_eq!((terms, districts), (4 * 7, 4));
}
