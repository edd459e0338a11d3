//! Row buffers: every row of every group of one fit aggregate, for fits that need the rows.
//!
//! Clean input batches are kept as they arrive, their rows put in group order within the batch
//! (a radix sort while the batch is in cache), so that each group's rows in a batch form one
//! run. Rows added one at a time (checked rows, merged states) go to shared flat columns with a
//! group index per row. Factor values are interned in one dictionary per predictor. Evaluation
//! copies one group at a time, run by run, into the flat columns (reused from group to group)
//! and puts them in canonical order there ([`GroupBuffer::sort_canonically`]): no second copy of
//! all rows is made.

use std::cmp::Ordering;
use std::sync::Arc;

use datafusion::arrow::array::{Array, ArrayRef, Float64Array, StringArray};
use datafusion::error::Result;

use super::decode::{BatchColumn, BatchInputs};
use super::group_buffer::{Column, Common, GroupBuffer, GroupData, Response, label_hashes, mix};
use super::spec::ModelSpec;
use super::state::{DecodedState, Layout, StateContent};

/// The buffered rows of all groups: flat columns, plus the clean input batches that arrived
/// since the rows were last laid out ([`Batch`]).
#[derive(Debug, Clone)]
pub struct GroupRows {
    common: Common,
    group: Vec<u32>,
    y: Vec<f64>,
    /// Exposure per row (1 for fits without one).
    exposure: Vec<f64>,
    columns: Vec<Column>,
    batches: Vec<Batch>,
    /// The heap bytes of `batches`, kept with them: the engine asks for the size after every
    /// input batch, and summing over all batches each time would be quadratic.
    batch_bytes: usize,
}

/// The rows of one input batch, in group order (rows of one group keep their order). A batch
/// that arrives in group order keeps the engine's own Arrow arrays (shared, not copied);
/// otherwise each array is copied once, reordered. Either way a row is stored once, instead of
/// also in growing flat columns (whose reallocations touched about twice the final bytes in
/// fresh pages).
#[derive(Debug, Clone)]
struct Batch {
    group: Vec<u32>,
    y: Float64Array,
    exposure: Option<Float64Array>,
    columns: Vec<BatchColumn>,
}

/// `a` itself when its buffers hold little more than its values; otherwise a copy of just its
/// values, so that a slice of a large buffer (a merged state's list values, say) does not keep
/// the whole buffer alive, and the memory reported is the memory held.
fn compact(a: &Float64Array) -> Float64Array {
    let needed = a.len() * std::mem::size_of::<f64>();
    if a.get_buffer_memory_size() <= needed + needed / 4 + 256 {
        a.clone()
    } else {
        Float64Array::from(a.values().to_vec())
    }
}

/// Row positions of `group` in group order, stable; `None` when the rows already are in group
/// order. An LSD radix sort, 8 bits of the group index per pass, as many passes as the largest
/// index needs (two for up to 65,536 groups).
fn group_order(group: &[u32]) -> Option<Vec<u32>> {
    if group.windows(2).all(|w| w[0] <= w[1]) {
        return None;
    }
    let largest = group.iter().copied().max().unwrap_or(0);
    let mut order: Vec<u32> = (0..group.len() as u32).collect();
    let mut next = vec![0u32; group.len()];
    let mut shift = 0;
    while shift < 32 && (shift == 0 || largest >> shift > 0) {
        let digit = |i: u32| ((group[i as usize] >> shift) & 0xff) as usize;
        let mut starts = [0u32; 257];
        for &i in &order {
            starts[digit(i) + 1] += 1;
        }
        for d in 0..256 {
            starts[d + 1] += starts[d];
        }
        for &i in &order {
            let d = digit(i);
            next[starts[d] as usize] = i;
            starts[d] += 1;
        }
        std::mem::swap(&mut order, &mut next);
        shift += 8;
    }
    Some(order)
}

