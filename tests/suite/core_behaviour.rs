//! Bad inputs, edge cases and invariances of the numerical core.
//!
//! Expected values here are either exact identities (a rate model with only an intercept has
//! the closed-form estimate log(Σy/ΣE); aliasing a column must not change the other estimates)
//! or comparisons of two routes through the core that must agree (collapsed vs row-level).

use proptest::prelude::*;
use ratesheet::glm::collapse::fit_poisson_collapsed;
use ratesheet::glm::{
    ColumnKind, Design, DesignSpec, FitError, FitInput, FitOptions, GlmFit, OwnedFactor, Poisson, Predictor,
    PredictorValues, SeType, TermState, fit, log_exposure, term_table,
};

use crate::support::{Table, close, close_opt};

fn numeric_design(columns: &[(&str, &[f64])]) -> Design {
    let n = columns[0].1.len();
    let mut cols = vec![("intercept".to_string(), ColumnKind::Intercept, vec![1.0; n])];
    for (name, v) in columns {
        cols.push((name.to_string(), ColumnKind::Numeric, v.to_vec()));
    }
    Design::from_columns(n, cols).unwrap()
}

fn poisson(design: &Design, y: &[f64], exposure: Option<&[f64]>) -> Result<GlmFit, FitError> {
    let offset = exposure.map(|e| log_exposure(e)).transpose()?;
    fit(
        &Poisson,
        design,
        FitInput {
            y,
            offset: offset.as_deref(),
            weights: None,
        },
        FitOptions::default(),
    )
}

#[test]
fn non_finite_values_are_errors_that_name_the_column_and_row() {
    let age = [1.0, 2.0, f64::NAN];
    let spec = DesignSpec {
        intercept: true,
        predictors: vec![Predictor {
            name: "age",
            values: PredictorValues::Numeric(&age),
        }],
        interactions: vec![],
    };
    let err = Design::build(3, &spec).unwrap_err().to_string();
    assert_eq!(err, "age has the non-finite value NaN in row 2");
    let d = numeric_design(&[("x", &[1.0, 2.0, 3.0])]);
    let err = poisson(&d, &[1.0, f64::INFINITY, 2.0], None).unwrap_err().to_string();
    assert!(err.contains("row 1") && err.contains("finite"), "{err}");
}

#[test]
fn negative_counts_and_bad_exposures_are_refused() {
    let d = numeric_design(&[("x", &[1.0, 2.0, 3.0])]);
    let err = poisson(&d, &[1.0, -2.0, 2.0], None).unwrap_err().to_string();
    assert_eq!(err, "response value -2 in row 1 is not allowed: counts must be >= 0");
    for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
        let err = poisson(&d, &[1.0, 2.0, 2.0], Some(&[1.0, bad, 1.0]))
            .unwrap_err()
            .to_string();
        assert!(err.starts_with(&format!("exposure {bad} in row 1")), "{err}");
    }
}

/// Non-integer counts are allowed (quasi-likelihood use): the estimating equations are the
/// same, and with an intercept only the estimate is log(Σy/ΣE) exactly.
#[test]
fn non_integer_counts_are_accepted() {
    let y = [0.5, 2.25, 3.0, 1.75];
    let e = [1.0, 2.0, 2.0, 1.5];
    let d = Design::from_columns(4, vec![("intercept".into(), ColumnKind::Intercept, vec![1.0; 4])]).unwrap();
    let fit = poisson(&d, &y, Some(&e)).unwrap();
    assert_eq!(fit.status(), "ok");
    close("log rate", fit.estimates[0], (7.5f64 / 6.5).ln(), 1e-12, 0.0);
    assert!(fit.stats.loglik.unwrap().is_finite());
}

