//! `poisson_fit`, `poisson_count_fit` and `linear_fit`: one model per group as an aggregate.
//!
//! The three share one implementation, parameterised by [`FitKind`]: the functions differ only
//! in their leading arguments and family. Rows are buffered per group ([`GroupRows`]); at
//! evaluation each group is fitted by the numerical core and reported as a struct
//! ([`result`](super::result)). The plain `Accumulator` is the groups accumulator run with one
//! group, so both paths share every line that computes.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{Array, ArrayRef, BooleanArray};
use datafusion::arrow::datatypes::{DataType, FieldRef};
use datafusion::common::ScalarValue;
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::function::{AccumulatorArgs, AggregateFunctionSimplification, StateFieldsArgs};
use datafusion::logical_expr::{
    Accumulator, AggregateUDF, AggregateUDFImpl, Documentation, EmitTo, GroupsAccumulator, Signature, Volatility,
};

use super::batch::Dictionary;
use super::buffer::{Column, GroupRows};
use super::patterns::GroupPatterns;
use super::result::{FitColumns, GroupResult, PredictorInfo, TermPart, fit_type};
use super::spec::{FitKind, FitSpec, classify, is_numeric_type, resolve_call, spec_at_execution};
use crate::glm::collapse::{Sums, fit_poisson_patterns};
use crate::glm::design::full_coded_factor;
use crate::glm::{
    Design, DesignSpec, FactorColumn, FitInput, Gaussian, Poisson, Predictor, PredictorValues, fit, term_table,
};

/// The aggregate UDF behind one fit function.
#[derive(Debug, PartialEq, Eq, Hash)]
pub struct FitFunction {
    kind: FitKind,
    signature: Signature,
}

impl FitFunction {
    pub fn new(kind: FitKind) -> Self {
        FitFunction {
            kind,
            signature: Signature::user_defined(Volatility::Immutable),
        }
    }
}

pub fn poisson_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::PoissonRate))
}
pub fn poisson_count_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::PoissonCount))
}
pub fn linear_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::Linear))
}

impl AggregateUDFImpl for FitFunction {
    fn name(&self) -> &str {
        self.kind.sql_name()
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }

    /// Responses, exposures and numeric predictors become Float64; text, boolean and dictionary
    /// predictors keep their type (they are factors).
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        let function = self.kind.sql_name();
        let lead = self.kind.leading();
        if arg_types.len() < lead {
            return Err(DataFusionError::Plan(format!(
                "{function} needs at least {lead} argument{} ({}), then predictors and an optional options string; got {}",
                if lead == 1 { "" } else { "s" },
                self.kind.leading_names().join(", "),
                arg_types.len()
            )));
        }
        arg_types
            .iter()
            .enumerate()
            .map(|(i, t)| {
                if i < lead {
                    if !is_numeric_type(t) {
                        return Err(DataFusionError::Plan(format!(
                            "{function}: {} must be numeric, got {t}",
                            self.kind.leading_names()[i]
                        )));
                    }
                    Ok(DataType::Float64)
                } else if t.is_integer() {
                    // Integer predictors keep an integer type: it marks designs whose rows can be
                    // collapsed into covariate patterns (see `patterns`).
                    Ok(DataType::Int64)
                } else if is_numeric_type(t) {
                    Ok(DataType::Float64)
                } else {
                    Ok(t.clone())
                }
            })
            .collect()
    }

    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(fit_type())
    }

    fn state_fields(&self, args: StateFieldsArgs) -> Result<Vec<FieldRef>> {
        let spec = spec_from_fields(self.kind, args.input_fields)?;
        let types: Vec<DataType> = args.input_fields.iter().map(|f| f.data_type().clone()).collect();
        Ok(if collapsible(self.kind, &spec, &types) {
            GroupPatterns::state_fields(&spec, args.name)
        } else {
            GroupRows::state_fields(self.kind, &spec, args.name)
        })
    }

    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        Ok(Box::new(SingleGroup(self.groups(&args)?)))
    }

    fn groups_accumulator_supported(&self, _args: AccumulatorArgs) -> bool {
        true
    }

    fn create_groups_accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn GroupsAccumulator>> {
        Ok(Box::new(self.groups(&args)?))
    }

    fn simplify(&self) -> Option<AggregateFunctionSimplification> {
        let kind = self.kind;
        Some(Box::new(move |call, info| resolve_call(kind, call, info)))
    }

    fn documentation(&self) -> Option<&Documentation> {
        Some(fit_documentation(self.kind))
    }
}

