//! The fit struct: one table of fields ([`FitField`], and [`TermField`], [`PredictorField`],
//! [`DesignField`] for its lists), from which the Arrow type, the builder ([`FitColumns`]) and
//! the typed reader ([`FitReader`]) all come. Adding a field is one line in a table below.
//!
//! Field names marked "fixed" in the SQL contract (`n_used`, `n_skipped`, `n_params`,
//! `df_resid`, `converged`, `iterations`, `status`, `deviance`, `null_deviance`,
//! `pearson_chi2`, `dispersion`, `loglik`, `aic`, `bic`, `se_type`, `level`, `terms` and the
//! term fields) must never change; the others are ours and documented in the README. This is
//! the only file under `src/` that spells them.
//!
//! Every number leaves through [`Range::report`]: non-finite values become NULL, and a
//! statistic with a natural range is brought into it.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{
    Array, ArrayRef, ArrowPrimitiveType, AsArray, BooleanBuilder, ListArray, PrimitiveArray, StringArray, StructArray,
};
use datafusion::arrow::buffer::{BooleanBuffer, Buffer, NullBuffer, OffsetBuffer, ScalarBuffer};
use datafusion::arrow::datatypes::{DataType, Field, Fields, Float64Type, UInt32Type, UInt64Type};
use datafusion::error::{DataFusionError, Result};

use super::spec::PredictorKind;
use crate::glm::design::{ColumnSource, SourcePart};
use crate::glm::distributions::normal_quantile;
use crate::glm::inference::{ModelTest, gof_p_value, model_test};
use crate::glm::{FamilyKind, FamilyParameter, FitStats, GlmFit, TermRow};

/// The values a reported number can take. A statistic whose formula cannot leave its range
/// (a deviance is a sum of non-negative terms, a p-value a probability) is brought back into
/// it at the exit point: what lies outside is rounding residue (a saturated fit's deviance of
/// -2.4e-14), and the nearest value inside the range is the answer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Range {
    Any,
    NonNegative,
    Probability,
}

impl Range {
    /// `v` brought into the range; non-finite values become NULL and -0.0 becomes 0.
    pub fn report(self, v: Option<f64>) -> Option<f64> {
        let v = v.filter(|x| x.is_finite())?;
        Some(
            match self {
                Range::Any => v,
                Range::NonNegative => v.max(0.0),
                Range::Probability => v.clamp(0.0, 1.0),
            } + 0.0,
        )
    }
}

/// The Arrow type of a field's values.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CellType {
    Text,
    UInt,
    UInt32,
    Float,
    Bool,
}

impl CellType {
    fn data_type(self) -> DataType {
        match self {
            CellType::Text => DataType::Utf8,
            CellType::UInt => DataType::UInt64,
            CellType::UInt32 => DataType::UInt32,
            CellType::Float => DataType::Float64,
            CellType::Bool => DataType::Boolean,
        }
    }
}

/// One field value of a record; text is borrowed from the record.
pub enum Cell<'r> {
    Text(Option<&'r str>),
    UInt(Option<u64>),
    UInt32(Option<u32>),
    Float(Option<f64>),
    Bool(Option<bool>),
}

/// A table of fields over a record type: name, type, range and how the value is read.
pub trait RecordTable: Copy + PartialEq + std::fmt::Debug + 'static {
    type Record<'a>;
    fn all() -> &'static [Self];
    fn name(self) -> &'static str;
    fn cell_type(self) -> CellType;
    fn range(self) -> Range;
    fn cell<'r>(self, record: &'r Self::Record<'_>) -> Cell<'r>;

    /// The Arrow fields of the table, in order.
    fn fields() -> Fields {
        Self::all()
            .iter()
            .map(|f| Field::new(f.name(), f.cell_type().data_type(), true))
            .collect()
    }
}

/// Declares a field table: `Variant: "name", CellType, Range, |record| value;` per field.
macro_rules! record_table {
    ($(#[$doc:meta])* $table:ident over <$lt:lifetime> $record:ty {
        $($variant:ident: $name:literal, $ty:ident, $range:ident, |$r:ident| $get:expr;)*
    }) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, Eq)]
        pub enum $table { $($variant),* }

        impl RecordTable for $table {
            type Record<$lt> = $record;
            fn all() -> &'static [Self] {
                &[$($table::$variant),*]
            }
            fn name(self) -> &'static str {
                match self { $($table::$variant => $name),* }
            }
            fn cell_type(self) -> CellType {
                match self { $($table::$variant => CellType::$ty),* }
            }
            fn range(self) -> Range {
                match self { $($table::$variant => Range::$range),* }
            }
            #[allow(clippy::redundant_closure_call)]
            fn cell<'r>(self, record: &'r Self::Record<'_>) -> Cell<'r> {
                match self { $($table::$variant => { let $r = record; Cell::$ty($get) }),* }
            }
        }
    };
}

