//! Pattern-sum buffers: Poisson fits whose predictors are all factors or whole numbers keep,
//! per group and covariate pattern, only the sums of [`Sums`] instead of rows.
//!
//! For such designs the Poisson likelihood depends on a pattern's rows only through their count
//! and exposure totals, and the row-level statistics (deviance, Pearson X², log-likelihood,
//! sandwich meat, overdispersion test) are sums of per-row terms that [`Sums`] keeps (see
//! `glm::collapse`). Memory is O(groups x patterns), not O(rows), and the partial-to-final state
//! is small.

use std::cmp::Ordering;
use std::sync::Arc;

use datafusion::arrow::array::{Array, ArrayRef, Float64Array, StringArray};
use datafusion::error::Result;

use super::decode::{BatchColumn, BatchInputs, FastMap, decode_predictors, state_error};
use super::group_buffer::{Column, Common, GroupBuffer, GroupData, Response, label_hashes, mix};
use super::spec::ModelSpec;
use super::state::{DecodedState, Layout, StateContent};
use crate::glm::collapse::Sums;

/// Pattern sums of all groups.
#[derive(Debug, Clone)]
pub struct GroupPatterns {
    common: Common,
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
    sums: Vec<Sums>,
}

/// Key bits of a number: -0.0 and 0.0 are one pattern.
fn number_bits(v: f64) -> u64 {
    if v == 0.0 { 0 } else { v.to_bits() }
}

/// The predictor values of row `row` as tuple values.
fn tuple_of(columns: &[BatchColumn], row: usize, values: &mut Vec<u64>) {
    values.clear();
    for p in columns {
        values.push(match p {
            BatchColumn::Numeric(a) => number_bits(a.value(row)),
            BatchColumn::Codes(c) => c[row] as u64,
        });
    }
}