impl FitFunction {
    fn groups(&self, args: &AccumulatorArgs) -> Result<FitGroups> {
        let types: Vec<DataType> = args.expr_fields.iter().map(|f| f.data_type().clone()).collect();
        let (spec, _) = spec_at_execution(self.kind, args.exprs, &types)?;
        let buffer = if collapsible(self.kind, &spec, &types) {
            Buffer::Patterns(GroupPatterns::new(self.kind, spec))
        } else {
            Buffer::Rows(GroupRows::new(self.kind, spec))
        };
        Ok(FitGroups { buffer })
    }
}

/// Poisson fits whose predictors are all factors or integers keep pattern sums instead of rows.
/// `types` are the argument types after coercion (integers are Int64 then).
fn collapsible(kind: FitKind, spec: &FitSpec, types: &[DataType]) -> bool {
    let lead = kind.leading();
    kind != FitKind::Linear
        && types.len() >= lead + spec.predictors.len()
        && spec
            .predictors
            .iter()
            .zip(&types[lead..])
            .all(|(p, t)| p.factor || t.is_integer())
}

/// The spec implied by input field types alone (for state fields): predictors are the fields
/// after the leading ones, the last being the spec literal when it is text.
fn spec_from_fields(kind: FitKind, fields: &[FieldRef]) -> Result<FitSpec> {
    let mut end = fields.len();
    if end > kind.leading()
        && matches!(
            fields[end - 1].data_type(),
            DataType::Utf8 | DataType::Utf8View | DataType::LargeUtf8
        )
    {
        end -= 1;
    }
    let mut spec = FitSpec::empty()?;
    for f in &fields[kind.leading()..end] {
        let factor = classify(kind.sql_name(), f.name(), f.data_type())?;
        spec.predictors.push(super::spec::PredictorSpec {
            name: f.name().clone(),
            factor,
        });
    }
    Ok(spec)
}

/// The groups accumulator of a fit function.
#[derive(Debug)]
pub struct FitGroups {
    buffer: Buffer,
}

/// Rows, or (for factor/integer Poisson designs) pattern sums.
#[derive(Debug)]
enum Buffer {
    Rows(GroupRows),
    Patterns(GroupPatterns),
}

impl FitGroups {
    fn ensure_groups(&mut self, n: usize) {
        match &mut self.buffer {
            Buffer::Rows(b) => b.ensure_groups(n),
            Buffer::Patterns(b) => b.ensure_groups(n),
        }
    }
}

impl GroupsAccumulator for FitGroups {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        match &mut self.buffer {
            Buffer::Rows(b) => b.update(values, group_indices, opt_filter, total_num_groups),
            Buffer::Patterns(b) => b.update(values, group_indices, opt_filter, total_num_groups),
        }
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        let groups = match &mut self.buffer {
            Buffer::Rows(b) => GroupSource::Rows(b.take(emit_to)),
            Buffer::Patterns(b) => GroupSource::Patterns(b.take(emit_to)),
        };
        Ok(Arc::new(evaluate_groups(&groups)?))
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        match &mut self.buffer {
            Buffer::Rows(b) => b.take(emit_to).to_state(),
            Buffer::Patterns(b) => b.take(emit_to).to_state(),
        }
    }

    fn merge_batch(&mut self, values: &[ArrayRef], group_indices: &[usize], total_num_groups: usize) -> Result<()> {
        match &mut self.buffer {
            Buffer::Rows(b) => b.merge(values, group_indices, total_num_groups),
            Buffer::Patterns(b) => b.merge(values, group_indices, total_num_groups),
        }
    }

    fn convert_to_state(&self, values: &[ArrayRef], opt_filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        match &self.buffer {
            Buffer::Rows(b) => b.convert_to_state(values, opt_filter),
            Buffer::Patterns(b) => b.convert_to_state(values, opt_filter),
        }
    }

    fn size(&self) -> usize {
        match &self.buffer {
            Buffer::Rows(b) => b.size(),
            Buffer::Patterns(b) => b.size(),
        }
    }
}

