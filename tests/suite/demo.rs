//! The demo data: committed files equal the seeded generator's output, and fits recover the
//! invented true parameters (the check values here are the generator's own parameters, which is
//! what a simulation check compares against).

use datafusion::arrow::array::{AsArray, RecordBatch};
use datafusion::arrow::datatypes::Float64Type;
use datafusion::prelude::{ParquetReadOptions, SessionContext};
use ratesheet::demo;

fn demo_dir() -> std::path::PathBuf {
    std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("demo-parquet")
}

async fn context() -> SessionContext {
    let ctx = SessionContext::new();
    ratesheet::register_functions(&ctx).unwrap();
    let path = demo_dir().join("pipe_breaks.parquet");
    ctx.register_parquet("pipe_breaks", path.to_str().unwrap(), ParquetReadOptions::default())
        .await
        .unwrap();
    ctx
}

#[tokio::test]
async fn committed_demo_files_match_the_generator() {
    let ctx = context().await;
    let committed: Vec<RecordBatch> = ctx
        .sql("SELECT * FROM pipe_breaks")
        .await
        .unwrap()
        .collect()
        .await
        .unwrap();
    let committed = datafusion::arrow::compute::concat_batches(&committed[0].schema(), &committed).unwrap();
    let generated = demo::pipe_breaks();
    assert_eq!(committed.num_rows(), generated.num_rows());
    for (j, want) in generated.columns().iter().enumerate() {
        // Parquet text reads back as Utf8View; compare values in the generator's types.
        let got = datafusion::arrow::compute::cast(committed.column(j), want.data_type()).unwrap();
        assert_eq!(
            &got, want,
            "column {j} differs; regenerate with: cargo run -- demo-data demo-parquet"
        );
    }
    let csv = std::fs::read_to_string(demo_dir().join("callouts.csv")).unwrap();
    assert_eq!(csv, demo::callouts_csv());
    let size: u64 = std::fs::read_dir(demo_dir())
        .unwrap()
        .map(|e| e.unwrap().metadata().unwrap().len())
        .sum();
    assert!(size < 5 << 20, "demo data is {size} bytes");
}

/// Fitting the regular districts recovers every true rate ratio within its 99.9% interval.
#[tokio::test]
async fn fits_recover_the_true_rate_ratios() {
    let ctx = context().await;
    let sql = "WITH f AS (SELECT poisson_fit(breaks, km_years, district, material, (2010 - install_decade) / 10.0, \
               diameter_class, soil_corrosivity, 'level=0.999, ref.district=Harbour Flats, ref.material=cast_iron, \
               ref.diameter_class=small, ref.soil_corrosivity=low') AS fit FROM pipe_breaks \
               WHERE district NOT IN ('Quarry Hill', 'Kiln Row')) \
               SELECT t.term, t.rr_low, t.rr_high FROM (SELECT unnest(fit.terms) AS t FROM f)";
    let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
    let mut truth: Vec<(String, f64)> = Vec::new();
    for (n, rr) in demo::DISTRICTS
        .iter()
        .filter(|(n, _)| *n != "Quarry Hill" && *n != "Kiln Row")
        .skip(1)
    {
        truth.push((format!("district={n}"), *rr));
    }
    for (n, rr) in demo::MATERIALS.iter().skip(1) {
        truth.push((format!("material={n}"), *rr));
    }
    for (n, rr) in demo::DIAMETERS.iter().skip(1) {
        truth.push((format!("diameter_class={n}"), *rr));
    }
    truth.push(("soil_corrosivity=high".into(), demo::SOILS[1].1));
    truth.push(("(2010 - install_decade) / 10".into(), demo::PER_DECADE_OLDER));
    let mut checked = 0;
    for b in &batches {
        let names =
            datafusion::arrow::compute::cast(b.column(0), &datafusion::arrow::datatypes::DataType::Utf8).unwrap();
        let names = names.as_string::<i32>();
        let lo = b.column(1).as_primitive::<Float64Type>();
        let hi = b.column(2).as_primitive::<Float64Type>();
        for r in 0..b.num_rows() {
            if let Some((_, rr)) = truth.iter().find(|(n, _)| n == names.value(r)) {
                assert!(
                    lo.value(r) < *rr && *rr < hi.value(r),
                    "{}: true {rr} outside [{}, {}]",
                    names.value(r),
                    lo.value(r),
                    hi.value(r)
                );
                checked += 1;
            }
        }
    }
    assert_eq!(checked, truth.len(), "every true parameter has a term");
}

/// The planted irregularities show: Quarry Hill is overdispersed, Kiln Row's steel is a boundary.
#[tokio::test]
async fn the_planted_flags_show() {
    let ctx = context().await;
    let sql = "SELECT district, fit.status, fit.overdispersion_p, fit_term(fit, 'material=steel')['flag'] FROM \
               (SELECT district, poisson_fit(breaks, km_years, material, install_decade, diameter_class, soil_corrosivity) AS fit \
                FROM pipe_breaks GROUP BY district) ORDER BY district";
    let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
    let mut seen = 0;
    for b in &batches {
        let text = |j: usize| {
            datafusion::arrow::compute::cast(b.column(j), &datafusion::arrow::datatypes::DataType::Utf8).unwrap()
        };
        let (d, status, flag) = (text(0), text(1), text(3));
        let (d, status, flag) = (d.as_string::<i32>(), status.as_string::<i32>(), flag.as_string::<i32>());
        let od = b.column(2).as_primitive::<Float64Type>();
        for r in 0..b.num_rows() {
            match d.value(r) {
                "Quarry Hill" => {
                    assert!(od.value(r) < 1e-6, "Quarry Hill overdispersion p {}", od.value(r));
                    seen += 1;
                }
                "Kiln Row" => {
                    assert!(status.value(r).starts_with("boundary estimate"), "{}", status.value(r));
                    assert_eq!(flag.value(r), "boundary");
                    seen += 1;
                }
                _ => assert_eq!(status.value(r), "ok"),
            }
        }
    }
    assert_eq!(seen, 2);
}