#[test]
fn fewer_rows_than_parameters_is_a_flagged_result() {
    let d = numeric_design(&[("x", &[1.0, 2.0]), ("z", &[0.0, 5.0])]);
    let fit = poisson(&d, &[1.0, 3.0], None).unwrap();
    assert_eq!(fit.status(), "too few rows (2 rows for 3 parameters)");
    assert!(fit.states.iter().all(|s| *s == TermState::NotEstimated));
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    assert!(
        rows.iter()
            .all(|r| r.estimate.is_none() && r.flag == Some("not estimated"))
    );
    assert_eq!(fit.stats.deviance, None);
}

#[test]
fn all_zero_counts_give_rate_zero_and_no_finite_estimates() {
    let d = numeric_design(&[("x", &[1.0, 2.0, 3.0, 4.0])]);
    let fit = poisson(&d, &[0.0; 4], Some(&[1.0, 2.0, 3.0, 4.0])).unwrap();
    assert!(fit.status().starts_with("no events"), "{}", fit.status());
    assert_eq!(fit.crude_rate(), Some(0.0));
    assert_eq!(fit.stats.deviance, Some(0.0));
    assert!(fit.states.iter().all(|s| *s == TermState::Boundary));
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    assert!(rows.iter().all(|r| r.estimate.is_none() && r.flag == Some("boundary")));
}

/// A constant predictor and an exact linear combination are aliased; the remaining estimates
/// equal those of the model without the aliased columns.
#[test]
fn aliased_columns_are_reported_and_do_not_disturb_the_rest() {
    let x = [0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0];
    let constant = [7.0; 8];
    let combo: Vec<f64> = x.iter().map(|v| 2.0 * v + 3.0).collect();
    let y = [1.0, 0.0, 2.0, 3.0, 2.0, 5.0, 4.0, 9.0];
    let e = [1.0, 1.2, 0.8, 1.0, 1.1, 1.3, 0.9, 1.5];
    let full = numeric_design(&[("x", &x), ("constant", &constant), ("combo", &combo)]);
    let fit_full = poisson(&full, &y, Some(&e)).unwrap();
    assert_eq!(fit_full.status(), "rank deficient (2 aliased columns)");
    assert_eq!(
        fit_full.states,
        [
            TermState::Estimated,
            TermState::Estimated,
            TermState::Aliased,
            TermState::Aliased
        ]
    );
    let rows = term_table(&fit_full, SeType::Model, 0.95).unwrap();
    assert_eq!((rows[2].estimate, rows[2].flag), (None, Some("aliased")));
    let fit_small = poisson(&numeric_design(&[("x", &x)]), &y, Some(&e)).unwrap();
    let small = term_table(&fit_small, SeType::Model, 0.95).unwrap();
    for j in 0..2 {
        close(
            "estimate",
            rows[j].estimate.unwrap(),
            small[j].estimate.unwrap(),
            1e-10,
            1e-12,
        );
        close(
            "se",
            rows[j].std_error.unwrap(),
            small[j].std_error.unwrap(),
            1e-10,
            0.0,
        );
    }
    assert_eq!(fit_full.stats.df_resid, Some(6));
    close_opt(
        "deviance",
        fit_full.stats.deviance,
        fit_small.stats.deviance.unwrap(),
        1e-10,
        1e-12,
    );
}

#[test]
fn a_factor_with_one_level_adds_no_column() {
    let f = OwnedFactor::from_labels(&["steel", "steel", "steel"]);
    let spec = DesignSpec {
        intercept: true,
        predictors: vec![Predictor {
            name: "material",
            values: PredictorValues::Factor(f.column(None).unwrap()),
        }],
        interactions: vec![],
    };
    let d = Design::build(3, &spec).unwrap();
    assert_eq!(d.names(), ["intercept"]);
    assert_eq!(poisson(&d, &[1.0, 2.0, 3.0], None).unwrap().status(), "ok");
}