/// The plain accumulator: the groups accumulator with a single group.
#[derive(Debug)]
struct SingleGroup(FitGroups);

impl Accumulator for SingleGroup {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let n = values.first().map_or(0, |a| a.len());
        self.0.update_batch(values, &vec![0; n], None, 1)
    }

    fn evaluate(&mut self) -> Result<ScalarValue> {
        self.0.ensure_groups(1);
        let array = self.0.evaluate(EmitTo::All)?;
        ScalarValue::try_from_array(&array, 0)
    }

    fn size(&self) -> usize {
        self.0.size() + std::mem::size_of::<Self>()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        self.0.ensure_groups(1);
        let arrays = self.0.state(EmitTo::All)?;
        arrays.iter().map(|a| ScalarValue::try_from_array(a, 0)).collect()
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let n = states.first().map_or(0, |a| a.len());
        self.0.merge_batch(states, &vec![0; n], 1)
    }
}

/// The groups to fit, taken out of a buffer.
pub enum GroupSource {
    Rows(GroupRows),
    Patterns(GroupPatterns),
}

/// Fits every group and returns one struct per group.
pub fn evaluate_groups(groups: &GroupSource) -> Result<datafusion::arrow::array::StructArray> {
    let mut out = FitColumns::new();
    match groups {
        GroupSource::Rows(rows) => {
            let (offsets, mut order) = rows.buckets();
            let label_hashes = rows.label_hashes();
            for g in 0..rows.num_groups() {
                let idx = &mut order[offsets[g]..offsets[g + 1]];
                rows.sort_canonically(idx, &label_hashes);
                fit_group(&GroupData::from_rows(rows, g, idx), &mut out)?;
            }
        }
        GroupSource::Patterns(patterns) => {
            let (offsets, mut order) = patterns.buckets();
            for g in 0..patterns.num_groups() {
                let slots = &mut order[offsets[g]..offsets[g + 1]];
                patterns.sort_canonically(slots);
                fit_group(&GroupData::from_patterns(patterns, g, slots), &mut out)?;
            }
        }
    }
    Ok(out.finish())
}

/// What the design rows of one group stand for.
enum Response {
    /// One design row per data row.
    Rows { y: Vec<f64>, exposure: Vec<f64> },
    /// One design row per covariate pattern, with the sums of its rows.
    Patterns(Vec<Sums>),
}

/// One group's data: predictor values per design row, and the response.
struct GroupData<'a> {
    kind: FitKind,
    spec: &'a FitSpec,
    dictionaries: &'a [Dictionary],
    skipped: u64,
    invalid: u64,
    /// Per predictor: numbers, or dictionary codes.
    columns: Vec<Column>,
    response: Response,
}

impl<'a> GroupData<'a> {
    fn from_rows(rows: &'a GroupRows, g: usize, idx: &[usize]) -> Self {
        GroupData {
            kind: rows.kind,
            spec: &rows.spec,
            dictionaries: &rows.dictionaries,
            skipped: rows.skipped[g],
            invalid: rows.invalid[g],
            columns: rows
                .columns
                .iter()
                .map(|c| match c {
                    Column::Numeric(v) => Column::Numeric(idx.iter().map(|&i| v[i]).collect()),
                    Column::Factor(codes) => Column::Factor(idx.iter().map(|&i| codes[i]).collect()),
                })
                .collect(),
            response: Response::Rows {
                y: idx.iter().map(|&i| rows.y[i]).collect(),
                exposure: idx.iter().map(|&i| rows.exposure[i]).collect(),
            },
        }
    }

