//! The invented demo scenario: pipe breaks in a water utility's distribution network.
//!
//! Ten districts (invented names); per district, pipe material x installation decade x diameter
//! class x soil corrosivity cells, each with a length of main observed over five years
//! (exposure in km-years) and a break count drawn from a Poisson model with known rate ratios.
//! Break rates of a few to a few dozen per 100 km-years are the usual range in water asset
//! management (common practice, no source). Two districts are made irregular on purpose:
//! Quarry Hill has gamma-distributed extra variation (overdispersion), and Kiln Row records no
//! breaks at all on its steel mains (a boundary estimate). A small contingency table of crew
//! call-outs by cause and season comes with it.
//!
//! The generator is seeded and deterministic; `ratesheet demo-data DIR` writes the files.

use std::path::Path;
use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, Float64Array, Int64Array, RecordBatch, StringArray};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::error::{DataFusionError, Result};
use datafusion::parquet::arrow::ArrowWriter;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Gamma, Poisson};
use serde::Serialize;

pub const SEED: u64 = 20_261_201;

pub const DISTRICTS: [(&str, f64); 10] = [
    ("Harbour Flats", 1.00),
    ("Upper Mill", 0.80),
    ("Lower Mill", 1.25),
    ("Quarry Hill", 1.10),
    ("Riverside", 1.45),
    ("Old Town", 1.30),
    ("East Meadows", 0.70),
    ("Stone Cross", 0.95),
    ("West Heath", 0.85),
    ("Kiln Row", 1.15),
];
pub const MATERIALS: [(&str, f64); 5] = [
    ("cast_iron", 1.0),
    ("ductile_iron", 0.55),
    ("pvc", 0.40),
    ("asbestos_cement", 0.85),
    ("steel", 1.35),
];
pub const DECADES: [i64; 7] = [1950, 1960, 1970, 1980, 1990, 2000, 2010];
pub const DIAMETERS: [(&str, f64); 3] = [("small", 1.0), ("medium", 0.70), ("large", 0.45)];
pub const SOILS: [(&str, f64); 2] = [("low", 1.0), ("high", 1.60)];
/// Breaks per km-year of cast-iron, small, low-corrosivity main laid in 2010, Harbour Flats.
pub const BASE_RATE: f64 = 0.06;
/// Rate ratio per decade of age (older mains break more).
pub const PER_DECADE_OLDER: f64 = 1.18;
/// Gamma shape of Quarry Hill's extra variation (variance inflation 1 + mu / shape).
pub const OVERDISPERSION_SHAPE: f64 = 1.5;

/// The true parameters written beside the data.
#[derive(Debug, Serialize)]
pub struct TrueParameters {
    pub seed: u64,
    pub base_rate_per_km_year: f64,
    pub rate_ratio_per_decade_older: f64,
    pub district_rate_ratios: Vec<(String, f64)>,
    pub material_rate_ratios: Vec<(String, f64)>,
    pub diameter_rate_ratios: Vec<(String, f64)>,
    pub soil_rate_ratios: Vec<(String, f64)>,
    pub overdispersed_district: String,
    pub overdispersion_gamma_shape: f64,
    pub zero_break_district_material: (String, String),
    pub note: String,
}

pub fn true_parameters() -> TrueParameters {
    let pairs = |v: &[(&str, f64)]| v.iter().map(|(n, r)| (n.to_string(), *r)).collect();
    TrueParameters {
        seed: SEED,
        base_rate_per_km_year: BASE_RATE,
        rate_ratio_per_decade_older: PER_DECADE_OLDER,
        district_rate_ratios: pairs(&DISTRICTS),
        material_rate_ratios: pairs(&MATERIALS),
        diameter_rate_ratios: pairs(&DIAMETERS),
        soil_rate_ratios: pairs(&SOILS),
        overdispersed_district: "Quarry Hill".into(),
        overdispersion_gamma_shape: OVERDISPERSION_SHAPE,
        zero_break_district_material: ("Kiln Row".into(), "steel".into()),
        note: "Invented data for the ratesheet demo. Reference levels: Harbour Flats, cast_iron, small, low, \
               decade 2010; decades_old = (2010 - install_decade) / 10."
            .into(),
    }
}