/// Everything reported for one group, typed.
pub struct GroupReport<'a> {
    pub status: String,
    pub family: FamilyKind,
    pub n_used: u64,
    pub n_skipped: u64,
    pub n_invalid: u64,
    /// Design columns (0 when no design was built).
    pub n_params: u64,
    pub fit: Option<&'a GlmFit>,
    pub se_type: &'a str,
    /// How the intervals were computed (`wald` or `profile`).
    pub ci_method: &'static str,
    pub level: f64,
    pub total_count: Option<f64>,
    pub total_exposure: Option<f64>,
}

impl GroupReport<'_> {
    fn stats(&self) -> Option<&FitStats> {
        self.fit.map(|f| &f.stats)
    }

    fn model_test(&self) -> Option<ModelTest> {
        self.fit.and_then(model_test)
    }

    /// The model test when it is a likelihood-ratio chi-square.
    fn lr(&self) -> Option<ModelTest> {
        self.model_test().filter(|t| t.df_denominator.is_none())
    }

    /// The model test when it is an F test.
    fn f_test(&self) -> Option<ModelTest> {
        self.model_test().filter(|t| t.df_denominator.is_some())
    }

    /// A goodness-of-fit p-value of `statistic`, for families whose scale is fixed.
    fn gof(&self, statistic: fn(&FitStats) -> Option<f64>) -> Option<f64> {
        let fit = self.fit.filter(|f| f.scale.has_gof_tests())?;
        gof_p_value(statistic(&fit.stats), fit.stats.df_resid)
    }

    /// The negative binomial alpha (NULL for other families).
    fn alpha(&self) -> Option<FamilyParameter> {
        self.fit.and_then(|f| f.parameter)
    }

    /// Wald interval of alpha on the log scale, exp(ln a ± z·se/a), so it stays positive.
    fn alpha_interval(&self) -> Option<(f64, f64)> {
        let a = self.alpha()?;
        let se = a.std_error?;
        if !(a.estimate > 0.0) {
            return None;
        }
        let z = normal_quantile(0.5 + self.level / 2.0);
        let half = z * se / a.estimate;
        Some((a.estimate * (-half).exp(), a.estimate * half.exp()))
    }

    fn crude_rate(&self) -> Option<f64> {
        match (self.total_count, self.total_exposure) {
            (Some(c), Some(e)) if e > 0.0 => Some(c / e),
            _ => None,
        }
    }
}