impl Batch {
    /// A batch of `inputs`' rows, `group[i]` being row i's group, stored in group order (the
    /// engine's arrays themselves, compacted, when the rows already are in that order).
    fn in_group_order(inputs: &BatchInputs, group: Vec<u32>) -> Batch {
        let order = group_order(&group);
        let numbers = |a: &Float64Array| match &order {
            None => compact(a),
            Some(order) => {
                let v = a.values();
                Float64Array::from(order.iter().map(|&i| v[i as usize]).collect::<Vec<f64>>())
            }
        };
        let codes = |c: &[u32]| -> Vec<u32> {
            match &order {
                None => c.to_vec(),
                Some(order) => order.iter().map(|&i| c[i as usize]).collect(),
            }
        };
        let columns = inputs
            .predictors
            .iter()
            .map(|c| match c {
                BatchColumn::Numeric(a) => BatchColumn::Numeric(numbers(a)),
                BatchColumn::Codes(c) => BatchColumn::Codes(codes(c)),
            })
            .collect();
        Batch {
            y: numbers(&inputs.y),
            exposure: inputs.exposure.as_ref().map(numbers),
            columns,
            group: if order.is_some() { codes(&group) } else { group },
        }
    }

    fn bytes(&self) -> usize {
        let cols: usize = self
            .columns
            .iter()
            .map(|c| match c {
                BatchColumn::Numeric(a) => a.get_buffer_memory_size(),
                BatchColumn::Codes(codes) => codes.capacity() * 4,
            })
            .sum();
        self.group.capacity() * 4
            + self.y.get_buffer_memory_size()
            + self.exposure.as_ref().map_or(0, |e| e.get_buffer_memory_size())
            + cols
    }
}

impl GroupRows {
    /// One empty column per predictor, of its kind.
    fn empty_columns(spec: &ModelSpec) -> Vec<Column> {
        spec.predictors
            .iter()
            .map(|p| {
                if p.kind.is_factor() {
                    Column::Factor(Vec::new())
                } else {
                    Column::Numeric(Vec::new())
                }
            })
            .collect()
    }

    /// Where each group starts when rows are laid out group by group: group g holds positions
    /// `offsets[g]..offsets[g + 1]`.
    fn group_offsets(&self) -> Vec<usize> {
        let groups = self.num_groups();
        let mut counts = vec![0usize; groups + 1];
        for &g in self.all_groups() {
            counts[g as usize + 1] += 1;
        }
        for g in 0..groups {
            counts[g + 1] += counts[g];
        }
        counts
    }

    /// The group offsets and, per row, its position in group order (a group's rows keep their
    /// order of arrival).
    fn group_positions(&self) -> (Vec<usize>, Vec<u32>) {
        let offsets = self.group_offsets();
        let mut next = offsets.clone();
        let dest = self
            .all_groups()
            .map(|&g| {
                let d = next[g as usize];
                next[g as usize] += 1;
                d as u32
            })
            .collect();
        (offsets, dest)
    }

    /// The flat rows as a batch in group order, put first (the flat columns are left empty).
    fn flat_into_batch(&mut self) {
        if self.group.is_empty() {
            return;
        }
        let predictors = std::mem::take(&mut self.columns)
            .into_iter()
            .map(|c| match c {
                Column::Numeric(v) => BatchColumn::Numeric(Float64Array::from(v)),
                Column::Factor(codes) => BatchColumn::Codes(codes),
            })
            .collect();
        let inputs = BatchInputs {
            y: Float64Array::from(std::mem::take(&mut self.y)),
            exposure: Some(Float64Array::from(std::mem::take(&mut self.exposure))),
            predictors,
        };
        let batch = Batch::in_group_order(&inputs, std::mem::take(&mut self.group));
        self.columns = Self::empty_columns(&self.common.spec);
        self.batch_bytes += batch.bytes();
        self.batches.insert(0, batch);
    }