/// Huge counts and tiny exposures stay exact: the intercept-only estimate is log(Σy/ΣE).
#[test]
fn extreme_magnitudes_stay_finite_and_exact() {
    let d = Design::from_columns(3, vec![("intercept".into(), ColumnKind::Intercept, vec![1.0; 3])]).unwrap();
    let y = [1e9, 2e9, 3e9];
    let e = [1e-12, 2e-12, 3e-12];
    let fit = poisson(&d, &y, Some(&e)).unwrap();
    assert_eq!(fit.status(), "ok");
    close("log rate", fit.estimates[0], (6e9f64 / 6e-12).ln(), 1e-13, 0.0);
    close("se", fit.cov_unscaled[(0, 0)].sqrt(), 1.0 / 6e9f64.sqrt(), 1e-10, 0.0);
}

/// A material with no breaks: its coefficient is -infinity. It is flagged `boundary` with NULL
/// numbers; the other coefficients equal those of the fit without that material's rows.
#[test]
fn a_level_with_zero_events_is_flagged_boundary() {
    let material = ["iron", "iron", "iron", "pvc", "pvc", "pvc", "clay", "clay", "clay"];
    let diameter = [100.0, 150.0, 200.0, 100.0, 150.0, 200.0, 100.0, 150.0, 200.0];
    let y = [5.0, 3.0, 2.0, 4.0, 6.0, 1.0, 0.0, 0.0, 0.0];
    let km_years = [10.0, 12.0, 9.0, 20.0, 18.0, 7.0, 5.0, 6.0, 4.0];
    let build = |rows: std::ops::Range<usize>| {
        let f = OwnedFactor::from_labels(&material[rows.clone()]);
        let d = diameter[rows.clone()].to_vec();
        let spec = DesignSpec {
            intercept: true,
            predictors: vec![
                Predictor {
                    name: "material",
                    values: PredictorValues::Factor(f.column(Some("iron")).unwrap()),
                },
                Predictor {
                    name: "diameter",
                    values: PredictorValues::Numeric(&d),
                },
            ],
            interactions: vec![],
        };
        Design::build(rows.len(), &spec).unwrap()
    };
    let all = build(0..9);
    assert_eq!(all.names(), ["intercept", "material=clay", "material=pvc", "diameter"]);
    let fit = poisson(&all, &y, Some(&km_years)).unwrap();
    assert_eq!(fit.status(), "boundary estimate (1 term with an infinite estimate)");
    assert_eq!(fit.states[1], TermState::Boundary);
    let rows = term_table(&fit, SeType::Model, 0.95).unwrap();
    assert_eq!((rows[1].estimate, rows[1].flag), (None, Some("boundary")));
    let without = poisson(&build(0..6), &y[..6], Some(&km_years[..6])).unwrap();
    let want = term_table(&without, SeType::Model, 0.95).unwrap();
    for (got, want) in [(&rows[0], &want[0]), (&rows[2], &want[1]), (&rows[3], &want[2])] {
        assert_eq!(got.flag, None);
        close(&got.term, got.estimate.unwrap(), want.estimate.unwrap(), 1e-8, 1e-10);
        close(&got.term, got.std_error.unwrap(), want.std_error.unwrap(), 1e-6, 0.0);
    }
}

/// Day numbers near 20,000 next to an intercept: centring inside the solver keeps the digits.
/// Shifting a predictor by a constant changes only the intercept (by slope x shift).
#[test]
fn badly_scaled_predictors_keep_their_digits() {
    let days: Vec<f64> = (0..40).map(|i| 20_000.0 + f64::from(i) * 7.0).collect();
    let shifted: Vec<f64> = days.iter().map(|d| d - 20_000.0).collect();
    let y: Vec<f64> = (0..40).map(|i| f64::from((i * 7 + 3) % 11)).collect();
    let a = poisson(&numeric_design(&[("day", &days)]), &y, None).unwrap();
    let b = poisson(&numeric_design(&[("day", &shifted)]), &y, None).unwrap();
    close("slope", a.estimates[1], b.estimates[1], 1e-10, 0.0);
    close(
        "intercept",
        a.estimates[0] + a.estimates[1] * 20_000.0,
        b.estimates[0],
        1e-9,
        1e-12,
    );
    close(
        "slope se",
        a.cov_unscaled[(1, 1)].sqrt(),
        b.cov_unscaled[(1, 1)].sqrt(),
        1e-9,
        0.0,
    );
}

