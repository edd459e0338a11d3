//! Row buffers of all groups of one fit aggregate, and their Arrow state encoding.
//!
//! Rows of every group live in shared flat columns with a group index per row (no per-group
//! allocation while rows arrive); factor values are interned in one dictionary per predictor.
//! At evaluation the rows are bucketed by group with a counting sort and each group's rows are
//! put in a canonical order (by their values) so that results do not depend on the order in
//! which partitions were merged.
//!
//! The aggregate state is plain Arrow: one `List` per column (Float64 for the response,
//! exposure and numeric predictors, Utf8 for factors) plus `UInt64` counts of skipped (NULL)
//! and invalid rows. A NULL inside a list (as produced by `convert_to_state`) counts as a
//! skipped row when merged.

use std::collections::HashMap;
use std::sync::Arc;

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, BooleanArray, Float64Array, ListArray, StringArray, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Field, FieldRef, Float64Type};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::EmitTo;

use super::options::InvalidRows;
use super::spec::{FitKind, FitSpec};

/// Interned factor labels.
#[derive(Debug, Default, Clone)]
pub struct Dictionary {
    codes: HashMap<String, u32>,
    pub labels: Vec<String>,
}

impl Dictionary {
    fn intern(&mut self, label: &str) -> u32 {
        if let Some(&c) = self.codes.get(label) {
            return c;
        }
        let c = self.labels.len() as u32;
        self.labels.push(label.to_string());
        self.codes.insert(label.to_string(), c);
        c
    }

    fn bytes(&self) -> usize {
        self.labels.iter().map(|l| 2 * l.len() + 48).sum()
    }
}

/// One buffered predictor column.
#[derive(Debug, Clone)]
pub enum Column {
    Numeric(Vec<f64>),
    Factor { codes: Vec<u32>, dictionary: Dictionary },
}

/// The buffered rows of all groups.
#[derive(Debug, Clone)]
pub struct GroupRows {
    pub kind: FitKind,
    pub spec: FitSpec,
    pub group: Vec<u32>,
    pub y: Vec<f64>,
    /// Exposure per row (1 for count-only and linear fits).
    pub exposure: Vec<f64>,
    pub columns: Vec<Column>,
    pub skipped: Vec<u64>,
    pub invalid: Vec<u64>,
}

/// Input arrays of one batch, cast to the buffer's types.
struct Inputs {
    y: Float64Array,
    exposure: Option<Float64Array>,
    predictors: Vec<Input>,
}

enum Input {
    Numeric(Float64Array),
    Factor(StringArray),
}

impl GroupRows {
    pub fn new(kind: FitKind, spec: FitSpec) -> Self {
        let columns = spec
            .predictors
            .iter()
            .map(|p| {
                if p.factor {
                    Column::Factor {
                        codes: Vec::new(),
                        dictionary: Dictionary::default(),
                    }
                } else {
                    Column::Numeric(Vec::new())
                }
            })
            .collect();
        GroupRows {
            kind,
            spec,
            group: Vec::new(),
            y: Vec::new(),
            exposure: Vec::new(),
            columns,
            skipped: Vec::new(),
            invalid: Vec::new(),
        }
    }

    pub fn num_groups(&self) -> usize {
        self.skipped.len()
    }

    pub fn ensure_groups(&mut self, n: usize) {
        if self.skipped.len() < n {
            self.skipped.resize(n, 0);
            self.invalid.resize(n, 0);
        }
    }

    /// Approximate heap bytes held.
    pub fn size(&self) -> usize {
        let cols: usize = self
            .columns
            .iter()
            .map(|c| match c {
                Column::Numeric(v) => v.capacity() * 8,
                Column::Factor { codes, dictionary } => codes.capacity() * 4 + dictionary.bytes(),
            })
            .sum();
        self.group.capacity() * 4
            + (self.y.capacity() + self.exposure.capacity()) * 8
            + (self.skipped.capacity() + self.invalid.capacity()) * 8
            + cols
    }

