//! `standardized_rate(events, exposure, standard_weight [, 'options'])`: the directly
//! standardised rate of each group, one input row per stratum (formulas in
//! `glm::standardize`).
//!
//! Result fields, in order: `rate, low, high, crude_rate, events, exposure, n_strata, method`,
//! then `std_error` (sqrt v), `shift_mean` and `shift_variance` (the upper limit's shift, which
//! `standardized_rate_ratio` needs), `weight_total` (the group's Σ standard_weight before
//! normalising: smaller than the standard's total when strata are missing), `per`, `level`,
//! `n_skipped`, `n_invalid`, `status`.
//! Rates, limits, the standard error and the shifts are per `per` units of exposure.

use datafusion::arrow::array::StructArray;
use datafusion::arrow::datatypes::DataType;

use super::settings::StandardizeSettings;
use super::tally::{Column, Group, Tally, build_struct, struct_type};
use crate::glm::standardize::StrataSums;

const HINT: &str = "(add 'invalid=skip' to the options to skip and count such rows)";

/// The result fields with their types.
pub fn fields() -> Vec<(&'static str, DataType)> {
    use DataType::{Float64 as F, UInt64 as U, Utf8 as S};
    vec![
        ("rate", F),
        ("low", F),
        ("high", F),
        ("crude_rate", F),
        ("events", F),
        ("exposure", F),
        ("n_strata", U),
        ("method", S),
        ("std_error", F),
        ("shift_mean", F),
        ("shift_variance", F),
        ("weight_total", F),
        ("per", F),
        ("level", F),
        ("n_skipped", U),
        ("n_invalid", U),
        ("status", S),
    ]
}

impl Tally for StrataSums {
    const STATE: &'static [&'static str] = &[
        "n_strata",
        "weight",
        "weighted_rate",
        "weighted_variance",
        "max_multiplier",
        "multiplier_sum",
        "multiplier_square_sum",
        "events",
        "exposure",
    ];

    fn empty() -> Self {
        StrataSums::default()
    }

    fn problem(v: &[f64]) -> Option<String> {
        let f = "standardized_rate";
        let (x, n, s) = (v[0], v[1], v[2]);
        if !(x.is_finite() && x >= 0.0) {
            return Some(format!("{f}: events value {x} must be finite and >= 0 {HINT}"));
        }
        if !(n.is_finite() && n > 0.0) {
            return Some(format!("{f}: exposure value {n} must be finite and > 0 {HINT}"));
        }
        if !(s.is_finite() && s >= 0.0) {
            return Some(format!("{f}: standard_weight value {s} must be finite and >= 0 {HINT}"));
        }
        None
    }

    fn add(&mut self, v: &[f64]) {
        StrataSums::add(self, v[0], v[1], v[2]);
    }

    fn merge(&mut self, other: &Self) {
        StrataSums::merge(self, other);
    }

    fn write_state(&self, out: &mut Vec<f64>) {
        out.extend([
            self.n_strata as f64,
            self.weight,
            self.weighted_rate,
            self.weighted_variance,
            self.max_multiplier,
            self.multiplier_sum,
            self.multiplier_square_sum,
            self.events,
            self.exposure,
        ]);
    }

    fn read_state(v: &[f64]) -> Self {
        StrataSums {
            n_strata: v[0] as u64,
            weight: v[1],
            weighted_rate: v[2],
            weighted_variance: v[3],
            max_multiplier: v[4],
            multiplier_sum: v[5],
            multiplier_square_sum: v[6],
            events: v[7],
            exposure: v[8],
        }
    }

    fn result_type() -> DataType {
        struct_type(&fields())
    }

    fn results(groups: &[Group<Self>], s: &StandardizeSettings) -> StructArray {
        let n = groups.len();
        let mut num: Vec<Vec<Option<f64>>> = vec![Vec::with_capacity(n); 12];
        let (mut strata, mut skipped, mut invalid) = (Vec::new(), Vec::new(), Vec::new());
        let (mut method, mut status) = (Vec::new(), Vec::new());
        for g in groups {
            let t = &g.tally;
            let moments = t.moments(s.method).map(|m| m.scaled(s.per));
            let interval = moments.map(|m| m.interval(s.level));
            let has_strata = t.n_strata > 0;
            let values = [
                moments.map(|m| m.mean),
                interval.map(|i| i.0),
                interval.map(|i| i.1),
                has_strata.then(|| t.events / t.exposure * s.per),
                has_strata.then_some(t.events),
                has_strata.then_some(t.exposure),
                moments.map(|m| m.variance.sqrt()),
                moments.map(|m| m.shift_mean),
                moments.map(|m| m.shift_variance),
                has_strata.then_some(t.weight),
                Some(s.per),
                Some(s.level),
            ];
            for (col, v) in num.iter_mut().zip(values) {
                col.push(v);
            }
            strata.push(Some(t.n_strata));
            skipped.push(Some(g.skipped));
            invalid.push(Some(g.invalid));
            method.push(Some(s.method.name().to_string()));
            status.push(Some(if !has_strata {
                "no strata (every row was NULL or skipped as invalid)".to_string()
            } else if moments.is_none() {
                "no standard weight (every stratum's standard_weight is 0; the rate is undefined)".to_string()
            } else {
                "ok".to_string()
            }));
        }
        let mut num = num.into_iter().map(Column::Float);
        let mut next = || num.next().expect("twelve number columns");
        build_struct(vec![
            ("rate", next()),
            ("low", next()),
            ("high", next()),
            ("crude_rate", next()),
            ("events", next()),
            ("exposure", next()),
            ("n_strata", Column::Count(strata)),
            ("method", Column::Text(method)),
            ("std_error", next()),
            ("shift_mean", next()),
            ("shift_variance", next()),
            ("weight_total", next()),
            ("per", next()),
            ("level", next()),
            ("n_skipped", Column::Count(skipped)),
            ("n_invalid", Column::Count(invalid)),
            ("status", Column::Text(status)),
        ])
    }
}
