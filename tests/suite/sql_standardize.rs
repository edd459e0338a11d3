//! Standardised rates through SQL against scipy (extra_checks.json `standardization`, written by
//! scripts/make_fixtures.py from the papers' formulas with scipy.stats gamma, F, chi-square and
//! Poisson functions): boot::breslow directly standardised by age band (Fay–Feuer and Tiwari,
//! levels 0.95 and 0.9) and the ratio smokers / non-smokers; the smokers' SMR against the
//! non-smokers' age-specific rates; mlmRev::Mmmec observed / expected per nation at level 0.9.
//! The results are also the same with one partition and with four.

use datafusion::arrow::array::{Array, AsArray, RecordBatch, StructArray};
use datafusion::arrow::datatypes::Float64Type;
use datafusion::prelude::{CsvReadOptions, SessionConfig, SessionContext};
use serde_json::Value;

use crate::support::{close, f, fixture_path, load_json};

/// Relative tolerance against scipy: both sides evaluate the same closed forms in double
/// precision; the quantiles differ in their last digits (scipy's Boost vs statrs + Newton).
const REL: f64 = 1e-10;

async fn context(partitions: usize) -> SessionContext {
    let ctx = SessionContext::new_with_config(SessionConfig::new().with_target_partitions(partitions));
    ratesheet::register_functions(&ctx).unwrap();
    for name in ["breslow", "mmmec"] {
        let path = fixture_path(&format!("reference/data/{name}.csv"));
        ctx.register_csv(name, path.to_str().unwrap(), CsvReadOptions::new())
            .await
            .unwrap();
    }
    ctx
}

async fn rows(ctx: &SessionContext, sql: &str) -> Vec<RecordBatch> {
    ctx.sql(sql).await.unwrap().collect().await.unwrap()
}

/// Field `name` of struct column `c`, row `r`.
fn field(batch: &RecordBatch, c: usize, name: &str, r: usize) -> f64 {
    let s: &StructArray = batch.column(c).as_struct();
    let a = s.column_by_name(name).unwrap().as_primitive::<Float64Type>();
    assert!(!a.is_null(r), "{name} is NULL");
    a.value(r)
}

fn check_fields(what: &str, batch: &RecordBatch, c: usize, r: usize, want: &Value, names: &[&str]) {
    for name in names {
        close(
            &format!("{what} {name}"),
            field(batch, c, name, r),
            f(&want[*name]),
            REL,
            0.0,
        );
    }
}

const DIRECT: &str = "WITH s AS (SELECT age, SUM(n) AS standard FROM breslow GROUP BY age)
    SELECT b.smoke, standardized_rate(b.y, b.n, s.standard, 'per=100000, level={level}, method={method}') AS dsr
    FROM breslow b JOIN s USING (age) GROUP BY b.smoke";

#[tokio::test]
async fn standardized_rates_and_ratios_match_scipy() {
    let extra = load_json("extra_checks.json");
    let want = &extra["standardization"];
    for partitions in [1, 4] {
        let ctx = context(partitions).await;
        for (key, case) in want["breslow_direct"]["cases"].as_object().unwrap() {
            let (method, level) = key.rsplit_once('_').unwrap();
            let direct = DIRECT.replace("{level}", level).replace("{method}", method);
            let sql = format!("WITH r AS ({direct}) SELECT smoke, dsr FROM r ORDER BY smoke");
            let batch = &rows(&ctx, &sql).await[0];
            for (r, smoke) in ["0", "1"].iter().enumerate() {
                check_fields(
                    &format!("{key} smoke={smoke}"),
                    batch,
                    1,
                    r,
                    &case["rates"][smoke],
                    &["rate", "low", "high", "std_error", "shift_mean", "shift_variance"],
                );
            }
            let sql = format!(
                "WITH r AS ({direct}) SELECT standardized_rate_ratio(a.dsr, b.dsr) FROM r a, r b \
                 WHERE a.smoke = 1 AND b.smoke = 0"
            );
            let batch = &rows(&ctx, &sql).await[0];
            check_fields(
                &format!("{key} ratio"),
                batch,
                0,
                0,
                &case["ratio_smokers_to_non"],
                &["ratio", "low", "high"],
            );
        }

        let smr = &want["breslow_smr_smokers"];
        let sql = "WITH reference AS (SELECT age, CAST(y AS DOUBLE) / n AS rate FROM breslow WHERE smoke = 0)
            SELECT standardized_ratio(b.y, b.n, reference.rate) FROM breslow b JOIN reference USING (age)
            WHERE b.smoke = 1";
        let batch = &rows(&ctx, sql).await[0];
        check_fields(
            "breslow SMR",
            batch,
            0,
            0,
            smr,
            &["observed", "expected", "ratio", "low", "high", "p_value"],
        );

        let sql = "SELECT nation, standardized_ratio(deaths, expected, 'level=0.9') FROM mmmec GROUP BY nation ORDER BY nation";
        let batches = rows(&ctx, sql).await;
        let mut seen = 0;
        for batch in &batches {
            let nations = batch
                .column(0)
                .as_string_view_opt()
                .map(|a| (0..a.len()).map(|i| a.value(i).to_string()).collect::<Vec<_>>())
                .or_else(|| {
                    batch
                        .column(0)
                        .as_string_opt::<i32>()
                        .map(|a| (0..a.len()).map(|i| a.value(i).to_string()).collect())
                })
                .unwrap();
            for (r, nation) in nations.iter().enumerate() {
                check_fields(
                    &format!("Mmmec {nation}"),
                    batch,
                    1,
                    r,
                    &want["mmmec_by_nation"]["nations"][nation],
                    &["observed", "expected", "ratio", "low", "high", "p_value"],
                );
                seen += 1;
            }
        }
        assert_eq!(seen, want["mmmec_by_nation"]["nations"].as_object().unwrap().len());
    }
}