/// Pipe-break cells.
pub fn pipe_breaks() -> RecordBatch {
    let mut rng = StdRng::seed_from_u64(SEED);
    let (mut district, mut material, mut decade, mut diameter, mut soil) = (vec![], vec![], vec![], vec![], vec![]);
    let (mut km, mut km_years, mut breaks) = (vec![], vec![], vec![]);
    let extra = Gamma::new(OVERDISPERSION_SHAPE, 1.0 / OVERDISPERSION_SHAPE).expect("valid gamma");
    for (d, d_rr) in DISTRICTS {
        for (m, m_rr) in MATERIALS {
            for dec in DECADES {
                // PVC arrived in the 1970s; asbestos cement stopped being laid after the 1980s.
                if (m == "pvc" && dec < 1970) || (m == "asbestos_cement" && dec > 1980) {
                    continue;
                }
                for (dia, dia_rr) in DIAMETERS {
                    for (s, s_rr) in SOILS {
                        let length: f64 = (rng.random_range(0.5f64..30.0) * 10.0).round() / 10.0;
                        let exposure = length * 5.0;
                        let decades_old = (2010 - dec) as f64 / 10.0;
                        let mut rate = BASE_RATE * d_rr * m_rr * dia_rr * s_rr * PER_DECADE_OLDER.powf(decades_old);
                        if d == "Quarry Hill" {
                            rate *= extra.sample(&mut rng);
                        }
                        let mu = rate * exposure;
                        let mut count = Poisson::new(mu).map(|p| p.sample(&mut rng) as i64).unwrap_or(0);
                        if d == "Kiln Row" && m == "steel" {
                            count = 0;
                        }
                        district.push(d);
                        material.push(m);
                        decade.push(dec);
                        diameter.push(dia);
                        soil.push(s);
                        km.push(length);
                        km_years.push(exposure);
                        breaks.push(count);
                    }
                }
            }
        }
    }
    let schema = Arc::new(Schema::new(vec![
        Field::new("district", DataType::Utf8, false),
        Field::new("material", DataType::Utf8, false),
        Field::new("install_decade", DataType::Int64, false),
        Field::new("diameter_class", DataType::Utf8, false),
        Field::new("soil_corrosivity", DataType::Utf8, false),
        Field::new("km_of_main", DataType::Float64, false),
        Field::new("km_years", DataType::Float64, false),
        Field::new("breaks", DataType::Int64, false),
    ]));
    let columns: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from(district)),
        Arc::new(StringArray::from(material)),
        Arc::new(Int64Array::from(decade)),
        Arc::new(StringArray::from(diameter)),
        Arc::new(StringArray::from(soil)),
        Arc::new(Float64Array::from(km)),
        Arc::new(Float64Array::from(km_years)),
        Arc::new(Int64Array::from(breaks)),
    ];
    RecordBatch::try_new(schema, columns).expect("columns match the schema")
}

pub const CAUSES: [&str; 5] = [
    "corrosion",
    "ground_movement",
    "joint_failure",
    "pressure_surge",
    "third_party",
];
pub const SEASONS: [&str; 4] = ["winter", "spring", "summer", "autumn"];

/// Crew call-outs by cause and season: independent margins except more ground movement in
/// winter (so the independence test should reject).
pub fn callouts_csv() -> String {
    let mut rng = StdRng::seed_from_u64(SEED + 1);
    let cause_share = [0.34, 0.16, 0.22, 0.10, 0.18];
    let season_share = [0.32, 0.22, 0.20, 0.26];
    let mut out = String::from("cause,season,callouts\n");
    for (c, cs) in CAUSES.iter().zip(cause_share) {
        for (s, ss) in SEASONS.iter().zip(season_share) {
            let boost = if *c == "ground_movement" && *s == "winter" {
                2.2
            } else {
                1.0
            };
            let mu: f64 = 900.0 * cs * ss * boost;
            let n = Poisson::new(mu).map(|p| p.sample(&mut rng) as i64).unwrap_or(0);
            out.push_str(&format!("{c},{s},{n}\n"));
        }
    }
    out
}

/// Writes `pipe_breaks.parquet`, `callouts.csv` and `true_parameters.json` into `dir`
/// (each through a temporary file renamed into place).
pub fn write_demo_data(dir: &Path) -> Result<()> {
    std::fs::create_dir_all(dir)?;
    let batch = pipe_breaks();
    let tmp = dir.join("pipe_breaks.parquet.partial");
    {
        let file = std::fs::File::create(&tmp)?;
        let mut writer = ArrowWriter::try_new(file, batch.schema(), None)?;
        writer.write(&batch)?;
        writer.close()?;
    }
    std::fs::rename(&tmp, dir.join("pipe_breaks.parquet"))?;
    write_atomically(&dir.join("callouts.csv"), callouts_csv().as_bytes())?;
    let json = serde_json::to_string_pretty(&true_parameters()).map_err(|e| DataFusionError::External(Box::new(e)))?;
    write_atomically(&dir.join("true_parameters.json"), json.as_bytes())?;
    Ok(())
}

fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    let tmp = path.with_extension("partial");
    std::fs::write(&tmp, bytes)?;
    std::fs::rename(&tmp, path)?;
    Ok(())
}
