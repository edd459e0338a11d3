//! One input batch of a fit aggregate, decoded once for both kinds of group buffer.
//!
//! Responses, exposures and numeric predictors are read as Float64 (integer inputs are cast,
//! exactly up to 2^53); text and boolean predictors become codes in a per-predictor
//! [`Dictionary`] owned by the buffer (strings are read in place, whatever their Arrow string
//! layout, and interned once per distinct value and batch position). Rows are then checked in
//! one place ([`BatchInputs::problem`]), so both buffers refuse the same rows with the same words.

use std::collections::HashMap;
use std::hash::BuildHasherDefault;

use datafusion::arrow::array::{Array, ArrayRef, AsArray, BooleanArray, Float64Array};
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::error::{DataFusionError, Result};
use rustc_hash::FxHasher;

use super::spec::{FitKind, FitSpec};

/// A fast hash map for short keys (factor labels, pattern keys).
pub type FastMap<K, V> = HashMap<K, V, BuildHasherDefault<FxHasher>>;

/// The code of a NULL factor value.
pub const NULL_CODE: u32 = u32::MAX;

/// Interned factor labels of one predictor.
#[derive(Debug, Default, Clone)]
pub struct Dictionary {
    codes: FastMap<String, u32>,
    pub labels: Vec<String>,
}

impl Dictionary {
    pub fn intern(&mut self, label: &str) -> u32 {
        if let Some(&c) = self.codes.get(label) {
            return c;
        }
        let c = self.labels.len() as u32;
        self.labels.push(label.to_string());
        self.codes.insert(label.to_string(), c);
        c
    }

    pub fn bytes(&self) -> usize {
        self.labels.iter().map(|l| 2 * l.len() + 48).sum()
    }
}

/// One decoded predictor column of a batch.
pub enum BatchColumn {
    Numeric(Float64Array),
    /// Dictionary codes, [`NULL_CODE`] for NULL.
    Codes(Vec<u32>),
}

/// The decoded input arrays of one batch.
pub struct BatchInputs {
    pub y: Float64Array,
    pub exposure: Option<Float64Array>,
    pub predictors: Vec<BatchColumn>,
}

fn f64s(a: &ArrayRef) -> Result<Float64Array> {
    Ok(cast(a, &DataType::Float64)?.as_primitive::<Float64Type>().clone())
}

/// Codes of a text or boolean column (labels as the text cast gives them: `true`/`false`).
fn codes(a: &ArrayRef, dictionary: &mut Dictionary) -> Result<Vec<u32>> {
    fn from_iter<'a>(it: impl Iterator<Item = Option<&'a str>>, d: &mut Dictionary) -> Vec<u32> {
        it.map(|v| v.map_or(NULL_CODE, |s| d.intern(s))).collect()
    }
    Ok(match a.data_type() {
        DataType::Utf8 => from_iter(a.as_string::<i32>().iter(), dictionary),
        DataType::LargeUtf8 => from_iter(a.as_string::<i64>().iter(), dictionary),
        DataType::Utf8View => from_iter(a.as_string_view().iter(), dictionary),
        _ => {
            let text = cast(a, &DataType::Utf8)?;
            from_iter(text.as_string::<i32>().iter(), dictionary)
        }
    })
}

impl BatchInputs {
    /// Decodes `values` (leading arguments, then one array per predictor of `spec`).
    pub fn new(kind: FitKind, spec: &FitSpec, values: &[ArrayRef], dictionaries: &mut [Dictionary]) -> Result<Self> {
        let lead = kind.leading();
        let need = lead + spec.predictors.len();
        if values.len() < need || dictionaries.len() != spec.predictors.len() {
            return Err(DataFusionError::Internal(format!(
                "{}: expected {need} input columns, got {}",
                kind.sql_name(),
                values.len()
            )));
        }
        let y = f64s(&values[0])?;
        let exposure = (kind == FitKind::PoissonRate).then(|| f64s(&values[1])).transpose()?;
        let mut predictors = Vec::with_capacity(spec.predictors.len());
        for ((p, a), d) in spec
            .predictors
            .iter()
            .zip(&values[lead..need])
            .zip(dictionaries.iter_mut())
        {
            predictors.push(if p.factor {
                BatchColumn::Codes(codes(a, d)?)
            } else {
                BatchColumn::Numeric(f64s(a)?)
            });
        }
        Ok(BatchInputs {
            y,
            exposure,
            predictors,
        })
    }