    fn from_patterns(p: &'a GroupPatterns, g: usize, slots: &[usize]) -> Self {
        GroupData {
            kind: p.kind,
            spec: &p.spec,
            dictionaries: &p.dictionaries,
            skipped: p.skipped[g],
            invalid: p.invalid[g],
            columns: p
                .spec
                .predictors
                .iter()
                .enumerate()
                .map(|(k, pred)| {
                    if pred.factor {
                        Column::Factor(slots.iter().map(|&s| p.value(s, k) as u32).collect())
                    } else {
                        Column::Numeric(slots.iter().map(|&s| p.number(s, k)).collect())
                    }
                })
                .collect(),
            response: Response::Patterns(slots.iter().map(|&s| p.sums[s]).collect()),
        }
    }

    /// Number of design rows.
    fn design_rows(&self) -> usize {
        match &self.response {
            Response::Rows { y, .. } => y.len(),
            Response::Patterns(s) => s.len(),
        }
    }

    /// Number of data rows used.
    fn data_rows(&self) -> usize {
        match &self.response {
            Response::Rows { y, .. } => y.len(),
            Response::Patterns(s) => s.iter().map(Sums::rows).sum(),
        }
    }

    fn totals(&self) -> (f64, f64) {
        match &self.response {
            Response::Rows { y, exposure } => (y.iter().sum(), exposure.iter().sum()),
            Response::Patterns(s) => (
                s.iter().map(Sums::total_count).sum(),
                s.iter().map(Sums::total_exposure).sum(),
            ),
        }
    }
}

/// Per-group factor levels: the labels that occur, sorted, with the reference first.
struct GroupFactor {
    codes: Vec<u32>,
    levels: Vec<String>,
    reference: usize,
}

/// The group's levels of a factor and its codes renumbered to them (levels in label order).
fn group_factor(codes: &[u32], dictionary: &Dictionary) -> (Vec<u32>, Vec<String>) {
    let mut present: Vec<u32> = codes.to_vec();
    present.sort_unstable();
    present.dedup();
    let mut by_label: Vec<usize> = (0..present.len()).collect();
    by_label.sort_by(|&a, &b| dictionary.labels[present[a] as usize].cmp(&dictionary.labels[present[b] as usize]));
    let mut rank = vec![0u32; present.len()];
    for (r, &k) in by_label.iter().enumerate() {
        rank[k] = r as u32;
    }
    let levels = by_label
        .iter()
        .map(|&k| dictionary.labels[present[k] as usize].clone())
        .collect();
    let local = codes
        .iter()
        .map(|c| rank[present.binary_search(c).unwrap_or(0)])
        .collect();
    (local, levels)
}