    fn inputs(&self, values: &[ArrayRef]) -> Result<Inputs> {
        let lead = self.kind.leading();
        let need = lead + self.columns.len();
        if values.len() < need {
            return Err(DataFusionError::Internal(format!(
                "{}: expected {need} input columns, got {}",
                self.kind.sql_name(),
                values.len()
            )));
        }
        let f64s = |a: &ArrayRef| -> Result<Float64Array> {
            Ok(cast(a, &DataType::Float64)?.as_primitive::<Float64Type>().clone())
        };
        let y = f64s(&values[0])?;
        let exposure = if self.kind == FitKind::PoissonRate {
            Some(f64s(&values[1])?)
        } else {
            None
        };
        let predictors = self
            .columns
            .iter()
            .zip(&values[lead..need])
            .map(|(c, a)| {
                Ok(match c {
                    Column::Numeric(_) => Input::Numeric(f64s(a)?),
                    Column::Factor { .. } => Input::Factor(cast(a, &DataType::Utf8)?.as_string::<i32>().clone()),
                })
            })
            .collect::<Result<Vec<_>>>()?;
        Ok(Inputs {
            y,
            exposure,
            predictors,
        })
    }

    /// Adds input rows; `group_indices[i]` is the group of row i.
    pub fn update(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        filter: Option<&BooleanArray>,
        total_groups: usize,
    ) -> Result<()> {
        self.ensure_groups(total_groups);
        let inputs = self.inputs(values)?;
        for (row, &g) in group_indices.iter().enumerate() {
            if filter.is_some_and(|f| !f.is_valid(row) || !f.value(row)) {
                continue;
            }
            self.push_row(&inputs, row, g)?;
        }
        Ok(())
    }

    fn push_row(&mut self, inputs: &Inputs, row: usize, g: usize) -> Result<()> {
        let any_null = inputs.y.is_null(row)
            || inputs.exposure.as_ref().is_some_and(|e| e.is_null(row))
            || inputs.predictors.iter().any(|p| match p {
                Input::Numeric(a) => a.is_null(row),
                Input::Factor(a) => a.is_null(row),
            });
        if any_null {
            self.skipped[g] += 1;
            return Ok(());
        }
        let y = inputs.y.value(row);
        let e = inputs.exposure.as_ref().map_or(1.0, |a| a.value(row));
        if let Some(problem) = self.check_row(y, e, inputs, row) {
            match self.spec.settings.invalid {
                InvalidRows::Skip => {
                    self.invalid[g] += 1;
                    return Ok(());
                }
                InvalidRows::Error => return Err(DataFusionError::Execution(problem)),
            }
        }
        self.group.push(g as u32);
        self.y.push(y);
        self.exposure.push(e);
        for (c, p) in self.columns.iter_mut().zip(&inputs.predictors) {
            match (c, p) {
                (Column::Numeric(v), Input::Numeric(a)) => v.push(a.value(row)),
                (Column::Factor { codes, dictionary }, Input::Factor(a)) => codes.push(dictionary.intern(a.value(row))),
                _ => unreachable!("column kinds follow the spec"),
            }
        }
        Ok(())
    }

    /// Why a row is invalid, as a message naming the function, the argument and the value.
    fn check_row(&self, y: f64, e: f64, inputs: &Inputs, row: usize) -> Option<String> {
        let function = self.kind.sql_name();
        let hint = "(add 'invalid=skip' to the options to skip and count such rows)";
        let leading = self.kind.leading_names();
        let bad_y = match self.kind {
            FitKind::Linear => (!y.is_finite()).then_some("must be finite"),
            _ if !y.is_finite() => Some("must be finite"),
            _ if y < 0.0 => Some("must be >= 0"),
            _ => None,
        };
        if let Some(why) = bad_y {
            return Some(format!("{function}: {} value {y} {why} {hint}", leading[0]));
        }
        if self.kind == FitKind::PoissonRate && !(e.is_finite() && e > 0.0) {
            return Some(format!("{function}: exposure value {e} must be finite and > 0 {hint}"));
        }
        for (spec, p) in self.spec.predictors.iter().zip(&inputs.predictors) {
            if let Input::Numeric(a) = p {
                let v = a.value(row);
                if !v.is_finite() {
                    return Some(format!(
                        "{function}: predictor {} value {v} must be finite {hint}",
                        spec.name
                    ));
                }
            }
        }
        None
    }