impl GroupPatterns {
    fn width(&self) -> usize {
        self.common.spec.predictors.len()
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

    /// Predictor `k`'s key value of slot `s`.
    fn value(&self, s: usize, k: usize) -> u64 {
        self.tuple_values[self.slot_tuple[s] as usize * self.width() + k]
    }

    /// Numeric value of predictor `k` in slot `s`.
    fn number(&self, s: usize, k: usize) -> f64 {
        f64::from_bits(self.value(s, k))
    }

    /// Each group's slots: `order[offsets[g]..offsets[g + 1]]`.
    fn buckets(&self) -> (Vec<usize>, Vec<usize>) {
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
}

impl GroupBuffer for GroupPatterns {
    const LAYOUT: Layout = Layout::Patterns;
    type HashKeys = Vec<Vec<u64>>;

    fn empty(spec: Arc<ModelSpec>) -> Self {
        GroupPatterns {
            common: Common::new(spec),
            tuples: FastMap::default(),
            tuple_values: Vec::new(),
            slots: FastMap::default(),
            slot_group: Vec::new(),
            slot_tuple: Vec::new(),
            sums: Vec::new(),
        }
    }

    fn common(&self) -> &Common {
        &self.common
    }

    fn common_mut(&mut self) -> &mut Common {
        &mut self.common
    }

    fn data_bytes(&self) -> usize {
        self.tuple_values.capacity() * 8
            + self.tuples.capacity() * (self.width() * 8 + 40)
            + self.slots.capacity() * 16
            + (self.slot_group.capacity() + self.slot_tuple.capacity()) * 4
            + self.sums.capacity() * std::mem::size_of::<Sums>()
    }

    fn push_row(&mut self, inputs: &BatchInputs, row: usize, g: usize) {
        let mut values = Vec::with_capacity(self.width());
        tuple_of(&inputs.predictors, row, &mut values);
        let t = self.tuple(&values);
        let s = self.slot(g, t);
        self.sums[s].add(inputs.y.value(row), inputs.exposure_at(row));
    }

    fn push_all(&mut self, inputs: &BatchInputs, group_indices: &[usize]) {
        let mut values = Vec::with_capacity(self.width());
        for (row, &g) in group_indices.iter().enumerate() {
            tuple_of(&inputs.predictors, row, &mut values);
            let t = self.tuple(&values);
            let s = self.slot(g, t);
            self.sums[s].add(inputs.y.value(row), inputs.exposure_at(row));
        }
    }

    /// Each state pattern's sums are added to the slot of its group and values; pattern values
    /// are read with the same decoder as input predictors and must be non-NULL and finite.
    fn merge_elements(&mut self, state: &DecodedState, groups: &[usize]) -> Result<()> {
        if state.sums.len() != groups.len() {
            return Err(state_error("pattern values and sums differ in number".into()));
        }
        let spec = self.common.spec.clone();
        let columns = decode_predictors(&spec, &state.predictors, &mut self.common.dictionaries)?;
        for (p, c) in spec.predictors.iter().zip(&columns) {
            let bad = match c {
                BatchColumn::Numeric(a) => a.null_count() > 0 || a.values().iter().any(|v| !v.is_finite()),
                BatchColumn::Codes(codes) => codes.contains(&super::decode::NULL_CODE),
            };
            if bad {
                return Err(state_error(format!(
                    "a pattern value of {} is NULL or not finite",
                    p.name
                )));
            }
        }
        let mut tuple = Vec::with_capacity(self.width());
        for (j, (&g, part)) in groups.iter().zip(&state.sums).enumerate() {
            tuple_of(&columns, j, &mut tuple);
            let t = self.tuple(&tuple);
            let s = self.slot(g, t);
            // Row counts beyond 2^53 cannot come from real data (and would overflow).
            if self.sums[s].rows().checked_add(part.rows()).is_none_or(|n| n > 1 << 53) {
                return Err(state_error("a pattern's row count is impossibly large".into()));
            }
            self.sums[s].merge(part);
        }
        Ok(())
    }

    fn split_front(&mut self, n: usize) -> Self {
        let spec = self.common.spec.clone();
        let mut taken = GroupPatterns::empty(spec.clone());
        let mut kept = GroupPatterns::empty(spec);
        kept.common.counts = std::mem::take(&mut self.common.counts);
        // Codes and tuple ids are copied as they are, so both halves keep the same tables.
        for half in [&mut taken, &mut kept] {
            half.common.dictionaries = self.common.dictionaries.clone();
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

    fn content(&self) -> StateContent<'_> {
        let (counts, order) = self.buckets();
        let predictors = self
            .common
            .spec
            .predictors
            .iter()
            .enumerate()
            .map(|(k, p)| -> ArrayRef {
                if p.kind.is_factor() {
                    let labels = &self.common.dictionaries[k].labels;
                    Arc::new(StringArray::from_iter_values(
                        order.iter().map(|&s| labels[self.value(s, k) as usize].as_str()),
                    ))
                } else {
                    Arc::new(Float64Array::from_iter_values(order.iter().map(|&s| self.number(s, k))))
                }
            })
            .collect();
        StateContent {
            layout: Layout::Patterns,
            offsets: counts.iter().map(|&c| c as i32).collect(),
            response: Vec::new(),
            exposure: Vec::new(),
            predictors,
            sums: order.iter().map(|&s| self.sums[s]).collect(),
            skipped: &self.common.counts.skipped,
            invalid: &self.common.counts.invalid,
        }
    }

    fn visit_groups(&mut self, mut visit: impl FnMut(usize, &GroupData<'_>) -> Result<()>) -> Result<()> {
        let (offsets, mut order) = self.buckets();
        let keys = self.hash_keys();
        for g in 0..self.num_groups() {
            let slots = &mut order[offsets[g]..offsets[g + 1]];
            self.sort_canonically(slots, &keys);
            visit(g, &self.group_data(g, slots))?;
        }
        Ok(())
    }

    fn hash_keys(&self) -> Vec<Vec<u64>> {
        label_hashes(&self.common)
    }

    fn item_hash(&self, labels: &Vec<Vec<u64>>, s: usize) -> u64 {
        (0..self.width()).fold(0, |h, k| {
            let v = self.value(s, k);
            mix(h, if labels[k].is_empty() { v } else { labels[k][v as usize] })
        })
    }

    fn compare_items(&self, a: usize, b: usize) -> Ordering {
        for (k, p) in self.common.spec.predictors.iter().enumerate() {
            let o = if p.kind.is_factor() {
                let d = &self.common.dictionaries[k].labels;
                d[self.value(a, k) as usize].cmp(&d[self.value(b, k) as usize])
            } else {
                self.number(a, k).total_cmp(&self.number(b, k))
            };
            if o.is_ne() {
                return o;
            }
        }
        Ordering::Equal
    }

    fn group_data(&self, g: usize, slots: &[usize]) -> GroupData<'_> {
        self.common.group_data(
            g,
            self.common
                .spec
                .predictors
                .iter()
                .enumerate()
                .map(|(k, p)| {
                    if p.kind.is_factor() {
                        Column::Factor(slots.iter().map(|&s| self.value(s, k) as u32).collect())
                    } else {
                        Column::Numeric(slots.iter().map(|&s| self.number(s, k)).collect())
                    }
                })
                .collect(),
            Response::Patterns(slots.iter().map(|&s| self.sums[s]).collect()),
        )
    }
}
