//! What a standardisation aggregate keeps per group: a few running sums (a [`Tally`]), plus
//! the rows skipped for a NULL and the invalid rows skipped with `invalid=skip`. Sums merge by
//! adding, so the state crossing partitions is a handful of Float64 columns.

use std::fmt::Debug;
use std::sync::Arc;

use datafusion::arrow::array::{Array, ArrayRef, BooleanArray, Float64Array, StringArray, StructArray, UInt64Array};
use datafusion::arrow::datatypes::{DataType, Field, Fields};
use datafusion::error::{DataFusionError, Result};

use super::settings::StandardizeSettings;
use crate::sql::model::options::InvalidRows;

/// The running sums of one group.
pub trait Tally: Clone + Debug + Send + Sync + 'static {
    /// Names of the state columns (all Float64).
    const STATE: &'static [&'static str];

    fn empty() -> Self;
    /// Why a row without NULLs is invalid (a message naming the function, argument and
    /// value); `None` when it is valid. `values` holds the numeric arguments in order.
    fn problem(values: &[f64]) -> Option<String>;
    fn add(&mut self, values: &[f64]);
    fn merge(&mut self, other: &Self);
    fn write_state(&self, out: &mut Vec<f64>);
    fn read_state(values: &[f64]) -> Self;
    /// The result struct's type.
    fn result_type() -> DataType;
    /// One result per group.
    fn results(groups: &[Group<Self>], settings: &StandardizeSettings) -> StructArray;
}

/// One group: its sums and row counts.
#[derive(Debug, Clone)]
pub struct Group<T> {
    pub tally: T,
    pub skipped: u64,
    pub invalid: u64,
}

impl<T: Tally> Group<T> {
    pub fn empty() -> Self {
        Group {
            tally: T::empty(),
            skipped: 0,
            invalid: 0,
        }
    }

    /// Number of state columns: the tally's and the two counts.
    pub fn state_width() -> usize {
        T::STATE.len() + 2
    }

    fn write_state(&self, out: &mut Vec<f64>) {
        self.tally.write_state(out);
        out.push(self.skipped as f64);
        out.push(self.invalid as f64);
    }

    fn merge_state(&mut self, values: &[f64]) {
        let n = T::STATE.len();
        self.tally.merge(&T::read_state(&values[..n]));
        self.skipped += values[n] as u64;
        self.invalid += values[n + 1] as u64;
    }
}

/// Per-group tallies of one aggregate call.
#[derive(Debug)]
pub struct Tallies<T: Tally> {
    pub groups: Vec<Group<T>>,
    pub settings: StandardizeSettings,
    /// How many leading arguments are numeric (the options literal, if any, follows).
    pub numeric: usize,
}

impl<T: Tally> Tallies<T> {
    pub fn new(settings: StandardizeSettings, numeric: usize) -> Self {
        Tallies {
            groups: Vec::new(),
            settings,
            numeric,
        }
    }

    fn ensure(&mut self, n: usize) {
        if self.groups.len() < n {
            self.groups.resize_with(n, Group::empty);
        }
    }

    /// Adds a batch of rows: filtered-out rows are ignored, rows with a NULL counted as
    /// skipped, invalid rows counted (`invalid=skip`) or refused with the row's message.
    pub fn update(
        &mut self,
        values: &[ArrayRef],
        group_of: impl Fn(usize) -> usize,
        filter: Option<&BooleanArray>,
        total_groups: usize,
    ) -> Result<()> {
        self.ensure(total_groups);
        let columns = floats(&values[..self.numeric])?;
        let mut row_values = vec![0.0; self.numeric];
        let rows = columns.first().map_or(0, |c| c.len());
        for row in 0..rows {
            if filter.is_some_and(|f| !(f.is_valid(row) && f.value(row))) {
                continue;
            }
            let g = &mut self.groups[group_of(row)];
            if columns.iter().any(|c| c.is_null(row)) {
                g.skipped += 1;
                continue;
            }
            for (v, c) in row_values.iter_mut().zip(&columns) {
                *v = c.value(row);
            }
            if let Some(problem) = T::problem(&row_values) {
                match self.settings.invalid {
                    InvalidRows::Skip => g.invalid += 1,
                    InvalidRows::Error => return Err(DataFusionError::Execution(problem)),
                }
                continue;
            }
            g.tally.add(&row_values);
        }
        Ok(())
    }