record_table! {
    /// The fit-level fields, in order (the three lists follow them: [`TERMS`], [`PREDICTORS`],
    /// [`DESIGN`]).
    FitField over <'a> GroupReport<'a> {
        Status: "status", Text, Any, |r| Some(r.status.as_str());
        Family: "family", Text, Any, |r| Some(r.family.name());
        NUsed: "n_used", UInt, Any, |r| Some(r.n_used);
        NSkipped: "n_skipped", UInt, Any, |r| Some(r.n_skipped);
        NInvalid: "n_invalid", UInt, Any, |r| Some(r.n_invalid);
        NParams: "n_params", UInt, Any, |r| Some(r.n_params);
        Rank: "rank", UInt, Any, |r| r.stats().map(|s| s.rank as u64);
        DfResid: "df_resid", UInt, Any, |r| r.stats().and_then(|s| s.df_resid).map(|d| d as u64);
        Converged: "converged", Bool, Any, |r| Some(r.fit.is_some_and(|f| f.converged));
        Iterations: "iterations", UInt, Any, |r| Some(r.fit.map_or(0, |f| f.iterations as u64));
        Deviance: "deviance", Float, NonNegative, |r| r.stats().and_then(|s| s.deviance);
        NullDeviance: "null_deviance", Float, NonNegative, |r| r.stats().and_then(|s| s.null_deviance);
        PearsonChi2: "pearson_chi2", Float, NonNegative, |r| r.stats().and_then(|s| s.pearson_chi2);
        Dispersion: "dispersion", Float, NonNegative, |r| r.fit.and_then(GlmFit::dispersion);
        DevianceDf: "deviance_df", Float, NonNegative, |r| r.fit.and_then(GlmFit::deviance_per_df);
        DevianceP: "deviance_p", Float, Probability, |r| r.gof(|s| s.deviance);
        PearsonP: "pearson_p", Float, Probability, |r| r.gof(|s| s.pearson_chi2);
        LrChi2: "lr_chi2", Float, NonNegative, |r| r.lr().map(|t| t.statistic);
        LrDf: "lr_df", UInt, Any, |r| r.lr().map(|t| t.df as u64);
        LrP: "lr_p", Float, Probability, |r| r.lr().map(|t| t.p_value);
        FStat: "f_stat", Float, NonNegative, |r| r.f_test().map(|t| t.statistic);
        FP: "f_p", Float, Probability, |r| r.f_test().map(|t| t.p_value);
        OverdispersionZ: "overdispersion_z", Float, Any, |r| r.stats().and_then(|s| s.extra.overdispersion).map(|t| t.statistic);
        OverdispersionP: "overdispersion_p", Float, Probability, |r| r.stats().and_then(|s| s.extra.overdispersion).map(|t| t.p_value);
        Loglik: "loglik", Float, Any, |r| r.stats().and_then(|s| s.loglik);
        Aic: "aic", Float, Any, |r| r.stats().and_then(|s| s.aic);
        Bic: "bic", Float, Any, |r| r.stats().and_then(|s| s.bic);
        TotalCount: "total_count", Float, NonNegative, |r| r.total_count;
        TotalExposure: "total_exposure", Float, NonNegative, |r| r.total_exposure;
        CrudeRate: "crude_rate", Float, NonNegative, |r| r.crude_rate();
        SeType: "se_type", Text, Any, |r| Some(r.se_type);
        Level: "level", Float, Probability, |r| Some(r.level);
        CiMethod: "ci_method", Text, Any, |r| Some(r.ci_method);
        Alpha: "alpha", Float, NonNegative, |r| r.alpha().map(|a| a.estimate);
        AlphaStdError: "alpha_std_error", Float, NonNegative, |r| r.alpha().and_then(|a| a.std_error);
        AlphaCiLow: "alpha_ci_low", Float, NonNegative, |r| r.alpha_interval().map(|i| i.0);
        AlphaCiHigh: "alpha_ci_high", Float, NonNegative, |r| r.alpha_interval().map(|i| i.1);
        PoissonLrChi2: "poisson_lr_chi2", Float, NonNegative, |r| r.stats().and_then(|s| s.extra.poisson_lr).map(|t| t.statistic);
        PoissonLrP: "poisson_lr_p", Float, Probability, |r| r.stats().and_then(|s| s.extra.poisson_lr).map(|t| t.p_value);
    }
}

record_table! {
    /// The fields of one entry of `terms` (fixed names).
    TermField over <'a> TermRow {
        Term: "term", Text, Any, |t| Some(t.term.as_str());
        Estimate: "estimate", Float, Any, |t| t.estimate;
        StdError: "std_error", Float, NonNegative, |t| t.std_error;
        Z: "z", Float, Any, |t| t.statistic;
        PValue: "p_value", Float, Probability, |t| t.p_value;
        CiLow: "ci_low", Float, Any, |t| t.ci_low;
        CiHigh: "ci_high", Float, Any, |t| t.ci_high;
        RateRatio: "rate_ratio", Float, NonNegative, |t| t.rate_ratio;
        RrLow: "rr_low", Float, NonNegative, |t| t.rr_low;
        RrHigh: "rr_high", Float, NonNegative, |t| t.rr_high;
        Flag: "flag", Text, Any, |t| t.flag;
    }
}

/// Predictor description for the result (used by scoring).
#[derive(Debug, Clone)]
pub struct PredictorInfo {
    pub name: String,
    pub kind: PredictorKind,
    /// The reference level of a treatment-coded factor.
    pub reference: Option<String>,
}

record_table! {
    /// The fields of one entry of `predictors`.
    PredictorField over <'a> PredictorInfo {
        Name: "name", Text, Any, |p| Some(p.name.as_str());
        Kind: "kind", Text, Any, |p| Some(p.kind.report_name());
        Reference: "reference", Text, Any, |p| p.reference.as_deref();
    }
}

