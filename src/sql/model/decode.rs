//! One input batch of a fit aggregate, decoded once for both kinds of group buffer.
//!
//! Responses, exposures and numeric predictors are read as Float64 (integer inputs are cast,
//! exactly up to 2^53); text and boolean predictors become codes in a per-predictor
//! [`Dictionary`] owned by the buffer (strings are read in place, whatever their Arrow string
//! layout, and interned once per distinct value and batch position). Rows are then checked in
//! one place ([`BatchInputs::problem`], [`admit`]), so both buffers refuse the same rows with the
//! same words. Predictor columns alone ([`decode_predictors`]) are also how pattern values are
//! read back from a state.

use std::collections::HashMap;
use std::hash::BuildHasherDefault;

use datafusion::arrow::array::{Array, ArrayRef, AsArray, BooleanArray, Float64Array};
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Float64Type};
use datafusion::error::{DataFusionError, Result};
use rustc_hash::FxHasher;

use super::options::InvalidRows;
use super::spec::{FitKind, ModelSpec};

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
#[derive(Debug, Clone)]
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

/// Decodes predictor columns (one array per predictor of `spec`): numbers as Float64, factors
/// as codes in their dictionaries.
pub fn decode_predictors(
    spec: &ModelSpec,
    arrays: &[ArrayRef],
    dictionaries: &mut [Dictionary],
) -> Result<Vec<BatchColumn>> {
    if arrays.len() != spec.predictors.len() || dictionaries.len() != spec.predictors.len() {
        return Err(DataFusionError::Internal(format!(
            "{}: expected {} predictor columns, got {}",
            spec.kind.sql_name(),
            spec.predictors.len(),
            arrays.len()
        )));
    }
    spec.predictors
        .iter()
        .zip(arrays)
        .zip(dictionaries.iter_mut())
        .map(|((p, a), d)| {
            Ok(if p.kind.is_factor() {
                BatchColumn::Codes(codes(a, d)?)
            } else {
                BatchColumn::Numeric(f64s(a)?)
            })
        })
        .collect()
}

impl BatchInputs {
    /// Decodes `values` (leading arguments, then one array per predictor of `spec`).
    pub fn new(spec: &ModelSpec, values: &[ArrayRef], dictionaries: &mut [Dictionary]) -> Result<Self> {
        let kind = spec.kind;
        let lead = kind.leading();
        let need = lead + spec.predictors.len();
        if values.len() < need {
            return Err(DataFusionError::Internal(format!(
                "{}: expected {need} input columns, got {}",
                kind.sql_name(),
                values.len()
            )));
        }
        Ok(BatchInputs {
            y: f64s(&values[0])?,
            exposure: kind.has_exposure().then(|| f64s(&values[1])).transpose()?,
            predictors: decode_predictors(spec, &values[lead..need], dictionaries)?,
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
    pub fn problem(&self, spec: &ModelSpec, row: usize) -> Option<String> {
        let kind = spec.kind;
        let function = kind.sql_name();
        let hint = "(add 'invalid=skip' to the options to skip and count such rows)";
        let y = self.y.value(row);
        let bad_y = if !y.is_finite() {
            Some("must be finite")
        } else if kind.counts() && y < 0.0 {
            Some("must be >= 0")
        } else {
            None
        };
        if let Some(why) = bad_y {
            return Some(format!(
                "{function}: {} value {y} {why} {hint}",
                kind.leading_names()[0]
            ));
        }
        let e = self.exposure_at(row);
        if kind.has_exposure() && !(e.is_finite() && e > 0.0) {
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
        let y_ok = if kind.counts() {
            y.iter().all(|&v| v.is_finite() && v >= 0.0)
        } else {
            y.iter().all(|v| v.is_finite())
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

    /// True when every row may enter without a check: no FILTER clause, no NULL, no invalid value.
    pub fn clean(&self, spec: &ModelSpec, filter: Option<&BooleanArray>) -> bool {
        filter.is_none() && self.no_nulls() && self.all_valid(spec.kind)
    }
}

/// True when row `row` passes the aggregate's FILTER clause.
pub fn passes(filter: Option<&BooleanArray>, row: usize) -> bool {
    filter.is_none_or(|f| f.is_valid(row) && f.value(row))
}

/// The row policy of both buffers: whether row `row` (of group `g`) enters. Rows filtered out
/// are ignored, rows with a NULL counted in `skipped`, invalid rows counted in `invalid` with
/// `invalid=skip` and an error naming the value otherwise.
pub fn admit(
    inputs: &BatchInputs,
    spec: &ModelSpec,
    filter: Option<&BooleanArray>,
    row: usize,
    g: usize,
    counts: &mut GroupCounts,
) -> Result<bool> {
    if !passes(filter, row) {
        return Ok(false);
    }
    if inputs.is_null(row) {
        counts.skipped[g] = counts.skipped[g].saturating_add(1);
        return Ok(false);
    }
    if let Some(problem) = inputs.problem(spec, row) {
        return match spec.settings.invalid {
            InvalidRows::Skip => {
                counts.invalid[g] = counts.invalid[g].saturating_add(1);
                Ok(false)
            }
            InvalidRows::Error => Err(DataFusionError::Execution(problem)),
        };
    }
    Ok(true)
}

/// Rows left out of each group: with a NULL (`skipped`) or invalid and skipped (`invalid`).
#[derive(Debug, Clone, Default)]
pub struct GroupCounts {
    pub skipped: Vec<u64>,
    pub invalid: Vec<u64>,
}

impl GroupCounts {
    pub fn groups(&self) -> usize {
        self.skipped.len()
    }

    pub fn ensure(&mut self, groups: usize) {
        if self.skipped.len() < groups {
            self.skipped.resize(groups, 0);
            self.invalid.resize(groups, 0);
        }
    }

    /// Removes the first `n` groups' counts and returns them.
    pub fn split_front(&mut self, n: usize) -> GroupCounts {
        let rest = GroupCounts {
            skipped: self.skipped.split_off(n),
            invalid: self.invalid.split_off(n),
        };
        std::mem::replace(self, rest)
    }

    /// Adds a state's counts for group `g`.
    pub fn add(&mut self, g: usize, skipped: u64, invalid: u64) -> Result<()> {
        add_count(&mut self.skipped[g], skipped)?;
        add_count(&mut self.invalid[g], invalid)
    }

    pub fn bytes(&self) -> usize {
        (self.skipped.capacity() + self.invalid.capacity()) * 8
    }
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
