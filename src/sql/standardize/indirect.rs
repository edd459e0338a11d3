//! `standardized_ratio(events, exposure, reference_rate [, 'options'])` and
//! `standardized_ratio(events, expected [, 'options'])`: observed over expected per group
//! (SMR/SIR), with the exact (Garwood) interval and the exact two-sided p-value of ratio 1
//! (formulas in `glm::standardize`). With three numeric arguments each row's expected count is
//! exposure x reference_rate; with two it is given (for example by `fit_expected`).
//!
//! Result fields, in order: `observed, expected, ratio, low, high, p_value, method`, then
//! `level`, `n_rows`, `n_skipped`, `n_invalid`, `status`.

use datafusion::arrow::array::StructArray;
use datafusion::arrow::datatypes::DataType;

use super::settings::StandardizeSettings;
use super::tally::{Column, Group, Tally, build_struct, struct_type};
use crate::glm::standardize::indirect_ratio;

const HINT: &str = "(add 'invalid=skip' to the options to skip and count such rows)";

/// Observed and expected totals of one group.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct ObservedExpected {
    pub rows: u64,
    pub observed: f64,
    pub expected: f64,
}

pub fn fields() -> Vec<(&'static str, DataType)> {
    use DataType::{Float64 as F, UInt64 as U, Utf8 as S};
    vec![
        ("observed", F),
        ("expected", F),
        ("ratio", F),
        ("low", F),
        ("high", F),
        ("p_value", F),
        ("method", S),
        ("level", F),
        ("n_rows", U),
        ("n_skipped", U),
        ("n_invalid", U),
        ("status", S),
    ]
}

impl Tally for ObservedExpected {
    const STATE: &'static [&'static str] = &["n_rows", "observed", "expected"];

    fn empty() -> Self {
        ObservedExpected::default()
    }

    fn problem(v: &[f64]) -> Option<String> {
        let f = "standardized_ratio";
        let x = v[0];
        if !(x.is_finite() && x >= 0.0) {
            return Some(format!("{f}: events value {x} must be finite and >= 0 {HINT}"));
        }
        if let [_, n, r] = v {
            if !(n.is_finite() && *n > 0.0) {
                return Some(format!("{f}: exposure value {n} must be finite and > 0 {HINT}"));
            }
            if !(r.is_finite() && *r >= 0.0) {
                return Some(format!("{f}: reference_rate value {r} must be finite and >= 0 {HINT}"));
            }
        } else if !(v[1].is_finite() && v[1] >= 0.0) {
            return Some(format!("{f}: expected value {} must be finite and >= 0 {HINT}", v[1]));
        }
        None
    }

    fn add(&mut self, v: &[f64]) {
        self.rows += 1;
        self.observed += v[0];
        self.expected += if let [_, n, r] = v { n * r } else { v[1] };
    }

    fn merge(&mut self, o: &Self) {
        self.rows += o.rows;
        self.observed += o.observed;
        self.expected += o.expected;
    }

    fn write_state(&self, out: &mut Vec<f64>) {
        out.extend([self.rows as f64, self.observed, self.expected]);
    }

    fn read_state(v: &[f64]) -> Self {
        ObservedExpected {
            rows: v[0] as u64,
            observed: v[1],
            expected: v[2],
        }
    }

    fn result_type() -> DataType {
        struct_type(&fields())
    }

    fn results(groups: &[Group<Self>], s: &StandardizeSettings) -> StructArray {
        let n = groups.len();
        let mut num: Vec<Vec<Option<f64>>> = vec![Vec::with_capacity(n); 7];
        let (mut rows, mut skipped, mut invalid) = (Vec::new(), Vec::new(), Vec::new());
        let (mut method, mut status) = (Vec::new(), Vec::new());
        for g in groups {
            let t = &g.tally;
            let has_rows = t.rows > 0;
            let r = (has_rows && t.expected > 0.0).then(|| indirect_ratio(t.observed, t.expected, s.level));
            let values = [
                has_rows.then_some(t.observed),
                has_rows.then_some(t.expected),
                r.map(|r| r.ratio),
                r.map(|r| r.low),
                r.map(|r| r.high),
                r.and_then(|r| r.p_value),
                Some(s.level),
            ];
            for (col, v) in num.iter_mut().zip(values) {
                col.push(v);
            }
            rows.push(Some(t.rows));
            skipped.push(Some(g.skipped));
            invalid.push(Some(g.invalid));
            method.push(Some("garwood".to_string()));
            status.push(Some(if !has_rows {
                "no rows (every row was NULL or skipped as invalid)".to_string()
            } else if t.expected <= 0.0 {
                format!(
                    "no expected events (expected is 0 with {} observed; the ratio is undefined)",
                    t.observed
                )
            } else if t.observed.fract() != 0.0 {
                format!(
                    "ok; p_value not reported (observed {} is not a whole number; the interval uses the gamma form of the Garwood limits)",
                    t.observed
                )
            } else {
                "ok".to_string()
            }));
        }
        let mut num = num.into_iter().map(Column::Float);
        let mut next = || num.next().expect("seven number columns");
        build_struct(vec![
            ("observed", next()),
            ("expected", next()),
            ("ratio", next()),
            ("low", next()),
            ("high", next()),
            ("p_value", next()),
            ("method", Column::Text(method)),
            ("level", next()),
            ("n_rows", Column::Count(rows)),
            ("n_skipped", Column::Count(skipped)),
            ("n_invalid", Column::Count(invalid)),
            ("status", Column::Text(status)),
        ])
    }
}
