//! The aggregate state of a fit: one versioned layout with named fields for both group buffers.
//!
//! A state row holds one group's partial data. Its fields, in order (`fit` is the aggregate's
//! name in the plan):
//!
//! | field | type | holds |
//! |---|---|---|
//! | `fit[codec]` | UInt32 | `STATE_VERSION << 8 \| layout` (0 rows, 1 pattern sums) |
//! | `fit[response]` | List<Float64> | rows layout: each row's response |
//! | `fit[exposure]` | List<Float64> | rows layout: each row's exposure (only `poisson_fit`) |
//! | `fit[predictor k]` | List<Float64 or Utf8> | each row's (or pattern's) value of predictor k |
//! | `fit[pattern sums]` | List<Struct> | pattern layout: the named sums of each pattern ([`Sums::NAMES`]) |
//! | `fit[skipped]`, `fit[invalid]` | UInt64 | rows left out |
//!
//! The fields do not depend on which buffer wrote them (only on the function and on which
//! predictors are factors, which the state types can see), so partial and final aggregation,
//! spilling and another process agree on the schema; the lists a layout does not use are
//! empty. A state of another version or layout is refused with a message that says so, never
//! misread.

use std::sync::Arc;

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, Float64Array, ListArray, StructArray, UInt32Array, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::datatypes::{DataType, Field, FieldRef, Fields, Float64Type, UInt32Type, UInt64Type};
use datafusion::error::Result;

use super::decode::state_error;
use super::spec::FitKind;
use crate::glm::collapse::Sums;

/// The state layout version this build writes and reads.
pub const STATE_VERSION: u32 = 1;

/// Which buffer wrote a state row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    Rows = 0,
    Patterns = 1,
}

impl Layout {
    fn code(self) -> u32 {
        (STATE_VERSION << 8) | self as u32
    }

    fn describe(self) -> &'static str {
        match self {
            Layout::Rows => "rows",
            Layout::Patterns => "pattern sums",
        }
    }
}

fn list_of(item: DataType) -> DataType {
    DataType::List(Arc::new(Field::new("item", item, true)))
}

fn sums_fields() -> Fields {
    Sums::NAMES
        .iter()
        .map(|n| Field::new(*n, DataType::Float64, false))
        .collect()
}

/// The state fields of a fit of `kind` whose predictors are factors where `factors` says so.
pub fn state_fields(kind: FitKind, factors: &[bool], name: &str) -> Vec<FieldRef> {
    let field = |suffix: &str, t: DataType| Arc::new(Field::new(format!("{name}[{suffix}]"), t, true));
    let mut fields = vec![
        field("codec", DataType::UInt32),
        field("response", list_of(DataType::Float64)),
    ];
    if kind.has_exposure() {
        fields.push(field("exposure", list_of(DataType::Float64)));
    }
    for (i, &factor) in factors.iter().enumerate() {
        let t = if factor { DataType::Utf8 } else { DataType::Float64 };
        fields.push(field(&format!("predictor {i}"), list_of(t)));
    }
    fields.push(field("pattern sums", list_of(DataType::Struct(sums_fields()))));
    fields.push(field("skipped", DataType::UInt64));
    fields.push(field("invalid", DataType::UInt64));
    fields
}

/// The content of a state batch, laid out group after group: group g's elements (rows or
/// patterns) are `offsets[g]..offsets[g + 1]` of every element column.
pub struct StateContent<'a> {
    pub layout: Layout,
    pub offsets: Vec<i32>,
    /// Rows layout: one response (and exposure) per element; empty for patterns.
    pub response: Vec<f64>,
    pub exposure: Vec<f64>,
    /// One array per predictor, one value per element.
    pub predictors: Vec<ArrayRef>,
    /// Pattern layout: the sums of each element; empty for rows.
    pub sums: Vec<Sums>,
    pub skipped: &'a [u64],
    pub invalid: &'a [u64],
}

