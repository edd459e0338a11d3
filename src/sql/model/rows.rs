//! Row buffers: every row of every group of one fit aggregate, for fits that need the rows.
//!
//! Rows of all groups live in shared flat columns with a group index per row (no per-group
//! allocation while rows arrive); factor values are interned in one dictionary per predictor.
//! At evaluation the rows are bucketed by group with a counting sort and put in canonical
//! order ([`GroupBuffer::sort_canonically`]).

use std::cmp::Ordering;
use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, Float64Array, StringArray};
use datafusion::error::Result;

use super::decode::{BatchColumn, BatchInputs};
use super::group_buffer::{Column, Common, GroupBuffer, GroupData, Response, label_hashes, mix};
use super::spec::ModelSpec;
use super::state::{DecodedState, Layout, StateContent};

/// The buffered rows of all groups.
#[derive(Debug, Clone)]
pub struct GroupRows {
    common: Common,
    group: Vec<u32>,
    y: Vec<f64>,
    /// Exposure per row (1 for fits without one).
    exposure: Vec<f64>,
    columns: Vec<Column>,
}

impl GroupRows {
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

    /// The group offsets and, per row, its position in group order (a group's rows keep their
    /// order of arrival).
    fn group_positions(&self) -> (Vec<usize>, Vec<u32>) {
        let offsets = self.group_offsets();
        let mut next = offsets.clone();
        let dest = self
            .group
            .iter()
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
        self.group.windows(2).all(|w| w[0] <= w[1])
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

impl Column {
    fn scattered(&self, dest: &[u32]) -> Column {
        match self {
            Column::Numeric(v) => Column::Numeric(scatter(v, dest)),
            Column::Factor(codes) => Column::Factor(scatter(codes, dest)),
        }
    }
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
        self.group.capacity() * 4 + (self.y.capacity() + self.exposure.capacity()) * 8 + cols
    }

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
        self.y = scatter(&self.y, &dest);
        self.exposure = scatter(&self.exposure, &dest);
        for c in &mut self.columns {
            *c = c.scattered(&dest);
        }
        self.group = scatter(&self.group, &dest);
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