    /// Replaces the flat rows by the rows of `runs` (batch, start, end), in that order; their
    /// group indices are left empty (only [`GroupBuffer::visit_groups`] reads such rows).
    fn load_runs(&mut self, batches: &[Batch], runs: &[(u32, u32, u32)]) {
        self.group.clear();
        self.y.clear();
        self.exposure.clear();
        for c in &mut self.columns {
            match c {
                Column::Numeric(v) => v.clear(),
                Column::Factor(codes) => codes.clear(),
            }
        }
        for &(b, start, end) in runs {
            let (b, range) = (&batches[b as usize], start as usize..end as usize);
            self.y.extend_from_slice(&b.y.values()[range.clone()]);
            match &b.exposure {
                Some(e) => self.exposure.extend_from_slice(&e.values()[range.clone()]),
                None => self.exposure.resize(self.y.len(), 1.0),
            }
            for (c, from) in self.columns.iter_mut().zip(&b.columns) {
                match (c, from) {
                    (Column::Numeric(v), BatchColumn::Numeric(a)) => v.extend_from_slice(&a.values()[range.clone()]),
                    (Column::Factor(codes), BatchColumn::Codes(c)) => codes.extend_from_slice(&c[range.clone()]),
                    _ => unreachable!("column kinds follow the spec"),
                }
            }
        }
    }

    /// Every row in the flat columns, in the order of arrival.
    fn settle(&mut self) {
        if !self.batches.is_empty() {
            let dest: Vec<u32> = (0..self.all_groups().count() as u32).collect();
            self.lay_out(&dest);
        }
    }

    /// Every row's group: the flat rows, then the batches' rows in order of arrival.
    fn all_groups(&self) -> impl Iterator<Item = &u32> + '_ {
        self.group
            .iter()
            .chain(self.batches.iter().flat_map(|b| b.group.iter()))
    }

    /// Rewrites the flat columns with row i (flat rows, then the batches' rows) at `dest[i]`,
    /// one column at a time (at most one column is held twice), and drops the batches.
    fn lay_out(&mut self, dest: &[u32]) {
        let total = dest.len();
        fn place<T: Copy + Default>(out: &mut [T], parts: impl Iterator<Item = T>, dest: &[u32]) {
            for (x, &d) in parts.zip(dest) {
                out[d as usize] = x;
            }
        }
        let batches = std::mem::take(&mut self.batches);
        self.batch_bytes = 0;
        let mut y = vec![0.0; total];
        place(
            &mut y,
            self.y
                .iter()
                .copied()
                .chain(batches.iter().flat_map(|b| b.y.values().iter().copied())),
            dest,
        );
        self.y = y;
        let mut exposure = vec![0.0; total];
        place(
            &mut exposure,
            self.exposure.iter().copied().chain(batches.iter().flat_map(|b| {
                let n = b.y.len();
                (0..n).map(move |i| b.exposure.as_ref().map_or(1.0, |e| e.value(i)))
            })),
            dest,
        );
        self.exposure = exposure;
        for (k, column) in self.columns.iter_mut().enumerate() {
            *column = match column {
                Column::Numeric(v) => {
                    let mut out = vec![0.0; total];
                    let tail = batches.iter().flat_map(|b| match &b.columns[k] {
                        BatchColumn::Numeric(a) => a.values().iter().copied(),
                        BatchColumn::Codes(_) => unreachable!("column kinds follow the spec"),
                    });
                    place(&mut out, v.iter().copied().chain(tail), dest);
                    Column::Numeric(out)
                }
                Column::Factor(codes) => {
                    let mut out = vec![0u32; total];
                    let tail = batches.iter().flat_map(|b| match &b.columns[k] {
                        BatchColumn::Codes(c) => c.iter().copied(),
                        BatchColumn::Numeric(_) => unreachable!("column kinds follow the spec"),
                    });
                    place(&mut out, codes.iter().copied().chain(tail), dest);
                    Column::Factor(out)
                }
            };
        }
        let mut group = vec![0u32; total];
        place(
            &mut group,
            self.group
                .iter()
                .copied()
                .chain(batches.iter().flat_map(|b| b.group.iter().copied())),
            dest,
        );
        self.group = group;
    }
}

/// Where each group's rows lie in the batches: group g's runs are
/// `runs[offsets[g]..offsets[g + 1]]`, each (batch, start, end), in batch order. Correct for
/// any batch; a batch in group order holds at most one run per group.
struct GroupRuns {
    offsets: Vec<usize>,
    runs: Vec<(u32, u32, u32)>,
}