/// One design column's construction, as the `design` list reports it: predictor indices and,
/// for factor parts, the level; both NULL for the intercept, `predictor2` NULL for a main effect.
#[derive(Debug, Clone, PartialEq)]
pub struct DesignEntry {
    pub term: String,
    pub predictor: Option<u32>,
    pub level: Option<String>,
    pub predictor2: Option<u32>,
    pub level2: Option<String>,
}

impl DesignEntry {
    pub fn new(term: &str, source: &ColumnSource) -> DesignEntry {
        let split = |p: &SourcePart| (Some(p.predictor as u32), p.level.clone());
        let ((predictor, level), (predictor2, level2)) = match source {
            ColumnSource::Intercept | ColumnSource::Given => ((None, None), (None, None)),
            ColumnSource::Main(a) => (split(a), (None, None)),
            ColumnSource::Product(a, b) => (split(a), split(b)),
        };
        DesignEntry {
            term: term.to_string(),
            predictor,
            level,
            predictor2,
            level2,
        }
    }
}

record_table! {
    /// The fields of one entry of `design`.
    DesignField over <'a> DesignEntry {
        Term: "term", Text, Any, |d| Some(d.term.as_str());
        Predictor: "predictor", UInt32, Any, |d| d.predictor;
        Level: "level", Text, Any, |d| d.level.as_deref();
        Predictor2: "predictor2", UInt32, Any, |d| d.predictor2;
        Level2: "level2", Text, Any, |d| d.level2.as_deref();
    }
}

/// The list fields of the fit struct.
pub const TERMS: &str = "terms";
pub const PREDICTORS: &str = "predictors";
pub const DESIGN: &str = "design";
/// The coefficients' covariance behind the standard errors (row-major, terms x terms; NULL for
/// terms not estimated), for scoring intervals.
pub const COVARIANCE: &str = "covariance";

fn list_of<T: RecordTable>() -> DataType {
    DataType::List(Arc::new(Field::new("item", DataType::Struct(T::fields()), true)))
}

static FIT_STRUCT: LazyLock<Fields> = LazyLock::new(|| {
    let mut fields: Vec<Field> = FitField::fields().iter().map(|f| f.as_ref().clone()).collect();
    fields.push(Field::new(TERMS, list_of::<TermField>(), true));
    fields.push(Field::new(PREDICTORS, list_of::<PredictorField>(), true));
    fields.push(Field::new(DESIGN, list_of::<DesignField>(), true));
    fields.push(Field::new(COVARIANCE, float_list(), true));
    Fields::from(fields)
});

fn float_list() -> DataType {
    DataType::List(Arc::new(Field::new("item", DataType::Float64, true)))
}

/// The struct type returned by `poisson_fit`, `poisson_count_fit` and `linear_fit`.
pub fn fit_type() -> DataType {
    DataType::Struct(FIT_STRUCT.clone())
}

/// The struct type of one term (`fit_term`, `unnest(fit.terms)`).
pub fn term_type() -> DataType {
    DataType::Struct(TermField::fields())
}

/// Whether `fields` are those of a fit struct (the names of its first field and its lists).
pub fn is_fit_struct(fields: &Fields) -> bool {
    [FitField::Status.name(), TERMS]
        .iter()
        .all(|n| fields.iter().any(|f| f.name() == *n))
}

/// Column builders of one record table.
struct RecordColumns<T: RecordTable> {
    cells: Vec<CellColumn>,
    rows: usize,
    _table: std::marker::PhantomData<T>,
}

/// The cells of one field, kept in Arrow's own layout (values, offsets, validity bits) so that
/// finishing hands the buffers over without a copy; each column can reserve room up front.
enum CellColumn {
    Text(TextCells),
    UInt(NumberCells<UInt64Type>),
    UInt32(NumberCells<UInt32Type>),
    Float(NumberCells<Float64Type>),
    Bool(BooleanBuilder),
}

/// Numbers and their validity.
struct NumberCells<T: ArrowPrimitiveType> {
    values: Vec<T::Native>,
    valid: Validity,
}

impl<T: ArrowPrimitiveType> NumberCells<T> {
    fn new() -> Self {
        NumberCells {
            values: Vec::new(),
            valid: Validity::default(),
        }
    }

    fn push(&mut self, v: Option<T::Native>) {
        self.values.push(v.unwrap_or_default());
        self.valid.append(v.is_some());
    }

