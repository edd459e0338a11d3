//! Entry points for the fuzz targets in `fuzz/` and their in-suite property tests: each takes
//! arbitrary bytes and must return without panicking (errors are fine).
//!
//! The state decoder builds well-formed Arrow arrays of the state field types (lists of
//! floats or text, counts) with arbitrary lengths, values and NULLs, so it reaches the semantic
//! checks of `merge` (mismatched list lengths, NaN or negative sums, impossible counts)
//! rather than stopping at Arrow's own layout checks.

use std::sync::Arc;

use datafusion::arrow::array::{
    ArrayRef, Float64Array, Float64Builder, ListArray, StringBuilder, StructArray, UInt32Array, UInt64Array,
};
use datafusion::arrow::buffer::{NullBuffer, OffsetBuffer};
use datafusion::arrow::datatypes::DataType;

use super::evaluate::evaluate_groups;
use super::group_buffer::GroupBuffer;
use super::options::FitSettings;
use super::patterns::GroupPatterns;
use super::rows::GroupRows;
use super::spec::{BufferKind, FitKind, ModelSpec, PredictorKind, PredictorSpec};
use super::state::{Layout, STATE_VERSION, state_fields};
use crate::glm::collapse::Sums;

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
    let predictors: Vec<PredictorSpec> = (0..b.below(4))
        .map(|i| PredictorSpec {
            name: format!("p{i}"),
            kind: [PredictorKind::Factor, PredictorKind::Integer, PredictorKind::Numeric][b.below(3)],
        })
        .collect();
    let factors: Vec<bool> = predictors.iter().map(|p| p.kind.is_factor()).collect();
    let spec = Arc::new(ModelSpec::new(kind, predictors));
    let layout = match spec.buffer {
        BufferKind::Rows => Layout::Rows,
        BufferKind::Patterns => Layout::Patterns,
    };
    let fields = state_fields(kind, &factors, "fit");
    let rows = b.below(6);
    let lens: Vec<Option<usize>> = (0..rows).map(|_| (b.u8() % 16 != 0).then(|| b.below(8))).collect();
    let states: Vec<ArrayRef> = fields
        .iter()
        .map(|f| {
            let name = f.name();
            let used = match layout {
                Layout::Rows => !name.ends_with("[pattern sums]"),
                Layout::Patterns => !(name.ends_with("[response]") || name.ends_with("[exposure]")),
            };
            arbitrary_array(f.data_type(), &lens, used, layout, &mut b)
        })
        .collect();
    let total_groups = 1 + b.below(4);
    let groups: Vec<usize> = (0..rows).map(|_| b.below(total_groups as u8)).collect();
    match spec.buffer {
        BufferKind::Rows => merge_and_fit(GroupRows::empty(spec), &states, &groups, total_groups),
        BufferKind::Patterns => merge_and_fit(GroupPatterns::empty(spec), &states, &groups, total_groups),
    }
}

fn merge_and_fit<B: GroupBuffer>(mut buffer: B, states: &[ArrayRef], groups: &[usize], total_groups: usize) -> bool {
    match buffer.merge(states, groups, total_groups) {
        Ok(()) => {
            let _ = evaluate_groups(&mut buffer);
            true
        }
        Err(_) => false,
    }
}

/// One state column of type `t`: row `r` holds `lens[r]` elements when the layout uses the
/// column (none otherwise; NULL rows for `None`), with an occasional length off by some, so that
/// both consistent and inconsistent states are tried. The codec column mostly holds the right
/// code.
fn arbitrary_array(t: &DataType, lens: &[Option<usize>], used: bool, layout: Layout, b: &mut Bytes<'_>) -> ArrayRef {
    let length = |b: &mut Bytes<'_>, len: usize| {
        if b.u8() % 16 == 0 {
            b.below(30)
        } else if used {
            len
        } else {
            0
        }
    };
    match t {
        DataType::List(item) => {
            let sums = matches!(item.data_type(), DataType::Struct(_));
            let text = item.data_type() == &DataType::Utf8;
            let mut offsets = vec![0i32];
            let mut nulls = Vec::new();
            let mut count = 0usize;
            for len in lens {
                match len {
                    None => nulls.push(false),
                    Some(len) => {
                        count += length(b, *len);
                        nulls.push(true);
                    }
                }
                offsets.push(count as i32);
            }
            let values: ArrayRef = if sums {
                let columns: Vec<ArrayRef> = (0..Sums::NAMES.len())
                    .map(|k| {
                        Arc::new(Float64Array::from_iter_values((0..count).map(|_| match b.u8() % 4 {
                            0 if k == 0 => 1.0 + b.below(5) as f64,
                            0 => b.below(6) as f64,
                            _ => b.f64(),
                        }))) as ArrayRef
                    })
                    .collect();
                let DataType::Struct(fields) = item.data_type() else {
                    unreachable!()
                };
                Arc::new(StructArray::new(fields.clone(), columns, None))
            } else if text {
                let mut v = StringBuilder::new();
                for _ in 0..count {
                    match b.u8() % 12 {
                        0 => v.append_null(),
                        k => v.append_value(["a", "b", "", "a b", "é", "c"][k as usize % 6]),
                    }
                }
                Arc::new(v.finish())
            } else {
                let mut v = Float64Builder::new();
                for _ in 0..count {
                    match b.u8() % 20 {
                        0 => v.append_null(),
                        1..=9 => v.append_value(b.below(6) as f64),
                        _ => v.append_value(b.f64()),
                    }
                }
                Arc::new(v.finish())
            };
            Arc::new(ListArray::new(
                item.clone(),
                OffsetBuffer::new(offsets.into()),
                values,
                Some(NullBuffer::from(nulls)),
            ))
        }
        DataType::UInt32 => {
            let right = ((STATE_VERSION << 8) | layout as u32) as u64;
            Arc::new(UInt32Array::from_iter_values(
                lens.iter()
                    .map(|_| (if b.u8() % 8 == 0 { b.u64() } else { right }) as u32),
            ))
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