fn fit_group(data: &GroupData<'_>, out: &mut FitColumns) -> Result<()> {
    let spec = data.spec;
    let settings = &spec.settings;
    let n = data.design_rows();
    let mut factors: Vec<Option<GroupFactor>> = Vec::new();
    let mut problem: Option<String> = None;
    for ((c, p), dictionary) in data.columns.iter().zip(&spec.predictors).zip(data.dictionaries) {
        match c {
            Column::Numeric(_) => factors.push(None),
            Column::Factor(codes) => {
                let (group_codes, levels) = group_factor(codes, dictionary);
                let reference = match settings.references.get(&p.name) {
                    None => 0,
                    Some(r) => match levels.iter().position(|l| l == r) {
                        Some(k) => k,
                        None => {
                            if n > 0 {
                                problem.get_or_insert(format!(
                                    "reference level {r} of {} does not occur in this group (levels: {})",
                                    p.name,
                                    levels.join(", ")
                                ));
                            }
                            0
                        }
                    },
                };
                factors.push(Some(GroupFactor {
                    codes: group_codes,
                    levels,
                    reference,
                }));
            }
        }
    }
    let predictors: Vec<Predictor<'_>> = spec
        .predictors
        .iter()
        .enumerate()
        .map(|(k, p)| Predictor {
            name: &p.name,
            values: match (&data.columns[k], &factors[k]) {
                (Column::Numeric(v), _) => PredictorValues::Numeric(v),
                (_, Some(f)) => PredictorValues::Factor(FactorColumn {
                    codes: &f.codes,
                    levels: &f.levels,
                    reference: f.reference,
                }),
                _ => unreachable!("factor columns have group levels"),
            },
        })
        .collect();
    let full = full_coded_factor(settings.intercept, factors.iter().map(Option::is_some));
    let infos: Vec<PredictorInfo> = spec
        .predictors
        .iter()
        .zip(&factors)
        .enumerate()
        .map(|(k, (p, f))| PredictorInfo {
            name: p.name.clone(),
            factor: p.factor,
            // A factor coded with every level has no reference level.
            reference: f
                .as_ref()
                .filter(|_| full != Some(k))
                .and_then(|f| f.levels.get(f.reference).cloned()),
        })
        .collect();
    let family = if data.kind == FitKind::Linear {
        "gaussian"
    } else {
        "poisson"
    };
    let counted = data.kind != FitKind::Linear;
    let (total_count, total_exposure) = data.totals();
    let base = |status: String, terms| GroupResult {
        status,
        family,
        fit: None,
        n_used: data.data_rows() as u64,
        n_skipped: data.skipped,
        n_invalid: data.invalid,
        terms,
        parts: Vec::new(),
        predictors: infos.clone(),
        se_type: &settings.se,
        level: settings.level,
        total_count: counted.then_some(total_count),
        total_exposure: (data.kind == FitKind::PoissonRate).then_some(total_exposure),
    };
    let design_spec = DesignSpec {
        intercept: settings.intercept,
        predictors,
        interactions: spec.interactions.clone(),
    };
    let design = match (&problem, Design::build(n, &design_spec)) {
        (Some(p), _) => {
            out.push(base(p.clone(), Vec::new()));
            return Ok(());
        }
        // A too-wide design is a property of this group's data: it is reported on the group.
        (None, Err(e)) => {
            out.push(GroupResult {
                parts: Vec::new(),
                ..base(format!("not fitted: {e}"), Vec::new())
            });
            return Ok(());
        }
        (None, Ok(d)) => d,
    };
    let parts: Vec<TermPart> = design.sources().iter().map(TermPart::from_source).collect();
    let function = data.kind.sql_name();
    let fitted = match &data.response {
        Response::Patterns(sums) => fit_poisson_patterns(&design, sums, settings.fit_options()),
        Response::Rows { y, exposure } => {
            let offset: Option<Vec<f64>> =
                (data.kind == FitKind::PoissonRate).then(|| exposure.iter().map(|e| e.ln()).collect());
            let input = FitInput {
                y,
                offset: offset.as_deref(),
                weights: None,
            };
            match data.kind {
                FitKind::Linear => fit(&Gaussian, &design, input, settings.fit_options()),
                _ => fit(&Poisson, &design, input, settings.fit_options()),
            }
        }
    }
    .map_err(|e| DataFusionError::Execution(format!("{function}: {e}")))?;
    let mut terms = term_table(&fitted, settings.se_type(), settings.level)
        .map_err(|e| DataFusionError::Execution(e.to_string()))?;
    let mut status = fitted.status();
    if !spec.ratio_scale {
        for t in &mut terms {
            (t.rate_ratio, t.rr_low, t.rr_high) = (None, None, None);
        }
        status.push_str(NO_RATIO_NOTE);
    }
    out.push(GroupResult {
        fit: Some(&fitted),
        parts,
        ..base(status, terms)
    });
    Ok(())
}

/// Appended to the status of a least-squares fit whose response is not a logarithm: exp of its
/// coefficients is no ratio, so the `rate_ratio`, `rr_low` and `rr_high` fields are NULL.
const NO_RATIO_NOTE: &str =
    "; rate ratios not reported (the response is not a natural logarithm; write ln(...) or the option response=log)";