    fn reserve(&mut self, more: usize) {
        self.values.reserve(more);
    }

    fn finish(self) -> PrimitiveArray<T> {
        PrimitiveArray::new(ScalarBuffer::from(self.values), self.valid.finish())
    }
}

/// Validity bits in Arrow's order (bit i of byte i / 8, least significant first), with the
/// count of NULLs so that a column without any needs no bitmap. (The engine's own builder
/// costs a call and a capacity check per bit, which showed at 8% of a fit of many small groups.)
#[derive(Default)]
struct Validity {
    bits: Vec<u8>,
    len: usize,
    nulls: usize,
}

impl Validity {
    fn append(&mut self, valid: bool) {
        let bit = self.len % 8;
        if bit == 0 {
            self.bits.push(0);
        }
        if let Some(last) = self.bits.last_mut() {
            *last |= u8::from(valid) << bit;
        }
        self.nulls += usize::from(!valid);
        self.len += 1;
    }

    fn finish(self) -> Option<NullBuffer> {
        (self.nulls > 0).then(|| NullBuffer::new(BooleanBuffer::new(Buffer::from_vec(self.bits), 0, self.len)))
    }
}

/// Text in Arrow's `Utf8` layout: the bytes of all cells and each cell's end offset.
struct TextCells {
    bytes: Vec<u8>,
    offsets: Vec<i32>,
    valid: Validity,
}

impl TextCells {
    fn new() -> Self {
        TextCells {
            bytes: Vec::new(),
            offsets: vec![0],
            valid: Validity::default(),
        }
    }

    fn push(&mut self, v: Option<&str>) -> Result<()> {
        self.bytes.extend_from_slice(v.unwrap_or_default().as_bytes());
        self.offsets.push(offset(self.bytes.len(), "text")?);
        self.valid.append(v.is_some());
        Ok(())
    }

    /// Room for `more` cells as long, on average, as those pushed so far.
    fn reserve(&mut self, more: usize) {
        let cells = (self.offsets.len() - 1).max(1);
        self.bytes.reserve(likely_items(self.bytes.len(), cells, more));
        self.offsets.reserve(more);
    }

    fn finish(self) -> Result<StringArray> {
        let offsets = OffsetBuffer::new(ScalarBuffer::from(self.offsets));
        Ok(StringArray::try_new(
            offsets,
            Buffer::from_vec(self.bytes),
            self.valid.finish(),
        )?)
    }
}

/// `len` as an Arrow 32-bit offset, or an error naming what outgrew it (a result column of one
/// batch holds at most 2 GiB of `what`).
fn offset(len: usize, what: &str) -> Result<i32> {
    i32::try_from(len).map_err(|_| {
        DataFusionError::Execution(format!(
            "the fit results of one batch hold more than 2 GiB of {what}; fit fewer groups per query"
        ))
    })
}

impl<T: RecordTable> RecordColumns<T> {
    fn new() -> Self {
        let cells = T::all()
            .iter()
            .map(|f| match f.cell_type() {
                CellType::Text => CellColumn::Text(TextCells::new()),
                CellType::UInt => CellColumn::UInt(NumberCells::new()),
                CellType::UInt32 => CellColumn::UInt32(NumberCells::new()),
                CellType::Float => CellColumn::Float(NumberCells::new()),
                CellType::Bool => CellColumn::Bool(BooleanBuilder::new()),
            })
            .collect();
        RecordColumns {
            cells,
            rows: 0,
            _table: std::marker::PhantomData,
        }
    }

    fn reserve(&mut self, more: usize) {
        for column in &mut self.cells {
            match column {
                CellColumn::Text(c) => c.reserve(more),
                CellColumn::UInt(c) => c.reserve(more),
                CellColumn::UInt32(c) => c.reserve(more),
                CellColumn::Float(c) => c.reserve(more),
                // One bit per cell: growing by doubling costs next to nothing.
                CellColumn::Bool(_) => {}
            }
        }
    }

