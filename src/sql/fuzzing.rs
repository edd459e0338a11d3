//! Entry points for the fuzz targets in `fuzz/` and their in-suite property tests: each takes
//! arbitrary bytes and must return without panicking (errors are fine).
//!
//! The state decoder builds well-formed Arrow arrays of the state field types (lists of
//! floats or text, counts) with arbitrary lengths, values and NULLs, so it reaches the semantic
//! checks of `merge` (mismatched list lengths, NaN or negative sums, impossible counts)
//! rather than stopping at Arrow's own layout checks.

use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, Float64Builder, ListBuilder, StringBuilder, UInt64Array};
use datafusion::arrow::datatypes::DataType;

use super::buffer::GroupRows;
use super::fit_aggregate::{GroupSource, evaluate_groups};
use super::options::FitSettings;
use super::patterns::GroupPatterns;
use super::spec::{FitKind, FitSpec, PredictorSpec};

/// Reads bytes front to back; zeros once exhausted.
struct Bytes<'a>(&'a [u8]);

impl Bytes<'_> {
    fn u8(&mut self) -> u8 {
        let (first, rest) = self.0.split_first().map_or((0, &[][..]), |(f, r)| (*f, r));
        self.0 = rest;
        first
    }

    fn below(&mut self, n: u8) -> usize {
        (self.u8() % n) as usize
    }

    /// A float that is often special: 0, 1, -1, NaN, ±inf, huge, tiny, or 8 raw bytes.
    fn f64(&mut self) -> f64 {
        match self.u8() % 12 {
            0 => 0.0,
            1 => 1.0,
            2 => -1.0,
            3 => f64::NAN,
            4 => f64::INFINITY,
            5 => f64::NEG_INFINITY,
            6 => 1e300,
            7 => 1e-300,
            8 => self.u8() as f64,
            _ => f64::from_le_bytes(std::array::from_fn(|_| self.u8())),
        }
    }

    fn u64(&mut self) -> u64 {
        match self.u8() % 4 {
            0 => self.u8() as u64,
            1 => u64::MAX,
            _ => u64::from_le_bytes(std::array::from_fn(|_| self.u8())),
        }
    }
}

/// Decodes `data` into a fit call (kind, predictors), arbitrary state arrays of its state
/// types and group indices, merges them into a fresh row buffer or pattern-sum buffer, and
/// fits the merged groups. Returns true when the state was accepted (and fitted).
pub fn merge_arbitrary_state(data: &[u8]) -> bool {
    let mut b = Bytes(data);
    let kind = [FitKind::PoissonRate, FitKind::PoissonCount, FitKind::Linear][b.below(3)];
    let Ok(mut spec) = FitSpec::empty() else { return false };
    for i in 0..b.below(4) {
        spec.predictors.push(PredictorSpec {
            name: format!("p{i}"),
            factor: b.u8() % 2 == 0,
        });
    }
    let patterns = kind != FitKind::Linear && b.u8() % 2 == 0;
    let fields = if patterns {
        GroupPatterns::state_fields(&spec, "fit")
    } else {
        GroupRows::state_fields(kind, &spec, "fit")
    };
    let rows = b.below(6);
    let lens: Vec<Option<usize>> = (0..rows).map(|_| (b.u8() % 16 != 0).then(|| b.below(8))).collect();
    let sums_field = fields.len() - 3;
    let states: Vec<ArrayRef> = fields
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let per_value = if patterns && i == sums_field { 13 } else { 1 };
            arbitrary_array(f.data_type(), &lens, per_value, &mut b)
        })
        .collect();
    let total_groups = 1 + b.below(4);
    let groups: Vec<usize> = (0..rows).map(|_| b.below(total_groups as u8)).collect();
    let merged = if patterns {
        let mut buffer = GroupPatterns::new(kind, spec);
        buffer
            .merge(&states, &groups, total_groups)
            .map(|_| GroupSource::Patterns(buffer))
    } else {
        let mut buffer = GroupRows::new(kind, spec);
        buffer
            .merge(&states, &groups, total_groups)
            .map(|_| GroupSource::Rows(buffer))
    };
    match merged {
        Ok(source) => {
            let _ = evaluate_groups(&source);
            true
        }
        Err(_) => false,
    }
}

/// One state column of type `t`: row `r` holds `lens[r]` values (NULL rows for `None`), times
/// `per_value` for the pattern sums, with an occasional length off by some, so that both
/// consistent and inconsistent states are tried.
fn arbitrary_array(t: &DataType, lens: &[Option<usize>], per_value: usize, b: &mut Bytes<'_>) -> ArrayRef {
    let length = |b: &mut Bytes<'_>, len: usize| {
        if b.u8() % 16 == 0 { b.below(30) } else { len * per_value }
    };
    match t {
        DataType::List(item) if item.data_type() == &DataType::Utf8 => {
            let mut list = ListBuilder::new(StringBuilder::new());
            for len in lens {
                let Some(len) = len else {
                    list.append_null();
                    continue;
                };
                for _ in 0..length(b, *len) {
                    match b.u8() % 12 {
                        0 => list.values().append_null(),
                        k => list
                            .values()
                            .append_value(["a", "b", "", "a b", "é", "c"][k as usize % 6]),
                    }
                }
                list.append(true);
            }
            Arc::new(list.finish())
        }
        DataType::List(_) => {
            let mut list = ListBuilder::new(Float64Builder::new());
            for len in lens {
                let Some(len) = len else {
                    list.append_null();
                    continue;
                };
                for _ in 0..length(b, *len) {
                    match b.u8() % 20 {
                        0 => list.values().append_null(),
                        1..=9 => list.values().append_value(b.below(6) as f64),
                        _ => list.values().append_value(b.f64()),
                    }
                }
                list.append(true);
            }
            Arc::new(list.finish())
        }
        _ => Arc::new(
            lens.iter()
                .map(|_| (b.u8() % 8 != 0).then(|| b.u64()))
                .collect::<UInt64Array>(),
        ),
    }
}

/// Applies `data` (as text, lossily) as an options string to the default settings.
pub fn apply_arbitrary_options(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    let _ = FitSettings::builtin().apply_string(&text, "poisson_fit");
}