/// Encodes `content` for a fit of `kind` (see the module doc for the fields).
pub fn encode(kind: FitKind, content: StateContent<'_>) -> Result<Vec<ArrayRef>> {
    let groups = content.offsets.len().saturating_sub(1);
    let used = OffsetBuffer::new(content.offsets.into());
    let unused = OffsetBuffer::<i32>::new_zeroed(groups);
    let (rows, patterns) = match content.layout {
        Layout::Rows => (used.clone(), unused),
        Layout::Patterns => (unused, used.clone()),
    };
    let list = |offsets: &OffsetBuffer<i32>, values: ArrayRef| -> ArrayRef {
        let field = Arc::new(Field::new("item", values.data_type().clone(), true));
        Arc::new(ListArray::new(field, offsets.clone(), values, None))
    };
    let mut out: Vec<ArrayRef> = vec![
        Arc::new(UInt32Array::from(vec![content.layout.code(); groups])),
        list(&rows, Arc::new(Float64Array::from(content.response))),
    ];
    if kind.has_exposure() {
        out.push(list(&rows, Arc::new(Float64Array::from(content.exposure))));
    }
    for values in content.predictors {
        out.push(list(&used, values));
    }
    let mut values: Vec<Vec<f64>> = (0..Sums::NAMES.len())
        .map(|_| Vec::with_capacity(content.sums.len()))
        .collect();
    for s in &content.sums {
        for (column, v) in values.iter_mut().zip(s.to_array()) {
            column.push(v);
        }
    }
    let columns: Vec<ArrayRef> = values
        .into_iter()
        .map(|v| Arc::new(Float64Array::from(v)) as ArrayRef)
        .collect();
    out.push(list(
        &patterns,
        Arc::new(StructArray::new(sums_fields(), columns, None)),
    ));
    out.push(Arc::new(UInt64Array::from(content.skipped.to_vec())));
    out.push(Arc::new(UInt64Array::from(content.invalid.to_vec())));
    Ok(out)
}

/// A state batch, checked: every row of this build's version and of the expected layout, the
/// element lists of one row of equal length, offsets in range.
pub struct DecodedState {
    /// Element offsets per state row (relative to the element columns below).
    pub offsets: Vec<usize>,
    /// Rows layout: response and exposure values of the elements (exposure None without one).
    pub response: Option<ArrayRef>,
    pub exposure: Option<ArrayRef>,
    /// One array per predictor, one value per element.
    pub predictors: Vec<ArrayRef>,
    /// Pattern layout: the sums of each element.
    pub sums: Vec<Sums>,
    pub skipped: Vec<u64>,
    pub invalid: Vec<u64>,
}

/// Decodes state arrays written by [`encode`] for a buffer of `layout`.
pub fn decode(kind: FitKind, predictors: usize, layout: Layout, states: &[ArrayRef]) -> Result<DecodedState> {
    let lead = 1 + usize::from(kind.has_exposure());
    let expected = 1 + lead + predictors + 3;
    if states.len() != expected {
        return Err(state_error(format!(
            "{} state arrays, expected {expected}",
            states.len()
        )));
    }
    let codes = states[0]
        .as_primitive_opt::<UInt32Type>()
        .ok_or_else(|| state_error("the codec column is not UInt32".into()))?;
    let n = codes.len();
    for r in 0..n {
        let code = if codes.is_null(r) { 0 } else { codes.value(r) };
        if code >> 8 != STATE_VERSION {
            return Err(state_error(format!(
                "state layout version {} (written by a different ratesheet build); this build reads version {STATE_VERSION}",
                code >> 8
            )));
        }
        if code != layout.code() {
            let other = if layout == Layout::Rows {
                Layout::Patterns
            } else {
                Layout::Rows
            };
            let found = if code == other.code() {
                other.describe()
            } else {
                "an unknown layout"
            };
            return Err(state_error(format!(
                "a state of {found} reached a buffer of {}",
                layout.describe()
            )));
        }
    }
    let as_list = |a: &ArrayRef| -> Result<ListArray> {
        a.as_list_opt::<i32>()
            .cloned()
            .ok_or_else(|| state_error("a state column is not a list".into()))
    };
    let lists: Vec<ListArray> = states[1..1 + lead + predictors + 1]
        .iter()
        .map(as_list)
        .collect::<Result<_>>()?;
    let counts = |a: &ArrayRef| -> Result<Vec<u64>> {
        let c = a
            .as_primitive_opt::<UInt64Type>()
            .ok_or_else(|| state_error("a count column is not UInt64".into()))?;
        Ok((0..c.len())
            .map(|i| if c.is_null(i) { 0 } else { c.value(i) })
            .collect())
    };
    let skipped = counts(&states[expected - 2])?;
    let invalid = counts(&states[expected - 1])?;
    if lists.iter().any(|l| l.len() != n) || skipped.len() != n || invalid.len() != n {
        return Err(state_error("state arrays differ in length".into()));
    }
    let (leading, rest) = lists.split_at(lead);
    let (predictor_lists, sums_list) = rest.split_at(predictors);
    let sums_list = &sums_list[0];
    // The lists this layout fills share their offsets; the others are empty in every row.
    let (filled, empty): (Vec<&ListArray>, Vec<&ListArray>) = match layout {
        Layout::Rows => (leading.iter().chain(predictor_lists).collect(), vec![sums_list]),
        Layout::Patterns => (
            predictor_lists.iter().chain([sums_list]).collect(),
            leading.iter().collect(),
        ),
    };
    let Some(first) = filled.first() else {
        return Err(state_error("a state without element columns".into()));
    };
    let offsets = first.value_offsets();
    for l in &filled {
        if l.value_offsets() != offsets {
            return Err(state_error("state lists of one group differ in length".into()));
        }
        if offsets[0] < 0 || offsets.windows(2).any(|w| w[1] < w[0]) || offsets[n] as usize > l.values().len() {
            return Err(state_error("state list offsets out of range".into()));
        }
    }
    for l in &empty {
        if l.value_offsets().windows(2).any(|w| w[1] != w[0]) {
            return Err(state_error(format!(
                "a list that a state of {} leaves empty holds values",
                layout.describe()
            )));
        }
    }
    let start = offsets[0] as usize;
    let len = offsets[n] as usize - start;
    let values = |l: &ListArray| l.values().slice(start, len);
    let rows = layout == Layout::Rows;
    let sums = if rows {
        Vec::new()
    } else {
        decode_sums(&values(sums_list))?
    };
    Ok(DecodedState {
        offsets: offsets.iter().map(|&o| o as usize - start).collect(),
        response: rows.then(|| values(&leading[0])),
        exposure: (rows && kind.has_exposure()).then(|| values(&leading[1])),
        predictors: predictor_lists.iter().map(values).collect(),
        sums,
        skipped,
        invalid,
    })
}