    fn push(&mut self, record: &T::Record<'_>) -> Result<()> {
        for (field, column) in T::all().iter().zip(&mut self.cells) {
            match (field.cell(record), column) {
                (Cell::Text(v), CellColumn::Text(c)) => c.push(v)?,
                (Cell::UInt(v), CellColumn::UInt(c)) => c.push(v),
                (Cell::UInt32(v), CellColumn::UInt32(c)) => c.push(v),
                (Cell::Float(v), CellColumn::Float(c)) => c.push(field.range().report(v)),
                (Cell::Bool(v), CellColumn::Bool(c)) => c.append_option(v),
                _ => unreachable!("a field's cell has the field's type"),
            }
        }
        self.rows += 1;
        Ok(())
    }

    fn arrays(self) -> Result<Vec<ArrayRef>> {
        self.cells
            .into_iter()
            .map(|c| -> Result<ArrayRef> {
                Ok(match c {
                    CellColumn::Text(v) => Arc::new(v.finish()?),
                    CellColumn::UInt(v) => Arc::new(v.finish()),
                    CellColumn::UInt32(v) => Arc::new(v.finish()),
                    CellColumn::Float(v) => Arc::new(v.finish()),
                    CellColumn::Bool(mut v) => Arc::new(v.finish()),
                })
            })
            .collect()
    }

    fn finish(self) -> Result<StructArray> {
        Ok(StructArray::try_new(T::fields(), self.arrays()?, None)?)
    }
}

/// A list column of records: the records of all rows and each row's offset.
struct RecordLists<T: RecordTable> {
    records: RecordColumns<T>,
    offsets: Vec<i32>,
}

impl<T: RecordTable> RecordLists<T> {
    fn new() -> Self {
        RecordLists {
            records: RecordColumns::new(),
            offsets: vec![0],
        }
    }

    /// Room for `more` lists as long, on average, as those pushed so far (at most
    /// [`RESERVE_LIMIT`] records: the first groups may be larger than the rest).
    fn reserve_like_pushed(&mut self, more: usize) {
        let lists = (self.offsets.len() - 1).max(1);
        self.records.reserve(likely_items(self.records.rows, lists, more));
        self.offsets.reserve(more);
    }

    fn push_row<'r>(&mut self, records: impl IntoIterator<Item = &'r T::Record<'r>>) -> Result<()>
    where
        T::Record<'r>: 'r,
    {
        for r in records {
            self.records.push(r)?;
        }
        self.offsets.push(offset(self.records.rows, "list entries")?);
        Ok(())
    }

    fn finish(self) -> Result<ArrayRef> {
        Ok(Arc::new(ListArray::try_new(
            Arc::new(Field::new("item", DataType::Struct(T::fields()), true)),
            OffsetBuffer::new(self.offsets.into()),
            Arc::new(self.records.finish()?),
            None,
        )?))
    }
}

/// A term row with only reportable numbers; an estimate lost that way is flagged, never a
/// silent NULL.
fn flag_lost_estimate(mut t: TermRow) -> TermRow {
    if t.flag.is_none() && t.estimate.is_some_and(|e| !e.is_finite()) {
        t.flag = Some("not estimated");
    }
    t
}

/// Builds a column of fit structs, one group at a time.
pub struct FitColumns {
    fits: RecordColumns<FitField>,
    terms: RecordLists<TermField>,
    predictors: RecordLists<PredictorField>,
    design: RecordLists<DesignField>,
    covariance: NumberCells<Float64Type>,
    covariance_offsets: Vec<i32>,
}

impl Default for FitColumns {
    fn default() -> Self {
        Self::new()
    }
}

/// Most items a list child reserves ahead (32 MiB of `f64`); beyond it the column grows as
/// it is filled.
const RESERVE_LIMIT: usize = 1 << 22;

/// Items for `more` lists at the average length of `lists` lists holding `items` in all,
/// capped at [`RESERVE_LIMIT`].
fn likely_items(items: usize, lists: usize, more: usize) -> usize {
    items.div_ceil(lists).saturating_mul(more).min(RESERVE_LIMIT)
}

impl FitColumns {
    pub fn new() -> Self {
        FitColumns {
            fits: RecordColumns::new(),
            terms: RecordLists::new(),
            predictors: RecordLists::new(),
            design: RecordLists::new(),
            covariance: NumberCells::new(),
            covariance_offsets: vec![0],
        }
    }