/// Collapsing identical covariate rows (AER::DoctorVisits with integer and factor predictors
/// only) gives the row-level fit's estimates, standard errors (model and HC0) and statistics.
#[test]
fn collapsed_fit_equals_the_row_level_fit() {
    let t = Table::load("reference/data/doctorvisits.csv");
    let gender = OwnedFactor::from_labels(t.text("gender"));
    let private = OwnedFactor::from_labels(t.text("private"));
    let illness = t.num("illness");
    let health = t.num("health");
    let spec = DesignSpec {
        intercept: true,
        predictors: vec![
            Predictor {
                name: "gender",
                values: PredictorValues::Factor(gender.column(None).unwrap()),
            },
            Predictor {
                name: "private",
                values: PredictorValues::Factor(private.column(None).unwrap()),
            },
            Predictor {
                name: "illness",
                values: PredictorValues::Numeric(&illness),
            },
            Predictor {
                name: "health",
                values: PredictorValues::Numeric(&health),
            },
        ],
        interactions: vec![(0, 2)],
    };
    let design = Design::build(t.rows, &spec).unwrap();
    let y = t.num("visits");
    // An exposure that varies within patterns, so the pattern sums are really exercised.
    let exposure: Vec<f64> = (0..t.rows).map(|i| 0.5 + (i % 7) as f64 * 0.25).collect();
    let rows = poisson(&design, &y, Some(&exposure)).unwrap();
    let collapsed = fit_poisson_collapsed(&design, &y, Some(&exposure), FitOptions::default()).unwrap();
    assert!(collapsed.patterns < t.rows / 10, "{} patterns", collapsed.patterns);
    let c = &collapsed.fit;
    assert_eq!(c.status(), "ok");
    for se in SeType::ALL {
        let a = term_table(&rows, se, 0.95).unwrap();
        let b = term_table(c, se, 0.95).unwrap();
        for (a, b) in a.iter().zip(&b) {
            close(
                &format!("{} estimate", a.term),
                b.estimate.unwrap(),
                a.estimate.unwrap(),
                1e-9,
                1e-12,
            );
            close(
                &format!("{} se {se:?}", a.term),
                b.std_error.unwrap(),
                a.std_error.unwrap(),
                1e-8,
                0.0,
            );
        }
    }
    let (r, s) = (&rows.stats, &c.stats);
    assert_eq!((r.n_used, r.df_resid), (s.n_used, s.df_resid));
    close_opt("deviance", s.deviance, r.deviance.unwrap(), 1e-9, 0.0);
    close_opt("null deviance", s.null_deviance, r.null_deviance.unwrap(), 1e-9, 0.0);
    close_opt("pearson", s.pearson_chi2, r.pearson_chi2.unwrap(), 1e-9, 0.0);
    close_opt("loglik", s.loglik, r.loglik.unwrap(), 1e-11, 0.0);
    close_opt("aic", s.aic, r.aic.unwrap(), 1e-11, 0.0);
    close_opt("bic", s.bic, r.bic.unwrap(), 1e-11, 0.0);
    let (ro, so) = (r.extra.overdispersion.unwrap(), s.extra.overdispersion.unwrap());
    close("overdispersion t", so.statistic, ro.statistic, 1e-8, 0.0);
    for (i, &k) in collapsed.pattern_of_row.iter().enumerate().step_by(97) {
        let pattern_exposure: f64 = (0..t.rows)
            .filter(|&j| collapsed.pattern_of_row[j] == k)
            .map(|j| exposure[j])
            .sum();
        let row_mu = c.fitted[k as usize] / pattern_exposure * exposure[i];
        close("row fitted mean", row_mu, rows.fitted[i], 1e-9, 0.0);
    }
}