/// Pattern sums from their struct column, read by name.
fn decode_sums(values: &ArrayRef) -> Result<Vec<Sums>> {
    let s = values
        .as_struct_opt()
        .ok_or_else(|| state_error("the pattern sums are not a struct".into()))?;
    let columns: Vec<&Float64Array> = Sums::NAMES
        .iter()
        .map(|name| {
            s.column_by_name(name)
                .and_then(|c| c.as_primitive_opt::<Float64Type>())
                .ok_or_else(|| state_error(format!("the pattern sums have no Float64 field {name}")))
        })
        .collect::<Result<_>>()?;
    if columns.iter().any(|c| c.null_count() > 0) {
        return Err(state_error("a pattern sum is NULL".into()));
    }
    (0..s.len())
        .map(|i| {
            Sums::from_array(std::array::from_fn(|k| columns[k].value(i)))
                .ok_or_else(|| state_error("pattern sums are not valid".into()))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::array::StringArray;

    /// Two groups of rows: group 0 with two rows, group 1 with one.
    fn rows_state() -> Vec<ArrayRef> {
        encode(
            FitKind::PoissonRate,
            StateContent {
                layout: Layout::Rows,
                offsets: vec![0, 2, 3],
                response: vec![1.0, 2.0, 3.0],
                exposure: vec![10.0, 20.0, 30.0],
                predictors: vec![Arc::new(StringArray::from(vec!["a", "b", "a"]))],
                sums: Vec::new(),
                skipped: &[1, 0],
                invalid: &[0, 2],
            },
        )
        .unwrap()
    }

    #[test]
    fn a_state_decodes_to_what_was_encoded() {
        let state = decode(FitKind::PoissonRate, 1, Layout::Rows, &rows_state()).unwrap();
        assert_eq!(state.offsets, vec![0, 2, 3]);
        assert_eq!(state.skipped, vec![1, 0]);
        assert_eq!(state.invalid, vec![0, 2]);
        let y = state.response.unwrap();
        assert_eq!(y.as_primitive::<Float64Type>().values().to_vec(), vec![1.0, 2.0, 3.0]);
        assert_eq!(state.predictors[0].as_string::<i32>().value(1), "b");
    }

    #[test]
    fn the_fields_match_what_encode_writes() {
        let fields = state_fields(FitKind::PoissonRate, &[true], "fit");
        let arrays = rows_state();
        assert_eq!(fields.len(), arrays.len());
        for (f, a) in fields.iter().zip(&arrays) {
            assert_eq!(f.data_type(), a.data_type(), "{}", f.name());
        }
    }

    #[test]
    fn another_version_or_layout_is_refused_by_name() {
        let mut arrays = rows_state();
        let e = decode(FitKind::PoissonRate, 1, Layout::Patterns, &arrays)
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("a state of rows reached a buffer of pattern sums"), "{e}");
        arrays[0] = Arc::new(UInt32Array::from(vec![(STATE_VERSION + 1) << 8; 2]));
        let e = decode(FitKind::PoissonRate, 1, Layout::Rows, &arrays)
            .err()
            .unwrap()
            .to_string();
        assert!(
            e.contains(&format!("state layout version {}", STATE_VERSION + 1))
                && e.contains(&format!("this build reads version {STATE_VERSION}")),
            "{e}"
        );
    }
}