    /// The state of `groups` as Float64 columns, one per [`Tally::STATE`] name and two counts.
    pub fn state_of(groups: &[Group<T>]) -> Vec<ArrayRef> {
        let width = Group::<T>::state_width();
        let mut flat = Vec::with_capacity(width * groups.len());
        for g in groups {
            g.write_state(&mut flat);
        }
        (0..width)
            .map(|c| {
                Arc::new(Float64Array::from_iter_values(
                    flat.iter().skip(c).step_by(width).copied(),
                )) as ArrayRef
            })
            .collect()
    }

    /// Merges state rows into the groups `group_of(row)`.
    pub fn merge(&mut self, states: &[ArrayRef], group_of: impl Fn(usize) -> usize, total_groups: usize) -> Result<()> {
        self.ensure(total_groups);
        let columns = floats(states)?;
        let mut row_values = vec![0.0; columns.len()];
        let rows = columns.first().map_or(0, |c| c.len());
        for row in 0..rows {
            for (v, c) in row_values.iter_mut().zip(&columns) {
                *v = c.value(row);
            }
            self.groups[group_of(row)].merge_state(&row_values);
        }
        Ok(())
    }

    pub fn size(&self) -> usize {
        self.groups.capacity() * std::mem::size_of::<Group<T>>()
    }
}

fn floats(arrays: &[ArrayRef]) -> Result<Vec<Float64Array>> {
    arrays
        .iter()
        .map(|a| {
            a.as_any().downcast_ref::<Float64Array>().cloned().ok_or_else(|| {
                DataFusionError::Internal(format!(
                    "standardisation input of type {} (expected Float64)",
                    a.data_type()
                ))
            })
        })
        .collect()
}

/// One result column being built.
pub enum Column {
    Float(Vec<Option<f64>>),
    Count(Vec<Option<u64>>),
    Text(Vec<Option<String>>),
}

impl Column {
    fn data_type(&self) -> DataType {
        match self {
            Column::Float(_) => DataType::Float64,
            Column::Count(_) => DataType::UInt64,
            Column::Text(_) => DataType::Utf8,
        }
    }

    /// Into an array; a non-finite number becomes NULL (every reported number is finite).
    fn into_array(self) -> ArrayRef {
        match self {
            Column::Float(v) => Arc::new(Float64Array::from(
                v.into_iter().map(|x| x.filter(|x| x.is_finite())).collect::<Vec<_>>(),
            )),
            Column::Count(v) => Arc::new(UInt64Array::from(v)),
            Column::Text(v) => Arc::new(StringArray::from(v)),
        }
    }
}

/// The struct type with fields `names` of the types in `kinds` (as `Column`s would build).
pub fn struct_type(fields: &[(&str, DataType)]) -> DataType {
    DataType::Struct(Fields::from(
        fields
            .iter()
            .map(|(n, t)| Field::new(*n, t.clone(), true))
            .collect::<Vec<_>>(),
    ))
}

/// Builds the result struct from named columns (in the order of the type).
pub fn build_struct(columns: Vec<(&str, Column)>) -> StructArray {
    let fields: Vec<Field> = columns
        .iter()
        .map(|(n, c)| Field::new(*n, c.data_type(), true))
        .collect();
    let arrays: Vec<ArrayRef> = columns.into_iter().map(|(_, c)| c.into_array()).collect();
    StructArray::new(Fields::from(fields), arrays, None)
}
