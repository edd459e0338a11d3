//! Closed-form rate inference against scipy (closed_form.json: scipy.stats.chi2.ppf for the
//! Garwood limits, beta.ppf for the exact conditional limits; extra_checks.json:
//! scipy.stats.binomtest for the exact p-values). The Breslow & Day 1987 vol. II limits that
//! reference/PUBLISHED.md lists are from memory, unverified, and not used as checks.

use ratesheet::glm::closed_form::{rate_interval, rate_ratio_exact, rate_ratio_wald};

use crate::support::{close, f, load_json};

#[test]
fn garwood_limits_match_scipy_at_three_levels() {
    let cf = load_json("reference/expected/closed_form.json");
    let rows = cf["garwood_exact_poisson_ci"]["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 30);
    for row in rows {
        let x = f(&row["events"]);
        let level = f(&row["conf"]);
        // Exposure 1000 checks the division too (the fixture's note: 5 events in 1000 years).
        let r = rate_interval(x, 1000.0, level).unwrap();
        close(&format!("rate x={x}"), r.rate, x / 1000.0, 1e-15, 0.0);
        close(
            &format!("low x={x} level={level}"),
            r.low * 1000.0,
            f(&row["lower"]),
            1e-10,
            1e-300,
        );
        close(
            &format!("high x={x} level={level}"),
            r.high * 1000.0,
            f(&row["upper"]),
            1e-10,
            0.0,
        );
    }
}

#[test]
fn two_rate_comparisons_match_scipy() {
    let cf = load_json("reference/expected/closed_form.json");
    for case in cf["two_rate_ratio"]["cases"].as_array().unwrap() {
        let (a, ta) = (f(&case["a_events_exposed"]), f(&case["pt_exposed"]));
        let (b, tb) = (f(&case["b_events_unexposed"]), f(&case["pt_unexposed"]));
        let wald = rate_ratio_wald(a, ta, b, tb, 0.95).unwrap();
        close("ratio", wald.ratio, f(&case["rate_ratio"]), 1e-13, 0.0);
        let ci = &case["wald_ci95_exact_z"];
        close("wald low", wald.low, f(&ci[0]), 1e-12, 0.0);
        close("wald high", wald.high, f(&ci[1]), 1e-12, 0.0);
        close("wald p", wald.p_value, f(&case["wald_p_two_sided"]), 1e-9, 0.0);
        let exact = rate_ratio_exact(a, ta, b, tb, 0.95).unwrap();
        let ci = &case["exact_conditional_ci95"];
        close("exact low", exact.low, f(&ci[0]), 1e-9, 0.0);
        close("exact high", exact.high, f(&ci[1]), 1e-9, 0.0);
    }
    let extra = load_json("extra_checks.json");
    for case in extra["two_rate_exact_tests"].as_array().unwrap() {
        let (a, ta, b, tb) = (f(&case["a"]), f(&case["ta"]), f(&case["b"]), f(&case["tb"]));
        let exact = rate_ratio_exact(a, ta, b, tb, 0.90).unwrap();
        close(
            &format!("exact p {a}/{b}"),
            exact.p_value,
            f(&case["exact_p_value"]),
            1e-9,
            0.0,
        );
        close("exact 90% low", exact.low, f(&case["exact_ci90"][0]), 1e-9, 0.0);
        close("exact 90% high", exact.high, f(&case["exact_ci90"][1]), 1e-9, 0.0);
    }
}
