//! The one interface both group buffers implement ([`GroupBuffer`]), and everything they share:
//! the row policy and counts, the merge scaffolding over the state codec, taking groups out,
//! `convert_to_state`, the canonical order of a group's items, and the data of one group handed
//! to evaluation ([`GroupData`]).

use std::cmp::Ordering;
use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, BooleanArray};
use datafusion::error::Result;
use datafusion::logical_expr::EmitTo;

use super::decode::{BatchInputs, Dictionary, GroupCounts, admit, state_error};
use super::spec::ModelSpec;
use super::state::{DecodedState, Layout, StateContent, decode, encode};
use crate::glm::collapse::Sums;

/// What every buffer holds besides its data: the spec, one dictionary per predictor (factor
/// labels; empty for numbers) and the per-group counts of rows left out.
#[derive(Debug, Clone)]
pub struct Common {
    pub spec: Arc<ModelSpec>,
    pub dictionaries: Vec<Dictionary>,
    pub counts: GroupCounts,
}

impl Common {
    pub fn new(spec: Arc<ModelSpec>) -> Self {
        Common {
            dictionaries: vec![Dictionary::default(); spec.predictors.len()],
            spec,
            counts: GroupCounts::default(),
        }
    }

    fn bytes(&self) -> usize {
        self.counts.bytes() + self.dictionaries.iter().map(Dictionary::bytes).sum::<usize>()
    }

    /// Group `g`'s data for evaluation, from its predictor columns and response.
    pub fn group_data(&self, g: usize, columns: Vec<Column>, response: Response) -> GroupData<'_> {
        GroupData {
            spec: &self.spec,
            dictionaries: &self.dictionaries,
            skipped: self.counts.skipped[g],
            invalid: self.counts.invalid[g],
            columns,
            response,
        }
    }
}