impl GroupRuns {
    fn new(batches: &[Batch], groups: usize) -> Self {
        fn each_run(group: &[u32], mut f: impl FnMut(usize, u32, u32)) {
            let mut start = 0;
            while start < group.len() {
                let g = group[start];
                let mut end = start + 1;
                while end < group.len() && group[end] == g {
                    end += 1;
                }
                f(g as usize, start as u32, end as u32);
                start = end;
            }
        }
        let mut offsets = vec![0usize; groups + 1];
        for b in batches {
            each_run(&b.group, |g, _, _| offsets[g + 1] += 1);
        }
        for g in 0..groups {
            offsets[g + 1] += offsets[g];
        }
        let mut next = offsets.clone();
        let mut runs = vec![(0, 0, 0); offsets[groups]];
        for (k, b) in batches.iter().enumerate() {
            each_run(&b.group, |g, start, end| {
                runs[next[g]] = (k as u32, start, end);
                next[g] += 1;
            });
        }
        GroupRuns { offsets, runs }
    }

    fn of(&self, g: usize) -> &[(u32, u32, u32)] {
        &self.runs[self.offsets[g]..self.offsets[g + 1]]
    }
}

/// `v` with element i moved to position `dest[i]`: one sequential read, one write cursor per
/// group, which is far kinder to the cache than gathering a group's rows from all over `v`.
fn scatter<T: Copy + Default>(v: &[T], dest: &[u32]) -> Vec<T> {
    let mut out = vec![T::default(); v.len()];
    for (&x, &d) in v.iter().zip(dest) {
        out[d as usize] = x;
    }
    out
}

impl GroupBuffer for GroupRows {
    const LAYOUT: Layout = Layout::Rows;

    fn empty(spec: Arc<ModelSpec>) -> Self {
        let columns = Self::empty_columns(&spec);
        GroupRows {
            common: Common::new(spec),
            group: Vec::new(),
            y: Vec::new(),
            exposure: Vec::new(),
            columns,
            batches: Vec::new(),
            batch_bytes: 0,
        }
    }

    fn common(&self) -> &Common {
        &self.common
    }

    fn common_mut(&mut self) -> &mut Common {
        &mut self.common
    }

    fn data_bytes(&self) -> usize {
        let cols: usize = self
            .columns
            .iter()
            .map(|c| match c {
                Column::Numeric(v) => v.capacity() * 8,
                Column::Factor(codes) => codes.capacity() * 4,
            })
            .sum();
        self.group.capacity() * 4
            + (self.y.capacity() + self.exposure.capacity()) * 8
            + cols
            // Batches count twice: laying them out for the state builds the flat copy while
            // they are still held.
            + 2 * self.batch_bytes
    }

    /// A clean batch is kept whole, in group order (see [`Batch`]).
    fn push_all(&mut self, inputs: &BatchInputs, group_indices: &[usize]) {
        if group_indices.is_empty() {
            return;
        }
        let group = group_indices.iter().map(|&g| g as u32).collect();
        let batch = Batch::in_group_order(inputs, group);
        self.batch_bytes += batch.bytes();
        self.batches.push(batch);
    }

    fn push_row(&mut self, inputs: &BatchInputs, row: usize, g: usize) {
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
    }

    /// State rows are added like input rows (through the row policy), each with its group.
    fn merge_elements(&mut self, state: &DecodedState, groups: &[usize]) -> Result<()> {
        let mut values: Vec<ArrayRef> = state.response.iter().chain(&state.exposure).cloned().collect();
        values.extend(state.predictors.iter().cloned());
        let spec = self.common.spec.clone();
        let inputs = BatchInputs::new(&spec, &values, &mut self.common.dictionaries)?;
        self.push_checked(&inputs, groups, None)
    }

