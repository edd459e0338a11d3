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

use std::sync::Arc;

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, BooleanArray, Float64Array, ListArray, StringArray, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::datatypes::{DataType, Field, FieldRef};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::EmitTo;

use super::batch::{BatchColumn, BatchInputs, Dictionary, add_count, passes, state_error};
use super::options::InvalidRows;
use super::spec::{FitKind, FitSpec};

/// One buffered predictor column (factor codes index the predictor's dictionary).
#[derive(Debug, Clone)]
pub enum Column {
    Numeric(Vec<f64>),
    Factor(Vec<u32>),
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
    /// One per predictor (empty for numeric ones).
    pub dictionaries: Vec<Dictionary>,
    pub skipped: Vec<u64>,
    pub invalid: Vec<u64>,
}

impl GroupRows {
    pub fn new(kind: FitKind, spec: FitSpec) -> Self {
        let columns = spec
            .predictors
            .iter()
            .map(|p| {
                if p.factor {
                    Column::Factor(Vec::new())
                } else {
                    Column::Numeric(Vec::new())
                }
            })
            .collect();
        GroupRows {
            kind,
            dictionaries: vec![Dictionary::default(); spec.predictors.len()],
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
                Column::Factor(codes) => codes.capacity() * 4,
            })
            .sum();
        let dictionaries: usize = self.dictionaries.iter().map(Dictionary::bytes).sum();
        self.group.capacity() * 4
            + (self.y.capacity() + self.exposure.capacity()) * 8
            + (self.skipped.capacity() + self.invalid.capacity()) * 8
            + cols
            + dictionaries
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
        let inputs = BatchInputs::new(self.kind, &self.spec, values, &mut self.dictionaries)?;
        self.push_decoded(&inputs, group_indices, filter)
    }

    /// Adds decoded rows: in bulk when the batch holds no NULL and no invalid value, else row
    /// by row (NULL rows are counted as skipped, invalid ones follow the `invalid` option).
    fn push_decoded(
        &mut self,
        inputs: &BatchInputs,
        group_indices: &[usize],
        filter: Option<&BooleanArray>,
    ) -> Result<()> {
        if filter.is_none() && inputs.no_nulls() && inputs.all_valid(self.kind) {
            self.push_all(inputs, group_indices);
            return Ok(());
        }
        for (row, &g) in group_indices.iter().enumerate() {
            if passes(filter, row) {
                self.push_row(inputs, row, g)?;
            }
        }
        Ok(())
    }

    /// Appends every row of a batch known to hold no NULL and no invalid value.
    fn push_all(&mut self, inputs: &BatchInputs, group_indices: &[usize]) {
        self.group.extend(group_indices.iter().map(|&g| g as u32));
        self.y.extend_from_slice(inputs.y.values());
        match &inputs.exposure {
            Some(e) => self.exposure.extend_from_slice(e.values()),
            None => self.exposure.resize(self.exposure.len() + inputs.len(), 1.0),
        }
        for (c, p) in self.columns.iter_mut().zip(&inputs.predictors) {
            match (c, p) {
                (Column::Numeric(v), BatchColumn::Numeric(a)) => v.extend_from_slice(a.values()),
                (Column::Factor(codes), BatchColumn::Codes(c)) => codes.extend_from_slice(c),
                _ => unreachable!("column kinds follow the spec"),
            }
        }
    }

    fn push_row(&mut self, inputs: &BatchInputs, row: usize, g: usize) -> Result<()> {
        if inputs.is_null(row) {
            self.skipped[g] = self.skipped[g].saturating_add(1);
            return Ok(());
        }
        if let Some(problem) = inputs.problem(self.kind, &self.spec, row) {
            match self.spec.settings.invalid {
                InvalidRows::Skip => {
                    self.invalid[g] = self.invalid[g].saturating_add(1);
                    return Ok(());
                }
                InvalidRows::Error => return Err(DataFusionError::Execution(problem)),
            }
        }
        self.group.push(g as u32);
        self.y.push(inputs.y.value(row));
        self.exposure.push(inputs.exposure_at(row));
        for (c, p) in self.columns.iter_mut().zip(&inputs.predictors) {
            match (c, p) {
                (Column::Numeric(v), BatchColumn::Numeric(a)) => v.push(a.value(row)),
                (Column::Factor(codes), BatchColumn::Codes(c)) => codes.push(c[row]),
                _ => unreachable!("column kinds follow the spec"),
            }
        }
        Ok(())
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
        // Offsets are checked first; then the referenced elements (one contiguous range of
        // each list's values) are added like input rows, each with its state row's group.
        let offsets = lists[0].value_offsets();
        let mut element_groups = Vec::new();
        for (r, &g) in group_indices.iter().enumerate() {
            if g >= total_groups {
                return Err(state_error(format!("group index {g} out of range")));
            }
            add_count(&mut self.skipped[g], skipped.value(r))?;
            add_count(&mut self.invalid[g], invalid.value(r))?;
            let (start, end) = (offsets[r], offsets[r + 1]);
            for l in &lists[1..] {
                if (l.value_offsets()[r], l.value_offsets()[r + 1]) != (start, end) {
                    return Err(state_error("state lists of one group differ in length".into()));
                }
            }
            if start < 0 || end < start || lists.iter().any(|l| end as usize > l.values().len()) {
                return Err(state_error("state list offsets out of range".into()));
            }
            element_groups.extend(std::iter::repeat_n(g, (end - start) as usize));
        }
        if element_groups.is_empty() {
            return Ok(());
        }
        let first = offsets[0] as usize;
        let values: Vec<ArrayRef> = lists
            .iter()
            .map(|l| l.values().slice(first, element_groups.len()))
            .collect();
        let inputs = BatchInputs::new(self.kind, &self.spec, &values, &mut self.dictionaries)?;
        self.push_decoded(&inputs, &element_groups, None)
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
        taken.dictionaries = self.dictionaries.clone();
        kept.dictionaries = self.dictionaries.clone();
        for i in 0..self.group.len() {
            let g = self.group[i] as usize;
            let (dst, g) = if g < n { (&mut taken, g) } else { (&mut kept, g - n) };
            dst.group.push(g as u32);
            dst.y.push(self.y[i]);
            dst.exposure.push(self.exposure[i]);
            for (d, s) in dst.columns.iter_mut().zip(&self.columns) {
                match (d, s) {
                    (Column::Numeric(d), Column::Numeric(s)) => d.push(s[i]),
                    (Column::Factor(d), Column::Factor(s)) => d.push(s[i]),
                    _ => unreachable!(),
                }
            }
        }
        *self = kept;
        taken
    }

    /// Row indices of each group, in arrival order: `order[offsets[g]..offsets[g + 1]]` are
    /// group g's rows (a counting sort).
    pub fn buckets(&self) -> (Vec<usize>, Vec<usize>) {
        let counts = self.group_offsets();
        let mut order = vec![0usize; self.group.len()];
        let mut next = counts.clone();
        for (i, &g) in self.group.iter().enumerate() {
            order[next[g as usize]] = i;
            next[g as usize] += 1;
        }
        (counts, order)
    }

    /// Where each group starts when rows are laid out group by group: group g holds positions
    /// `offsets[g]..offsets[g + 1]`.
    fn group_offsets(&self) -> Vec<usize> {
        let groups = self.num_groups();
        let mut counts = vec![0usize; groups + 1];
        for &g in &self.group {
            counts[g as usize + 1] += 1;
        }
        for g in 0..groups {
            counts[g + 1] += counts[g];
        }
        counts
    }

    /// Puts rows in a canonical order that depends only on their values, so that fits do not
    /// depend on the order in which partitions were merged.
    ///
    /// The order is by a 64-bit hash of each row's values (factor labels hashed by their text,
    /// not by their buffer-local codes), with runs of equal hashes ordered by the values
    /// themselves. Rows with equal values are interchangeable, so the result is the same for
    /// every arrival order. Sorting plain integer keys costs a fraction of comparing rows value
    /// by value.
    /// `label_hashes` is [`GroupRows::label_hashes`].
    pub fn sort_canonically(&self, rows: &mut [usize], label_hashes: &[Vec<u64>]) {
        let mut keyed: Vec<(u64, usize)> = rows.iter().map(|&i| (self.row_hash(i, label_hashes), i)).collect();
        keyed.sort_unstable_by_key(|&(h, _)| h);
        let mut start = 0;
        while start < keyed.len() {
            let mut end = start + 1;
            while end < keyed.len() && keyed[end].0 == keyed[start].0 {
                end += 1;
            }
            if end - start > 1 {
                keyed[start..end].sort_unstable_by(|a, b| self.compare_rows(a.1, b.1));
            }
            start = end;
        }
        for (r, (_, i)) in rows.iter_mut().zip(keyed) {
            *r = i;
        }
    }

    /// A hash of every factor label, per predictor and code (empty for numeric predictors).
    pub fn label_hashes(&self) -> Vec<Vec<u64>> {
        self.dictionaries
            .iter()
            .map(|d| d.labels.iter().map(|l| hash_bytes(l.as_bytes())).collect())
            .collect()
    }

    fn row_hash(&self, i: usize, label_hashes: &[Vec<u64>]) -> u64 {
        let mut h = mix(mix(0, self.y[i].to_bits()), self.exposure[i].to_bits());
        for (c, labels) in self.columns.iter().zip(label_hashes) {
            h = mix(
                h,
                match c {
                    Column::Numeric(v) => v[i].to_bits(),
                    Column::Factor(codes) => labels[codes[i] as usize],
                },
            );
        }
        h
    }

    fn compare_rows(&self, a: usize, b: usize) -> std::cmp::Ordering {
        self.y[a]
            .total_cmp(&self.y[b])
            .then(self.exposure[a].total_cmp(&self.exposure[b]))
            .then_with(|| {
                for (c, dictionary) in self.columns.iter().zip(&self.dictionaries) {
                    let o = match c {
                        Column::Numeric(v) => v[a].total_cmp(&v[b]),
                        Column::Factor(codes) => {
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

    /// The state arrays of all groups in this buffer (rows in arrival order; the final stage
    /// sorts them).
    pub fn to_state(&self) -> Result<Vec<ArrayRef>> {
        let total = i32::try_from(self.group.len())
            .map_err(|_| state_error(format!("{} rows exceed one state batch (2^31)", self.group.len())))?;
        let counts = self.group_offsets();
        debug_assert_eq!(counts.last().copied().unwrap_or(0) as i32, total);
        // Each row's position in the group-contiguous state: columns are then scattered in one
        // sequential pass each (one write cursor per group), which is far kinder to the cache
        // than gathering rows of a group from all over the buffer.
        let mut next = counts.clone();
        let dest: Vec<u32> = self
            .group
            .iter()
            .map(|&g| {
                let d = next[g as usize];
                next[g as usize] += 1;
                d as u32
            })
            .collect();
        let offsets: Vec<i32> = counts.iter().map(|&c| c as i32).collect();
        let offsets = OffsetBuffer::new(offsets.into());
        let list_of = |values: ArrayRef| -> ArrayRef {
            let field = Arc::new(Field::new("item", values.data_type().clone(), true));
            Arc::new(ListArray::new(field, offsets.clone(), values, None))
        };
        fn scatter<T: Copy + Default>(v: &[T], dest: &[u32]) -> Vec<T> {
            let mut out = vec![T::default(); v.len()];
            for (&x, &d) in v.iter().zip(dest) {
                out[d as usize] = x;
            }
            out
        }
        let floats = |v: &[f64]| -> ArrayRef { Arc::new(Float64Array::from(scatter(v, &dest))) };
        let mut out = vec![list_of(floats(&self.y))];
        if self.kind == FitKind::PoissonRate {
            out.push(list_of(floats(&self.exposure)));
        }
        for (c, dictionary) in self.columns.iter().zip(&self.dictionaries) {
            out.push(match c {
                Column::Numeric(v) => list_of(floats(v)),
                Column::Factor(codes) => list_of(Arc::new(StringArray::from_iter_values(
                    scatter(codes, &dest)
                        .into_iter()
                        .map(|c| dictionary.labels[c as usize].as_str()),
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

/// One step of a multiplicative hash (the constant is the 64-bit golden ratio).
fn mix(h: u64, v: u64) -> u64 {
    (h.rotate_left(23) ^ v).wrapping_mul(0x9e37_79b9_7f4a_7c15)
}

fn hash_bytes(bytes: &[u8]) -> u64 {
    bytes
        .iter()
        .fold(mix(0, bytes.len() as u64), |h, &b| mix(h, u64::from(b)))
}
