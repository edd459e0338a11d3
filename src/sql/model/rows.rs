//! Row buffers: every row of every group of one fit aggregate, for fits that need the rows.
//!
//! Rows of all groups live in shared flat columns with a group index per row (no per-group
//! allocation while rows arrive); factor values are interned in one dictionary per predictor.
//! At evaluation the rows are bucketed by group with a counting sort and put in canonical
//! order ([`GroupBuffer::sort_canonically`]).

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
}

/// The rows of one clean input batch as the engine decoded them: the number columns are the
/// batch's own Arrow arrays (shared, not copied), so a row is copied once, when the rows are
/// laid out in group order ([`GroupBuffer::arrange_by_group`]), instead of also into growing
/// flat columns (whose reallocations touched about twice the final bytes in fresh pages).
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

impl Batch {
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

    /// Whether the rows are already in group order.
    fn in_group_order(&self) -> bool {
        self.batches.is_empty() && self.group.windows(2).all(|w| w[0] <= w[1])
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
        fn place<T: Copy + Default>(out: &mut Vec<T>, parts: impl Iterator<Item = T>, dest: &[u32]) {
            for (x, &d) in parts.zip(dest) {
                out[d as usize] = x;
            }
        }
        let batches = std::mem::take(&mut self.batches);
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
        let columns = spec
            .predictors
            .iter()
            .map(|p| {
                if p.kind.is_factor() {
                    Column::Factor(Vec::new())
                } else {
                    Column::Numeric(Vec::new())
                }
            })
            .collect();
        GroupRows {
            common: Common::new(spec),
            group: Vec::new(),
            y: Vec::new(),
            exposure: Vec::new(),
            columns,
            batches: Vec::new(),
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
            // Batches count twice: laying them out (for evaluation or for the state) builds
            // the flat copy while they are still held.
            + 2 * self.batches.iter().map(Batch::bytes).sum::<usize>()
    }

    /// A clean batch is kept as it is (see [`Batch`]).
    fn push_all(&mut self, inputs: &BatchInputs, group_indices: &[usize]) {
        if group_indices.is_empty() {
            return;
        }
        self.batches.push(Batch {
            group: group_indices.iter().map(|&g| g as u32).collect(),
            y: compact(&inputs.y),
            exposure: inputs.exposure.as_ref().map(compact),
            columns: inputs
                .predictors
                .iter()
                .map(|c| match c {
                    BatchColumn::Numeric(a) => BatchColumn::Numeric(compact(a)),
                    BatchColumn::Codes(codes) => BatchColumn::Codes(codes.clone()),
                })
                .collect(),
        });
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

    /// Moves the rows into group order, column by column (at most one column is held twice), so
    /// that hashing, sorting and gathering a group touch one contiguous stretch of memory
    /// instead of rows scattered over the whole buffer.
    fn arrange_by_group(&mut self) {
        if self.in_group_order() {
            return;
        }
        let (_, dest) = self.group_positions();
        self.lay_out(&dest);
    }

    fn settle(&mut self) {
        GroupRows::settle(self);
    }

    fn buckets(&self) -> (Vec<usize>, Vec<usize>) {
        let counts = self.group_offsets();
        let mut order = vec![0usize; self.group.len()];
        let mut next = counts.clone();
        for (i, &g) in self.group.iter().enumerate() {
            order[next[g as usize]] = i;
            next[g as usize] += 1;
        }
        (counts, order)
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