fn small_fit(y: &[f64], x: &[f64], e: &[f64]) -> GlmFit {
    poisson(&numeric_design(&[("x", x)]), y, Some(e)).unwrap()
}

prop_compose! {
    fn rate_data()(n in 6usize..40)
        (y in prop::collection::vec(0u32..30, n),
         x in prop::collection::vec(-3i32..4, n),
         e in prop::collection::vec(1u32..50, n)) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        (y.into_iter().map(f64::from).collect(),
         x.into_iter().map(f64::from).collect(),
         e.into_iter().map(|v| f64::from(v) / 4.0).collect())
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// Invariance to row order.
    #[test]
    fn row_order_does_not_matter((y, x, e) in rate_data(), seed in any::<u64>()) {
        let a = small_fit(&y, &x, &e);
        let mut idx: Vec<usize> = (0..y.len()).collect();
        let mut s = seed | 1;
        for i in (1..idx.len()).rev() {
            s ^= s << 13; s ^= s >> 7; s ^= s << 17;
            idx.swap(i, (s % (i as u64 + 1)) as usize);
        }
        let pick = |v: &[f64]| idx.iter().map(|&i| v[i]).collect::<Vec<_>>();
        let b = small_fit(&pick(&y), &pick(&x), &pick(&e));
        prop_assert_eq!(a.status(), b.status());
        for (sa, (ea, eb)) in a.states.iter().zip(a.estimates.iter().zip(&b.estimates)) {
            if *sa == TermState::Estimated {
                prop_assert!((ea - eb).abs() <= 1e-8 * (1.0 + ea.abs()), "{} vs {}", ea, eb);
            }
        }
    }

    /// Scaling a predictor by c divides its coefficient and standard error by c and leaves the
    /// fit statistics alone.
    #[test]
    fn scaling_a_predictor_rescales_its_coefficient((y, x, e) in rate_data(), c in 0.001f64..1000.0) {
        let a = small_fit(&y, &x, &e);
        let xs: Vec<f64> = x.iter().map(|v| v * c).collect();
        let b = small_fit(&y, &xs, &e);
        prop_assert_eq!(a.status(), b.status());
        if a.states[1] == TermState::Estimated {
            prop_assert!((a.estimates[1] - b.estimates[1] * c).abs() <= 1e-7 * (1e-6 + a.estimates[1].abs()));
            let (sa, sb) = (a.cov_unscaled[(1, 1)].sqrt(), b.cov_unscaled[(1, 1)].sqrt() * c);
            prop_assert!((sa - sb).abs() <= 1e-7 * sa);
            let (da, db) = (a.stats.deviance.unwrap(), b.stats.deviance.unwrap());
            prop_assert!((da - db).abs() <= 1e-8 * (1.0 + da));
        }
    }

    /// Collapsing identical covariate rows changes nothing that is reported.
    #[test]
    fn collapsing_changes_nothing((y, x, e) in rate_data()) {
        let design = numeric_design(&[("x", &x)]);
        let a = small_fit(&y, &x, &e);
        let b = fit_poisson_collapsed(&design, &y, Some(&e), FitOptions::default()).unwrap().fit;
        prop_assert_eq!(a.status(), b.status());
        for j in 0..2 {
            if a.states[j] == TermState::Estimated {
                prop_assert!((a.estimates[j] - b.estimates[j]).abs() <= 1e-8 * (1.0 + a.estimates[j].abs()));
            }
        }
        if let (Some(da), Some(db)) = (a.stats.deviance, b.stats.deviance) {
            prop_assert!((da - db).abs() <= 1e-8 * (1.0 + da), "{} vs {}", da, db);
        }
    }
}