    /// State field types, in order: response, exposure, predictors, skipped, invalid.
    pub fn state_fields(kind: FitKind, spec: &FitSpec, name: &str) -> Vec<FieldRef> {
        let list = |item: DataType| DataType::List(Arc::new(Field::new("item", item, true)));
        let mut fields = vec![Field::new(format!("{name}[response]"), list(DataType::Float64), true)];
        if kind == FitKind::PoissonRate {
            fields.push(Field::new(format!("{name}[exposure]"), list(DataType::Float64), true));
        }
        for (i, p) in spec.predictors.iter().enumerate() {
            let t = if p.factor { DataType::Utf8 } else { DataType::Float64 };
            fields.push(Field::new(format!("{name}[predictor {i}]"), list(t), true));
        }
        fields.push(Field::new(format!("{name}[skipped]"), DataType::UInt64, true));
        fields.push(Field::new(format!("{name}[invalid]"), DataType::UInt64, true));
        fields.into_iter().map(Arc::new).collect()
    }

    /// Merges states produced by `state` or `convert_to_state`.
    pub fn merge(&mut self, states: &[ArrayRef], group_indices: &[usize], total_groups: usize) -> Result<()> {
        self.ensure_groups(total_groups);
        let expected = self.kind.leading() + self.columns.len() + 2;
        if states.len() != expected {
            return Err(state_error(format!(
                "{} state arrays, expected {expected}",
                states.len()
            )));
        }
        let lists: Vec<&ListArray> = states[..expected - 2]
            .iter()
            .map(|a| {
                a.as_list_opt::<i32>()
                    .ok_or_else(|| state_error("a state column is not a list".into()))
            })
            .collect::<Result<_>>()?;
        let counts = |a: &ArrayRef| {
            a.as_primitive_opt::<datafusion::arrow::datatypes::UInt64Type>()
                .cloned()
                .ok_or_else(|| state_error("a count column is not UInt64".into()))
        };
        let skipped = counts(&states[expected - 2])?;
        let invalid = counts(&states[expected - 1])?;
        let n = group_indices.len();
        if lists.iter().any(|l| l.len() != n) || skipped.len() != n || invalid.len() != n {
            return Err(state_error("state arrays differ in length".into()));
        }
        let values: Vec<ArrayRef> = lists.iter().map(|l| l.values().clone()).collect();
        let inputs = self.inputs(&values)?;
        for (r, &g) in group_indices.iter().enumerate() {
            if g >= total_groups {
                return Err(state_error(format!("group index {g} out of range")));
            }
            self.skipped[g] += skipped.value(r);
            self.invalid[g] += invalid.value(r);
            let (start, end) = (lists[0].value_offsets()[r], lists[0].value_offsets()[r + 1]);
            for l in &lists[1..] {
                if (l.value_offsets()[r], l.value_offsets()[r + 1]) != (start, end) {
                    return Err(state_error("state lists of one group differ in length".into()));
                }
            }
            if start < 0 || end < start || end as usize > values[0].len() {
                return Err(state_error("state list offsets out of range".into()));
            }
            for row in start as usize..end as usize {
                self.push_row(&inputs, row, g)?;
            }
        }
        Ok(())
    }

    /// Removes the groups `emit_to` asks for and returns them as a new buffer (group indices
    /// renumbered from 0); the remaining groups are renumbered too.
    pub fn take(&mut self, emit_to: EmitTo) -> GroupRows {
        let n = match emit_to {
            EmitTo::All => self.num_groups(),
            EmitTo::First(n) => n.min(self.num_groups()),
        };
        if n == self.num_groups() {
            // Everything goes: the buffer starts afresh (codes are local to a buffer).
            return std::mem::replace(self, GroupRows::new(self.kind, self.spec.clone()));
        }
        let mut taken = GroupRows::new(self.kind, self.spec.clone());
        let mut kept = GroupRows::new(self.kind, self.spec.clone());
        taken.skipped = self.skipped[..n].to_vec();
        taken.invalid = self.invalid[..n].to_vec();
        kept.skipped = self.skipped[n..].to_vec();
        kept.invalid = self.invalid[n..].to_vec();
        // Codes are copied as they are, so both halves keep the same dictionaries.
        for part in [&mut taken, &mut kept] {
            for (dst, src) in part.columns.iter_mut().zip(&self.columns) {
                if let (Column::Factor { dictionary: d, .. }, Column::Factor { dictionary: s, .. }) = (dst, src) {
                    *d = s.clone();
                }
            }
        }
        for i in 0..self.group.len() {
            let g = self.group[i] as usize;
            let (dst, g) = if g < n { (&mut taken, g) } else { (&mut kept, g - n) };
            dst.group.push(g as u32);
            dst.y.push(self.y[i]);
            dst.exposure.push(self.exposure[i]);
            for (d, s) in dst.columns.iter_mut().zip(&self.columns) {
                match (d, s) {
                    (Column::Numeric(d), Column::Numeric(s)) => d.push(s[i]),
                    (Column::Factor { codes: d, .. }, Column::Factor { codes: s, .. }) => d.push(s[i]),
                    _ => unreachable!(),
                }
            }
        }
        *self = kept;
        taken
    }