    #[allow(clippy::len_without_is_empty)]
    pub fn len(&self) -> usize {
        self.y.len()
    }

    /// True when no input of the batch has a NULL.
    pub fn no_nulls(&self) -> bool {
        self.y.null_count() == 0
            && self.exposure.as_ref().is_none_or(|e| e.null_count() == 0)
            && self.predictors.iter().all(|p| match p {
                BatchColumn::Numeric(a) => a.null_count() == 0,
                BatchColumn::Codes(c) => !c.contains(&NULL_CODE),
            })
    }

    /// True when row `row` has a NULL in any input.
    pub fn is_null(&self, row: usize) -> bool {
        self.y.is_null(row)
            || self.exposure.as_ref().is_some_and(|e| e.is_null(row))
            || self.predictors.iter().any(|p| match p {
                BatchColumn::Numeric(a) => a.is_null(row),
                BatchColumn::Codes(c) => c[row] == NULL_CODE,
            })
    }

    pub fn exposure_at(&self, row: usize) -> f64 {
        self.exposure.as_ref().map_or(1.0, |a| a.value(row))
    }

    /// Why row `row` (not NULL) is invalid, as a message naming the function, the argument and
    /// the value; None when it is valid.
    pub fn problem(&self, kind: FitKind, spec: &FitSpec, row: usize) -> Option<String> {
        let function = kind.sql_name();
        let hint = "(add 'invalid=skip' to the options to skip and count such rows)";
        let y = self.y.value(row);
        let bad_y = match kind {
            _ if !y.is_finite() => Some("must be finite"),
            FitKind::Linear => None,
            _ if y < 0.0 => Some("must be >= 0"),
            _ => None,
        };
        if let Some(why) = bad_y {
            return Some(format!(
                "{function}: {} value {y} {why} {hint}",
                kind.leading_names()[0]
            ));
        }
        let e = self.exposure_at(row);
        if kind == FitKind::PoissonRate && !(e.is_finite() && e > 0.0) {
            return Some(format!("{function}: exposure value {e} must be finite and > 0 {hint}"));
        }
        for (p, c) in spec.predictors.iter().zip(&self.predictors) {
            if let BatchColumn::Numeric(a) = c {
                let v = a.value(row);
                if !v.is_finite() {
                    return Some(format!(
                        "{function}: predictor {} value {v} must be finite {hint}",
                        p.name
                    ));
                }
            }
        }
        None
    }

    /// True when every row is valid (checked column by column, without building messages).
    pub fn all_valid(&self, kind: FitKind) -> bool {
        let y = self.y.values();
        let y_ok = match kind {
            FitKind::Linear => y.iter().all(|v| v.is_finite()),
            _ => y.iter().all(|&v| v.is_finite() && v >= 0.0),
        };
        let e_ok = self
            .exposure
            .as_ref()
            .is_none_or(|e| e.values().iter().all(|&v| v.is_finite() && v > 0.0));
        y_ok && e_ok
            && self.predictors.iter().all(|p| match p {
                BatchColumn::Numeric(a) => a.values().iter().all(|v| v.is_finite()),
                BatchColumn::Codes(_) => true,
            })
    }
}

/// True when row `row` passes the aggregate's FILTER clause.
pub fn passes(filter: Option<&BooleanArray>, row: usize) -> bool {
    filter.is_none_or(|f| f.is_valid(row) && f.value(row))
}

/// An error for a state array that our own `state`/`convert_to_state` could not have written.
pub fn state_error(what: String) -> DataFusionError {
    DataFusionError::Execution(format!("malformed fit state: {what}"))
}

/// Adds a row count read from a state; counts beyond 2^53 rows cannot come from real data.
pub fn add_count(total: &mut u64, more: u64) -> Result<()> {
    const MAX_ROWS: u64 = 1 << 53;
    match total.checked_add(more).filter(|&t| t <= MAX_ROWS) {
        Some(t) => {
            *total = t;
            Ok(())
        }
        None => Err(state_error(format!("a row count ({more}) is impossibly large"))),
    }
}