static POISSON_FIT_DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits a Poisson rate model log(mu) = log(exposure) + b0 + b1*x1 + ... to the rows of each group \
         and returns the fit as a struct: status, counts, deviance, Pearson chi-square, dispersion, \
         goodness-of-fit and likelihood-ratio tests, the overdispersion test, log-likelihood, AIC/BIC and \
         `terms`, one entry per coefficient with estimate, standard error, z, p-value, confidence interval, \
         rate ratio exp(b) and its interval. Text and boolean predictors are factors (treatment coding, \
         reference = first level in sorted order unless ref.<name> says otherwise). Rows with a NULL are \
         skipped and counted in n_skipped.",
        "poisson_fit(count, exposure, predictor, ... [, 'options'])",
    )
    .with_argument("count", "Event count per row (>= 0).")
    .with_argument("exposure", "Exposure per row (> 0), e.g. km-years of pipe; the offset is log(exposure).")
    .with_argument("predictor", "Numeric, text or boolean expressions; interaction(a, b) adds a product term.")
    .with_argument(
        "options",
        "Optional literal 'key=value, ...': level, se (model|quasi|hc0|hc1), invalid (error|skip), \
         intercept (yes|no), max_iter, tol, ref.<predictor>=<level>.",
    )
    .with_sql_example(
        "SELECT fit_term(poisson_fit(breaks, km_years, material, 'ref.material=iron'), 'material=pvc')['rate_ratio'] AS rr\n\
         FROM (VALUES (12, 40.0, 'iron'), (9, 35.0, 'iron'), (3, 30.0, 'pvc'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});

static POISSON_COUNT_FIT_DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits a Poisson model log(mu) = b0 + b1*x1 + ... to plain counts (every row has the same exposure). \
         Same result struct and options as poisson_fit.",
        "poisson_count_fit(count, predictor, ... [, 'options'])",
    )
    .with_argument("count", "Event count per row (>= 0).")
    .with_argument(
        "predictor",
        "Numeric, text or boolean expressions; interaction(a, b) adds a product term.",
    )
    .with_argument("options", "Optional literal 'key=value, ...' (see poisson_fit).")
    .with_sql_example(
        "SELECT poisson_count_fit(callouts, season)['dispersion'] AS dispersion\n\
         FROM (VALUES (5, 'winter'), (7, 'winter'), (2, 'summer'), (3, 'summer')) AS t(callouts, season);",
    )
    .build()
});

static LINEAR_FIT_DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits an ordinary least-squares model y = b0 + b1*x1 + ... per group, with the same result struct: \
         `z` holds t statistics (p-values and intervals from Student t on df_resid), `dispersion` the \
         residual variance, f_stat/f_p the F test against the intercept-only model. With y = ln(count + 1), \
         exp(estimate) (the rate_ratio field) reads as a relative change in the geometric mean; for any other \
         response the rate ratio fields are NULL and the status says why (option response=log|plain overrides \
         the detection of ln(...)).",
        "linear_fit(y, predictor, ... [, 'options'])",
    )
    .with_argument("y", "Numeric response.")
    .with_argument("predictor", "Numeric, text or boolean expressions.")
    .with_argument("options", "Optional literal 'key=value, ...' (see poisson_fit).")
    .with_sql_example(
        "SELECT fit_term(linear_fit(ln(breaks + 1), age), 'age')['estimate'] AS slope\n\
         FROM (VALUES (1, 10.0), (3, 20.0), (4, 30.0), (9, 40.0)) AS t(breaks, age);",
    )
    .build()
});

fn fit_documentation(kind: FitKind) -> &'static Documentation {
    match kind {
        FitKind::PoissonRate => &POISSON_FIT_DOC,
        FitKind::PoissonCount => &POISSON_COUNT_FIT_DOC,
        FitKind::Linear => &LINEAR_FIT_DOC,
    }
}

/// The documentation section all ratesheet functions are listed under.
pub const DOC_SECTION: datafusion::logical_expr::DocSection = datafusion::logical_expr::DocSection {
    include: true,
    label: "Rate models",
    description: Some("ratesheet's model-fitting and rate functions"),
};