    /// Row indices of each group, every group's rows in canonical order (sorted by value).
    pub fn rows_by_group(&self) -> Vec<Vec<usize>> {
        let groups = self.num_groups();
        let mut counts = vec![0usize; groups + 1];
        for &g in &self.group {
            counts[g as usize + 1] += 1;
        }
        for g in 0..groups {
            counts[g + 1] += counts[g];
        }
        let mut order = vec![0usize; self.group.len()];
        let mut next = counts.clone();
        for (i, &g) in self.group.iter().enumerate() {
            order[next[g as usize]] = i;
            next[g as usize] += 1;
        }
        (0..groups)
            .map(|g| {
                let mut rows = order[counts[g]..counts[g + 1]].to_vec();
                rows.sort_by(|&a, &b| self.compare_rows(a, b));
                rows
            })
            .collect()
    }

    fn compare_rows(&self, a: usize, b: usize) -> std::cmp::Ordering {
        self.y[a]
            .total_cmp(&self.y[b])
            .then(self.exposure[a].total_cmp(&self.exposure[b]))
            .then_with(|| {
                for c in &self.columns {
                    let o = match c {
                        Column::Numeric(v) => v[a].total_cmp(&v[b]),
                        Column::Factor { codes, dictionary } => {
                            dictionary.labels[codes[a] as usize].cmp(&dictionary.labels[codes[b] as usize])
                        }
                    };
                    if o.is_ne() {
                        return o;
                    }
                }
                std::cmp::Ordering::Equal
            })
    }

    /// The state arrays of all groups in this buffer.
    pub fn to_state(&self) -> Result<Vec<ArrayRef>> {
        let groups = self.rows_by_group();
        let mut offsets = Vec::with_capacity(groups.len() + 1);
        offsets.push(0i32);
        let mut total = 0i32;
        for rows in &groups {
            total += rows.len() as i32;
            offsets.push(total);
        }
        let order: Vec<usize> = groups.into_iter().flatten().collect();
        let offsets = OffsetBuffer::new(offsets.into());
        let list_of = |values: ArrayRef| -> ArrayRef {
            let field = Arc::new(Field::new("item", values.data_type().clone(), true));
            Arc::new(ListArray::new(field, offsets.clone(), values, None))
        };
        let floats = |v: &[f64]| -> ArrayRef { Arc::new(Float64Array::from_iter_values(order.iter().map(|&i| v[i]))) };
        let mut out = vec![list_of(floats(&self.y))];
        if self.kind == FitKind::PoissonRate {
            out.push(list_of(floats(&self.exposure)));
        }
        for c in &self.columns {
            out.push(match c {
                Column::Numeric(v) => list_of(floats(v)),
                Column::Factor { codes, dictionary } => list_of(Arc::new(StringArray::from_iter_values(
                    order.iter().map(|&i| dictionary.labels[codes[i] as usize].as_str()),
                ))),
            });
        }
        out.push(Arc::new(UInt64Array::from(self.skipped.clone())));
        out.push(Arc::new(UInt64Array::from(self.invalid.clone())));
        Ok(out)
    }

    /// Each input row as its own state (one-element lists; filtered-out rows give empty lists,
    /// invalid rows follow the `invalid` option).
    pub fn convert_to_state(&self, values: &[ArrayRef], filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        let n = values.first().map_or(0, |a| a.len());
        let mut single = GroupRows::new(self.kind, self.spec.clone());
        let indices: Vec<usize> = (0..n).collect();
        single.update(values, &indices, filter, n)?;
        single.to_state()
    }
}

fn state_error(what: String) -> DataFusionError {
    DataFusionError::Execution(format!("malformed fit state: {what}"))
}
