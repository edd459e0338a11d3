//! Group buffers of sufficient statistics: Poisson fits whose predictors are all factors or
//! integers keep, per group and covariate pattern, only the sums of [`Sums`] instead of rows.
//!
//! For such designs the Poisson likelihood depends on a pattern's rows only through their count
//! and exposure totals, and the row-level statistics (deviance, Pearson X², log-likelihood,
//! sandwich meat, overdispersion test) are sums of per-row terms that [`Sums`] keeps (see
//! `glm::collapse`). Memory is O(groups x patterns), not O(rows), and the partial-to-final state
//! is small.
//!
//! State: one `List` per predictor with the pattern values (Utf8 for factors, Float64 for
//! integers), one `List<Float64>` with the 13 sums of each pattern, and the skipped / invalid
//! counts as `UInt64`.

use std::sync::Arc;

use datafusion::arrow::array::{
    Array, ArrayRef, AsArray, BooleanArray, Float64Array, ListArray, StringArray, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::datatypes::{DataType, Field, FieldRef, Float64Type, UInt64Type};
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::EmitTo;

use super::batch::{BatchColumn, BatchInputs, Dictionary, FastMap, add_count, passes, state_error};
use super::options::InvalidRows;
use super::spec::{FitKind, FitSpec};
use crate::glm::collapse::Sums;

const SUMS: usize = 13;

/// Pattern sums of all groups.
#[derive(Debug, Clone)]
pub struct GroupPatterns {
    pub kind: FitKind,
    pub spec: FitSpec,
    pub dictionaries: Vec<Dictionary>,
    /// Distinct predictor-value tuples (a factor code, or the bits of a number, per predictor)
    /// -> tuple id. Few tuples occur however many groups there are, so the per-row lookup stays
    /// in cache and no slot owns an allocation.
    tuples: FastMap<Box<[u64]>, u32>,
    /// The values of every tuple, one per predictor, in tuple-id order.
    tuple_values: Vec<u64>,
    /// (group << 32 | tuple id) -> slot.
    slots: FastMap<u64, u32>,
    /// Group and tuple of every slot.
    slot_group: Vec<u32>,
    slot_tuple: Vec<u32>,
    pub sums: Vec<Sums>,
    pub skipped: Vec<u64>,
    pub invalid: Vec<u64>,
}

/// Key bits of a number: -0.0 and 0.0 are one pattern.
fn number_bits(v: f64) -> u64 {
    if v == 0.0 { 0 } else { v.to_bits() }
}

impl GroupPatterns {
    pub fn new(kind: FitKind, spec: FitSpec) -> Self {
        GroupPatterns {
            kind,
            dictionaries: vec![Dictionary::default(); spec.predictors.len()],
            spec,
            tuples: FastMap::default(),
            tuple_values: Vec::new(),
            slots: FastMap::default(),
            slot_group: Vec::new(),
            slot_tuple: Vec::new(),
            sums: Vec::new(),
            skipped: Vec::new(),
            invalid: Vec::new(),
        }
    }

    fn width(&self) -> usize {
        self.spec.predictors.len()
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

    pub fn size(&self) -> usize {
        self.tuple_values.capacity() * 8
            + self.tuples.capacity() * (self.width() * 8 + 40)
            + self.slots.capacity() * 16
            + (self.slot_group.capacity() + self.slot_tuple.capacity()) * 4
            + self.sums.capacity() * std::mem::size_of::<Sums>()
            + (self.skipped.capacity() + self.invalid.capacity()) * 8
            + self.dictionaries.iter().map(Dictionary::bytes).sum::<usize>()
    }

    /// The id of a predictor-value tuple, added when new.
    fn tuple(&mut self, values: &[u64]) -> u32 {
        if let Some(&t) = self.tuples.get(values) {
            return t;
        }
        let t = self.tuples.len() as u32;
        self.tuples.insert(values.into(), t);
        self.tuple_values.extend_from_slice(values);
        t
    }

    /// The slot of group `g` and tuple `t`, created empty when new.
    fn slot(&mut self, g: usize, t: u32) -> usize {
        let key = ((g as u64) << 32) | u64::from(t);
        let next = self.sums.len();
        let s = *self.slots.entry(key).or_insert(next as u32) as usize;
        if s == next {
            self.slot_group.push(g as u32);
            self.slot_tuple.push(t);
            self.sums.push(Sums::default());
        }
        s
    }

    /// The predictor values of row `row` as tuple values.
    fn values_of(inputs: &BatchInputs, row: usize, values: &mut Vec<u64>) {
        values.clear();
        for p in &inputs.predictors {
            values.push(match p {
                BatchColumn::Numeric(a) => number_bits(a.value(row)),
                BatchColumn::Codes(c) => c[row] as u64,
            });
        }
    }

    pub fn update(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        filter: Option<&BooleanArray>,
        total_groups: usize,
    ) -> Result<()> {
        self.ensure_groups(total_groups);
        let inputs = BatchInputs::new(self.kind, &self.spec, values, &mut self.dictionaries)?;
        let checked = filter.is_some() || !inputs.no_nulls() || !inputs.all_valid(self.kind);
        let mut values = Vec::with_capacity(self.width());
        for (row, &g) in group_indices.iter().enumerate() {
            if checked && !self.accept(&inputs, filter, row, g)? {
                continue;
            }
            Self::values_of(&inputs, row, &mut values);
            let t = self.tuple(&values);
            let s = self.slot(g, t);
            self.sums[s].add(inputs.y.value(row), inputs.exposure_at(row));
        }
        Ok(())
    }

    /// Whether a row enters the sums; counts skipped and invalid rows.
    fn accept(&mut self, inputs: &BatchInputs, filter: Option<&BooleanArray>, row: usize, g: usize) -> Result<bool> {
        if !passes(filter, row) {
            return Ok(false);
        }
        if inputs.is_null(row) {
            self.skipped[g] = self.skipped[g].saturating_add(1);
            return Ok(false);
        }
        if let Some(problem) = inputs.problem(self.kind, &self.spec, row) {
            return match self.spec.settings.invalid {
                InvalidRows::Skip => {
                    self.invalid[g] = self.invalid[g].saturating_add(1);
                    Ok(false)
                }
                InvalidRows::Error => Err(DataFusionError::Execution(problem)),
            };
        }
        Ok(true)
    }

    /// State field types: predictors, sums, skipped, invalid.
    pub fn state_fields(spec: &FitSpec, name: &str) -> Vec<FieldRef> {
        let list = |item: DataType| DataType::List(Arc::new(Field::new("item", item, true)));
        let mut fields = Vec::new();
        for (i, p) in spec.predictors.iter().enumerate() {
            let t = if p.factor { DataType::Utf8 } else { DataType::Float64 };
            fields.push(Field::new(format!("{name}[pattern {i}]"), list(t), true));
        }
        fields.push(Field::new(
            format!("{name}[pattern sums]"),
            list(DataType::Float64),
            true,
        ));
        fields.push(Field::new(format!("{name}[skipped]"), DataType::UInt64, true));
        fields.push(Field::new(format!("{name}[invalid]"), DataType::UInt64, true));
        fields.into_iter().map(Arc::new).collect()
    }

    /// Pattern slots of each group: `order[offsets[g]..offsets[g + 1]]`.
    pub fn buckets(&self) -> (Vec<usize>, Vec<usize>) {
        let groups = self.num_groups();
        let mut counts = vec![0usize; groups + 1];
        for &g in &self.slot_group {
            counts[g as usize + 1] += 1;
        }
        for g in 0..groups {
            counts[g + 1] += counts[g];
        }
        let mut next = counts.clone();
        let mut order = vec![0usize; self.sums.len()];
        for (s, &g) in self.slot_group.iter().enumerate() {
            let g = g as usize;
            order[next[g]] = s;
            next[g] += 1;
        }
        (counts, order)
    }

    /// Predictor `k`'s key value of slot `s`.
    pub fn value(&self, s: usize, k: usize) -> u64 {
        self.tuple_values[self.slot_tuple[s] as usize * self.width() + k]
    }

    /// Numeric value of predictor `k` in slot `s`.
    pub fn number(&self, s: usize, k: usize) -> f64 {
        f64::from_bits(self.value(s, k))
    }

    /// Puts a group's slots in canonical order (by their values), so that fits do not depend
    /// on arrival order.
    pub fn sort_canonically(&self, slots: &mut [usize]) {
        slots.sort_unstable_by(|&a, &b| {
            for (k, p) in self.spec.predictors.iter().enumerate() {
                let o = if p.factor {
                    let d = &self.dictionaries[k].labels;
                    d[self.value(a, k) as usize].cmp(&d[self.value(b, k) as usize])
                } else {
                    self.number(a, k).total_cmp(&self.number(b, k))
                };
                if o.is_ne() {
                    return o;
                }
            }
            std::cmp::Ordering::Equal
        });
    }

    pub fn to_state(&self) -> Result<Vec<ArrayRef>> {
        let (counts, order) = self.buckets();
        let offsets: Vec<i32> = counts.iter().map(|&c| c as i32).collect();
        let offsets = OffsetBuffer::new(offsets.into());
        let list_of = |offsets: OffsetBuffer<i32>, values: ArrayRef| -> ArrayRef {
            let field = Arc::new(Field::new("item", values.data_type().clone(), true));
            Arc::new(ListArray::new(field, offsets, values, None))
        };
        let mut out = Vec::new();
        for (k, p) in self.spec.predictors.iter().enumerate() {
            let values: ArrayRef = if p.factor {
                let labels = &self.dictionaries[k].labels;
                Arc::new(StringArray::from_iter_values(
                    order.iter().map(|&s| labels[self.value(s, k) as usize].as_str()),
                ))
            } else {
                Arc::new(Float64Array::from_iter_values(order.iter().map(|&s| self.number(s, k))))
            };
            out.push(list_of(offsets.clone(), values));
        }
        let sums_offsets: Vec<i32> = counts.iter().map(|&c| (c * SUMS) as i32).collect();
        let sums = Float64Array::from_iter_values(order.iter().flat_map(|&s| self.sums[s].to_array()));
        out.push(list_of(OffsetBuffer::new(sums_offsets.into()), Arc::new(sums)));
        out.push(Arc::new(UInt64Array::from(self.skipped.clone())));
        out.push(Arc::new(UInt64Array::from(self.invalid.clone())));
        Ok(out)
    }

    pub fn merge(&mut self, states: &[ArrayRef], group_indices: &[usize], total_groups: usize) -> Result<()> {
        self.ensure_groups(total_groups);
        let np = self.spec.predictors.len();
        if states.len() != np + 3 {
            return Err(state_error(format!(
                "{} state arrays, expected {}",
                states.len(),
                np + 3
            )));
        }
        let lists: Vec<&ListArray> = states[..np + 1]
            .iter()
            .map(|a| {
                a.as_list_opt::<i32>()
                    .ok_or_else(|| state_error("a state column is not a list".into()))
            })
            .collect::<Result<_>>()?;
        let counts = |a: &ArrayRef| {
            a.as_primitive_opt::<UInt64Type>()
                .cloned()
                .ok_or_else(|| state_error("a count column is not UInt64".into()))
        };
        let skipped = counts(&states[np + 1])?;
        let invalid = counts(&states[np + 2])?;
        let n = group_indices.len();
        if lists.iter().any(|l| l.len() != n) || skipped.len() != n || invalid.len() != n {
            return Err(state_error("state arrays differ in length".into()));
        }
        let sums = lists[np]
            .values()
            .as_primitive_opt::<Float64Type>()
            .ok_or_else(|| state_error("the pattern sums are not Float64".into()))?;
        let values: Vec<ArrayRef> = lists[..np].iter().map(|l| l.values().clone()).collect();
        // Decode the pattern values like input values (the response slots are unused).
        let mut leading: Vec<ArrayRef> = vec![Arc::new(Float64Array::from(vec![
            1.0;
            values.first().map_or(0, |v| v.len())
        ]))];
        if self.kind == FitKind::PoissonRate {
            leading.push(leading[0].clone());
        }
        leading.extend(values);
        let inputs = BatchInputs::new(self.kind, &self.spec, &leading, &mut self.dictionaries)?;
        let mut tuple = Vec::with_capacity(np);
        let sum_offsets = lists[np].value_offsets();
        for (r, &g) in group_indices.iter().enumerate() {
            if g >= total_groups {
                return Err(state_error(format!("group index {g} out of range")));
            }
            add_count(&mut self.skipped[g], skipped.value(r))?;
            add_count(&mut self.invalid[g], invalid.value(r))?;
            let (s0, s1) = (sum_offsets[r], sum_offsets[r + 1]);
            if s0 < 0 || s1 < s0 || s1 as usize > sums.len() || (s1 - s0) as usize % SUMS != 0 {
                return Err(state_error("pattern sums offsets out of range".into()));
            }
            let m = (s1 - s0) as usize / SUMS;
            let (start, end) = match lists.first().filter(|_| np > 0) {
                Some(l) => (l.value_offsets()[r], l.value_offsets()[r + 1]),
                None => (0, m as i32),
            };
            for l in &lists[..np] {
                if (l.value_offsets()[r], l.value_offsets()[r + 1]) != (start, end) {
                    return Err(state_error("pattern lists of one group differ in length".into()));
                }
            }
            if start < 0 || end < start || (end - start) as usize != m || (np > 0 && end as usize > inputs.len()) {
                return Err(state_error("pattern list offsets out of range".into()));
            }
            for j in 0..m {
                let row = start as usize + j;
                let at = s0 as usize + j * SUMS;
                let mut v = [0.0; SUMS];
                v.copy_from_slice(&sums.values()[at..at + SUMS]);
                let part = Sums::from_array(v).ok_or_else(|| state_error("pattern sums are not valid".into()))?;
                if np > 0 && inputs.is_null(row) {
                    return Err(state_error("a pattern value is NULL".into()));
                }
                if np > 0 && inputs.problem(self.kind, &self.spec, row).is_some() {
                    return Err(state_error("a pattern value is not finite".into()));
                }
                tuple.clear();
                if np > 0 {
                    Self::values_of(&inputs, row, &mut tuple);
                }
                let t = self.tuple(&tuple);
                let s = self.slot(g, t);
                self.sums[s].merge(&part);
            }
        }
        Ok(())
    }

    /// Each input row as its own state (one pattern per row).
    pub fn convert_to_state(&self, values: &[ArrayRef], filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        let n = values.first().map_or(0, |a| a.len());
        let mut single = GroupPatterns::new(self.kind, self.spec.clone());
        let indices: Vec<usize> = (0..n).collect();
        single.update(values, &indices, filter, n)?;
        single.to_state()
    }

    /// Removes the groups `emit_to` asks for and returns them (renumbered from 0).
    pub fn take(&mut self, emit_to: EmitTo) -> GroupPatterns {
        let n = match emit_to {
            EmitTo::All => self.num_groups(),
            EmitTo::First(n) => n.min(self.num_groups()),
        };
        if n == self.num_groups() {
            return std::mem::replace(self, GroupPatterns::new(self.kind, self.spec.clone()));
        }
        let mut taken = GroupPatterns::new(self.kind, self.spec.clone());
        let mut kept = GroupPatterns::new(self.kind, self.spec.clone());
        taken.skipped = self.skipped[..n].to_vec();
        taken.invalid = self.invalid[..n].to_vec();
        kept.skipped = self.skipped[n..].to_vec();
        kept.invalid = self.invalid[n..].to_vec();
        // Codes and tuple ids are copied as they are, so both halves keep the same tables.
        for half in [&mut taken, &mut kept] {
            half.dictionaries = self.dictionaries.clone();
            half.tuples = self.tuples.clone();
            half.tuple_values = self.tuple_values.clone();
        }
        for s in 0..self.sums.len() {
            let g = self.slot_group[s] as usize;
            let (dst, g) = if g < n { (&mut taken, g) } else { (&mut kept, g - n) };
            let slot = dst.slot(g, self.slot_tuple[s]);
            dst.sums[slot] = self.sums[s];
        }
        *self = kept;
        taken
    }
}
