use datafusion::prelude::*;

use crate::support::fixture_path;

#[tokio::test]
async fn smoke() {
    let ctx = SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    ctx.register_csv(
        "insurance",
        fixture_path("reference/data/insurance.csv").to_str().unwrap(),
        CsvReadOptions::new(),
    )
    .await
    .unwrap();
    let df = ctx.sql("WITH f AS (SELECT \"District\" AS d, poisson_fit(\"Claims\", \"Holders\", \"Group\", \"Age\", 'ref.Group=<1l, ref.Age=<25') AS fit FROM insurance GROUP BY \"District\"), t AS (SELECT d, unnest(fit.terms) AS t FROM f) SELECT d, t.term, t.estimate, t.std_error FROM t ORDER BY d, t.term").await.unwrap();
    df.show().await.unwrap();
    let df = ctx.sql("SELECT \"District\" AS d, fit.status, fit.deviance, fit['dispersion'], fit.n_used FROM (SELECT \"District\", poisson_fit(\"Claims\", \"Holders\", \"Group\", \"Age\", 'ref.Group=<1l, ref.Age=<25') AS fit FROM insurance GROUP BY \"District\") ORDER BY 1").await.unwrap();
    df.show().await.unwrap();
}