    fn split_front(&mut self, n: usize) -> Self {
        self.settle();
        let spec = self.common.spec.clone();
        let mut taken = GroupRows::empty(spec.clone());
        let mut kept = GroupRows::empty(spec);
        // Codes are copied as they are, so both halves keep the same dictionaries.
        taken.common.dictionaries = self.common.dictionaries.clone();
        kept.common.dictionaries = self.common.dictionaries.clone();
        kept.common.counts = std::mem::take(&mut self.common.counts);
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
                    _ => unreachable!("column kinds follow the spec"),
                }
            }
        }
        *self = kept;
        taken
    }

    /// Rows in group order, each column scattered in one sequential pass.
    fn content(&self) -> StateContent<'_> {
        let (counts, dest) = self.group_positions();
        let predictors = self
            .columns
            .iter()
            .zip(&self.common.dictionaries)
            .map(|(c, dictionary)| -> ArrayRef {
                match c {
                    Column::Numeric(v) => Arc::new(Float64Array::from(scatter(v, &dest))),
                    Column::Factor(codes) => Arc::new(StringArray::from_iter_values(
                        scatter(codes, &dest)
                            .into_iter()
                            .map(|c| dictionary.labels[c as usize].as_str()),
                    )),
                }
            })
            .collect();
        StateContent {
            layout: Layout::Rows,
            offsets: counts.iter().map(|&c| c as i32).collect(),
            response: scatter(&self.y, &dest),
            exposure: if self.common.spec.kind.has_exposure() {
                scatter(&self.exposure, &dest)
            } else {
                Vec::new()
            },
            predictors,
            sums: Vec::new(),
            skipped: &self.common.counts.skipped,
            invalid: &self.common.counts.invalid,
        }
    }

    /// One group at a time: its runs are copied into the flat columns (emptied first, their
    /// memory reused from group to group) and sorted there. Flat rows first become a batch, so
    /// that every row is in a batch while groups are visited; the batches are kept.
    fn visit_groups(&mut self, mut visit: impl FnMut(usize, &GroupData<'_>) -> Result<()>) -> Result<()> {
        self.flat_into_batch();
        let batches = std::mem::take(&mut self.batches);
        let runs = GroupRuns::new(&batches, self.num_groups());
        let keys = self.hash_keys();
        let mut items = Vec::new();
        let mut result = Ok(());
        for g in 0..self.num_groups() {
            self.load_runs(&batches, runs.of(g));
            items.clear();
            items.extend(0..self.y.len());
            self.sort_canonically(&mut items, &keys);
            result = visit(g, &self.group_data(g, &items));
            if result.is_err() {
                break;
            }
        }
        // The scratch is as large as the largest group: give its memory back.
        for c in &mut self.columns {
            *c = match c {
                Column::Numeric(_) => Column::Numeric(Vec::new()),
                Column::Factor(_) => Column::Factor(Vec::new()),
            };
        }
        (self.y, self.exposure, self.group) = (Vec::new(), Vec::new(), Vec::new());
        self.batches = batches;
        result
    }

    fn settle(&mut self) {
        GroupRows::settle(self);
    }

    type HashKeys = Vec<Vec<u64>>;

    fn hash_keys(&self) -> Vec<Vec<u64>> {
        label_hashes(&self.common)
    }

    fn item_hash(&self, labels: &Vec<Vec<u64>>, i: usize) -> u64 {
        let mut h = mix(mix(0, self.y[i].to_bits()), self.exposure[i].to_bits());
        for (c, labels) in self.columns.iter().zip(labels) {
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

    fn compare_items(&self, a: usize, b: usize) -> Ordering {
        self.y[a]
            .total_cmp(&self.y[b])
            .then(self.exposure[a].total_cmp(&self.exposure[b]))
            .then_with(|| {
                for (c, dictionary) in self.columns.iter().zip(&self.common.dictionaries) {
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
                Ordering::Equal
            })
    }

    fn group_data(&self, g: usize, items: &[usize]) -> GroupData<'_> {
        self.common.group_data(
            g,
            self.columns
                .iter()
                .map(|c| match c {
                    Column::Numeric(v) => Column::Numeric(items.iter().map(|&i| v[i]).collect()),
                    Column::Factor(codes) => Column::Factor(items.iter().map(|&i| codes[i]).collect()),
                })
                .collect(),
            Response::Rows {
                y: items.iter().map(|&i| self.y[i]).collect(),
                exposure: items.iter().map(|&i| self.exposure[i]).collect(),
            },
        )
    }
}