    /// Reserves room for `more` groups shaped, on average, like those pushed so far: one
    /// allocation per column instead of repeated doubling, each of which copies the column
    /// into fresh memory. List children are capped at [`RESERVE_LIMIT`] items, so a large
    /// first group cannot make the reservation for many small ones huge.
    pub fn reserve_like_pushed(&mut self, more: usize) {
        let groups = (self.covariance_offsets.len() - 1).max(1);
        self.fits.reserve(more);
        self.terms.reserve_like_pushed(more);
        self.predictors.reserve_like_pushed(more);
        self.design.reserve_like_pushed(more);
        self.covariance
            .reserve(likely_items(self.covariance.values.len(), groups, more));
        self.covariance_offsets.reserve(more);
    }

    /// Adds one group. `covariance` (terms x terms) is written only where both terms are
    /// estimated; elsewhere NULL.
    pub fn push(
        &mut self,
        report: &GroupReport<'_>,
        terms: Vec<TermRow>,
        predictors: &[PredictorInfo],
        design: &[DesignEntry],
        covariance: Option<&nalgebra::DMatrix<f64>>,
    ) -> Result<()> {
        self.fits.push(report)?;
        if let (Some(c), Some(fit)) = (covariance, report.fit) {
            let estimated = |j: usize| fit.states.get(j) == Some(&crate::glm::TermState::Estimated);
            for i in 0..c.nrows() {
                for j in 0..c.ncols() {
                    let v = (estimated(i) && estimated(j)).then(|| c[(i, j)]);
                    self.covariance.push(Range::Any.report(v));
                }
            }
        }
        self.covariance_offsets
            .push(offset(self.covariance.values.len(), "covariance entries")?);
        let terms: Vec<TermRow> = terms.into_iter().map(flag_lost_estimate).collect();
        self.terms.push_row(&terms)?;
        self.predictors.push_row(predictors)?;
        self.design.push_row(design)
    }

    pub fn finish(self) -> Result<StructArray> {
        let mut arrays = self.fits.arrays()?;
        arrays.push(self.terms.finish()?);
        arrays.push(self.predictors.finish()?);
        arrays.push(self.design.finish()?);
        arrays.push(Arc::new(ListArray::try_new(
            Arc::new(Field::new("item", DataType::Float64, true)),
            OffsetBuffer::new(self.covariance_offsets.into()),
            Arc::new(self.covariance.finish()),
            None,
        )?));
        Ok(StructArray::try_new(FIT_STRUCT.clone(), arrays, None)?)
    }
}

/// Typed reading of a column of fit structs (for the scalar functions, rendering, export and
/// tests): every field is named through the tables above.
pub struct FitReader<'a> {
    pub fits: &'a StructArray,
    terms: &'a ListArray,
    term_values: &'a StructArray,
    design: &'a ListArray,
    design_values: &'a StructArray,
    predictors: &'a ListArray,
    predictor_values: &'a StructArray,
    covariance: Option<&'a ListArray>,
}

impl<'a> FitReader<'a> {
    /// A reader over `a`; an error naming `function` when `a` is not a column of fits.
    pub fn new(function: &str, a: &'a ArrayRef) -> Result<FitReader<'a>> {
        let bad = || {
            DataFusionError::Execution(format!(
                "{function}: the first argument must be a fit (the result of poisson_fit, poisson_count_fit or linear_fit)"
            ))
        };
        Self::of(a.as_struct_opt().ok_or_else(bad)?).ok_or_else(bad)
    }

    /// A reader over a struct array, when it is a column of fits.
    pub fn of(fits: &'a StructArray) -> Option<FitReader<'a>> {
        if !is_fit_struct(fits.fields()) {
            return None;
        }
        let list = |name: &str| -> Option<(&'a ListArray, &'a StructArray)> {
            let l = fits.column_by_name(name).and_then(|c| c.as_list_opt::<i32>())?;
            Some((l, l.values().as_struct_opt()?))
        };
        let (terms, term_values) = list(TERMS)?;
        let (design, design_values) = list(DESIGN)?;
        let (predictors, predictor_values) = list(PREDICTORS)?;
        let covariance = fits.column_by_name(COVARIANCE).and_then(|c| c.as_list_opt::<i32>());
        Some(FitReader {
            covariance,
            fits,
            terms,
            term_values,
            design,
            design_values,
            predictors,
            predictor_values,
        })
    }

    pub fn len(&self) -> usize {
        self.fits.len()
    }

    pub fn is_empty(&self) -> bool {
        self.fits.is_empty()
    }

    pub fn is_null(&self, r: usize) -> bool {
        self.fits.is_null(r)
    }

    fn range(list: &ListArray, r: usize) -> std::ops::Range<usize> {
        let o = list.value_offsets();
        o[r] as usize..o[r + 1] as usize
    }

    /// Entries of `terms` of row `r`.
    pub fn term_range(&self, r: usize) -> std::ops::Range<usize> {
        Self::range(self.terms, r)
    }

    pub fn predictor_range(&self, r: usize) -> std::ops::Range<usize> {
        Self::range(self.predictors, r)
    }

    pub fn design_range(&self, r: usize) -> std::ops::Range<usize> {
        Self::range(self.design, r)
    }

    /// The term entries of all rows, as a struct column (for picking terms).
    pub fn term_values(&self) -> &'a StructArray {
        self.term_values
    }

    /// The terms of row `r` as a struct column.
    pub fn terms_of(&self, r: usize) -> StructArray {
        let range = self.term_range(r);
        self.term_values.slice(range.start, range.len())
    }

    pub fn text(&self, field: FitField, r: usize) -> Option<&'a str> {
        text_at(self.fits, field.name(), r)
    }