/// A group buffer: rows ([`GroupRows`](super::rows::GroupRows)) or covariate-pattern sums
/// ([`GroupPatterns`](super::patterns::GroupPatterns)). The provided methods are the shared
/// scaffolding; a buffer implements only what differs.
pub trait GroupBuffer: std::fmt::Debug + Send + Sync + Sized + 'static {
    /// The state layout this buffer writes and reads.
    const LAYOUT: Layout;

    /// An empty buffer (no groups).
    fn empty(spec: Arc<ModelSpec>) -> Self;
    fn common(&self) -> &Common;
    fn common_mut(&mut self) -> &mut Common;
    /// Adds row `row` of a decoded batch (already admitted) to group `g`.
    fn push_row(&mut self, inputs: &BatchInputs, row: usize, g: usize);
    /// Adds every row of a batch known to need no check (see [`BatchInputs::clean`]).
    fn push_all(&mut self, inputs: &BatchInputs, group_indices: &[usize]) {
        for (row, &g) in group_indices.iter().enumerate() {
            self.push_row(inputs, row, g);
        }
    }
    /// Adds the elements of a decoded state (rows or patterns); `groups[i]` is element i's group.
    fn merge_elements(&mut self, state: &DecodedState, groups: &[usize]) -> Result<()>;
    /// Removes the data of groups `0..n` into a new buffer (counts are split by the caller);
    /// the groups that stay are renumbered from 0.
    fn split_front(&mut self, n: usize) -> Self;
    /// The content of the state of all groups.
    fn content(&self) -> StateContent<'_>;
    /// Approximate heap bytes of the data (the common part is added by [`GroupBuffer::size`]).
    fn data_bytes(&self) -> usize;
    /// Brings every item into the form [`GroupBuffer::content`] reads (the content is unchanged).
    fn settle(&mut self) {}
    /// Whatever hashing items needs, prepared once per evaluation (hashes of factor labels).
    type HashKeys;
    fn hash_keys(&self) -> Self::HashKeys;
    /// A hash of item `i`'s values that does not depend on dictionary codes; with
    /// [`GroupBuffer::compare_items`] it fixes the canonical order.
    fn item_hash(&self, keys: &Self::HashKeys, i: usize) -> u64;
    fn compare_items(&self, a: usize, b: usize) -> Ordering;
    /// The data of group `g`, whose items in canonical order are `items`.
    fn group_data(&self, g: usize, items: &[usize]) -> GroupData<'_>;

    /// Hands each group's data, its items in canonical order, to `visit`, group by group; stops
    /// at the first error. The content is unchanged (items may move).
    fn visit_groups(&mut self, visit: impl FnMut(usize, &GroupData<'_>) -> Result<()>) -> Result<()>;

    fn spec(&self) -> &ModelSpec {
        &self.common().spec
    }

    fn num_groups(&self) -> usize {
        self.common().counts.groups()
    }

    fn size(&self) -> usize {
        self.data_bytes() + self.common().bytes()
    }

    /// Adds input rows: in bulk when the batch needs no check, else row by row through the
    /// row policy ([`admit`]).
    fn update(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        filter: Option<&BooleanArray>,
        total_groups: usize,
    ) -> Result<()> {
        self.common_mut().counts.ensure(total_groups);
        let spec = self.common().spec.clone();
        let inputs = BatchInputs::new(&spec, values, &mut self.common_mut().dictionaries)?;
        self.push_checked(&inputs, group_indices, filter)
    }

    /// Adds decoded rows through the row policy.
    fn push_checked(
        &mut self,
        inputs: &BatchInputs,
        group_indices: &[usize],
        filter: Option<&BooleanArray>,
    ) -> Result<()> {
        let spec = self.common().spec.clone();
        if inputs.clean(&spec, filter) {
            self.push_all(inputs, group_indices);
            return Ok(());
        }
        for (row, &g) in group_indices.iter().enumerate() {
            if admit(inputs, &spec, filter, row, g, &mut self.common_mut().counts)? {
                self.push_row(inputs, row, g);
            }
        }
        Ok(())
    }

    /// Merges states written by [`GroupBuffer::to_state`] (here or in another process).
    fn merge(&mut self, states: &[ArrayRef], group_indices: &[usize], total_groups: usize) -> Result<()> {
        self.common_mut().counts.ensure(total_groups);
        let spec = self.common().spec.clone();
        let state = decode(spec.kind, spec.predictors.len(), Self::LAYOUT, states)?;
        if state.skipped.len() != group_indices.len() {
            return Err(state_error("state rows and group indices differ in number".into()));
        }
        let mut element_groups = Vec::with_capacity(state.offsets.last().copied().unwrap_or(0));
        for (r, &g) in group_indices.iter().enumerate() {
            if g >= total_groups {
                return Err(state_error(format!("group index {g} out of range")));
            }
            self.common_mut().counts.add(g, state.skipped[r], state.invalid[r])?;
            element_groups.extend(std::iter::repeat_n(g, state.offsets[r + 1] - state.offsets[r]));
        }
        if element_groups.is_empty() {
            return Ok(());
        }
        self.merge_elements(&state, &element_groups)
    }

    /// Removes the groups `emit_to` asks for and returns them (renumbered from 0).
    fn take(&mut self, emit_to: EmitTo) -> Self {
        let groups = self.num_groups();
        let n = match emit_to {
            EmitTo::All => groups,
            EmitTo::First(n) => n.min(groups),
        };
        let spec = self.common().spec.clone();
        if n == groups {
            return std::mem::replace(self, Self::empty(spec));
        }
        let counts = self.common_mut().counts.split_front(n);
        let mut taken = self.split_front(n);
        taken.common_mut().counts = counts;
        taken
    }

    fn to_state(&mut self) -> Result<Vec<ArrayRef>> {
        self.settle();
        encode(self.common().spec.kind, self.content())
    }

    /// Each input row as its own state.
    fn convert_to_state(&self, values: &[ArrayRef], filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        let n = values.first().map_or(0, |a| a.len());
        let mut single = Self::empty(self.common().spec.clone());
        let indices: Vec<usize> = (0..n).collect();
        single.update(values, &indices, filter, n)?;
        single.to_state()
    }

    /// Puts a group's items in a canonical order that depends only on their values, so that
    /// fits do not depend on the order in which partitions were merged: by a 64-bit hash of the
    /// values, runs of equal hashes by the values themselves. Items with equal values are
    /// interchangeable, so the result is the same for every arrival order; sorting integer
    /// keys costs a fraction of comparing items value by value. `keys` is
    /// [`GroupBuffer::hash_keys`].
    fn sort_canonically(&self, items: &mut [usize], keys: &Self::HashKeys) {
        let mut keyed: Vec<(u64, usize)> = items.iter().map(|&i| (self.item_hash(keys, i), i)).collect();
        keyed.sort_unstable_by_key(|&(h, _)| h);
        let mut start = 0;
        while start < keyed.len() {
            let mut end = start + 1;
            while end < keyed.len() && keyed[end].0 == keyed[start].0 {
                end += 1;
            }
            if end - start > 1 {
                keyed[start..end].sort_unstable_by(|a, b| self.compare_items(a.1, b.1));
            }
            start = end;
        }
        for (r, (_, i)) in items.iter_mut().zip(keyed) {
            *r = i;
        }
    }
}

/// One step of a multiplicative hash (the constant is the 64-bit golden ratio).
pub fn mix(h: u64, v: u64) -> u64 {
    (h.rotate_left(23) ^ v).wrapping_mul(0x9e37_79b9_7f4a_7c15)
}

fn hash_bytes(bytes: &[u8]) -> u64 {
    bytes
        .iter()
        .fold(mix(0, bytes.len() as u64), |h, &b| mix(h, u64::from(b)))
}

/// A hash of every factor label, per predictor and code (empty for numeric predictors).
pub fn label_hashes(common: &Common) -> Vec<Vec<u64>> {
    common
        .dictionaries
        .iter()
        .map(|d| d.labels.iter().map(|l| hash_bytes(l.as_bytes())).collect())
        .collect()
}

/// One predictor's values for the design rows of a group (factor codes index the predictor's
/// dictionary).
#[derive(Debug, Clone)]
pub enum Column {
    Numeric(Vec<f64>),
    Factor(Vec<u32>),
}

/// What the design rows of one group stand for.
pub enum Response {
    /// One design row per data row.
    Rows { y: Vec<f64>, exposure: Vec<f64> },
    /// One design row per covariate pattern, with the sums of its rows.
    Patterns(Vec<Sums>),
}

/// One group's data: predictor values per design row, and the response.
pub struct GroupData<'a> {
    pub spec: &'a ModelSpec,
    pub dictionaries: &'a [Dictionary],
    pub skipped: u64,
    pub invalid: u64,
    pub columns: Vec<Column>,
    pub response: Response,
}

impl GroupData<'_> {
    /// Number of design rows.
    pub fn design_rows(&self) -> usize {
        match &self.response {
            Response::Rows { y, .. } => y.len(),
            Response::Patterns(s) => s.len(),
        }
    }

    /// Number of data rows used.
    pub fn data_rows(&self) -> usize {
        match &self.response {
            Response::Rows { y, .. } => y.len(),
            Response::Patterns(s) => s.iter().map(Sums::rows).sum(),
        }
    }

    pub fn totals(&self) -> (f64, f64) {
        match &self.response {
            Response::Rows { y, exposure } => (y.iter().sum(), exposure.iter().sum()),
            Response::Patterns(s) => (
                s.iter().map(Sums::total_count).sum(),
                s.iter().map(Sums::total_exposure).sum(),
            ),
        }
    }
}