    pub fn float(&self, field: FitField, r: usize) -> Option<f64> {
        float_at(self.fits, field.name(), r)
    }

    pub fn uint(&self, field: FitField, r: usize) -> Option<u64> {
        let c = self
            .fits
            .column_by_name(field.name())?
            .as_primitive_opt::<UInt64Type>()?;
        (!c.is_null(r)).then(|| c.value(r))
    }

    pub fn family(&self, r: usize) -> Option<FamilyKind> {
        self.text(FitField::Family, r).and_then(FamilyKind::parse)
    }

    pub fn term_text(&self, field: TermField, i: usize) -> Option<&'a str> {
        text_at(self.term_values, field.name(), i)
    }

    pub fn term_float(&self, field: TermField, i: usize) -> Option<f64> {
        float_at(self.term_values, field.name(), i)
    }

    pub fn predictor_text(&self, field: PredictorField, i: usize) -> Option<&'a str> {
        text_at(self.predictor_values, field.name(), i)
    }

    /// The kind of predictor entry `i` (factor or a number).
    pub fn predictor_is_factor(&self, i: usize) -> bool {
        self.predictor_text(PredictorField::Kind, i) == Some(PredictorKind::Factor.report_name())
    }

    /// Entry (a, b) of row `r`'s coefficient covariance (terms numbered as in `terms`).
    pub fn covariance(&self, r: usize, a: usize, b: usize) -> Option<f64> {
        let list = self.covariance?;
        let p = self.term_range(r).len();
        let range = Self::range(list, r);
        if range.len() != p * p || a >= p || b >= p {
            return None;
        }
        let values = list.values().as_primitive_opt::<Float64Type>()?;
        let i = range.start + a * p + b;
        (!values.is_null(i)).then(|| values.value(i))
    }

    pub fn design_text(&self, field: DesignField, i: usize) -> Option<&'a str> {
        text_at(self.design_values, field.name(), i)
    }

    pub fn design_index(&self, field: DesignField, i: usize) -> Option<u32> {
        let c = self
            .design_values
            .column_by_name(field.name())?
            .as_primitive_opt::<UInt32Type>()?;
        (!c.is_null(i)).then(|| c.value(i))
    }
}

fn text_at<'a>(s: &'a StructArray, field: &str, i: usize) -> Option<&'a str> {
    let c = s.column_by_name(field)?.as_string_opt::<i32>()?;
    (!c.is_null(i)).then(|| c.value(i))
}

fn float_at(s: &StructArray, field: &str, i: usize) -> Option<f64> {
    let c = s.column_by_name(field)?.as_primitive_opt::<Float64Type>()?;
    (!c.is_null(i)).then(|| c.value(i))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Our bit packing against Arrow's own (`NullBuffer::from(Vec<bool>)`), across byte
    /// boundaries, and no bitmap at all for a column without NULLs.
    #[test]
    fn validity_bits_match_arrow_layout() {
        let pattern: Vec<bool> = (0..27).map(|i| i % 3 != 1 && i != 16).collect();
        let mut ours = Validity::default();
        pattern.iter().for_each(|&v| ours.append(v));
        assert_eq!(ours.finish(), Some(NullBuffer::from(pattern)));
        let mut all_valid = Validity::default();
        (0..9).for_each(|_| all_valid.append(true));
        assert_eq!(all_valid.finish(), None);
    }
}
