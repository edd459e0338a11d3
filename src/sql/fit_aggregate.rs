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

use super::buffer::{Column, GroupRows};
use super::result::{FitColumns, GroupResult, PredictorInfo, TermPart, fit_type};
use super::spec::{FitKind, FitSpec, classify, is_numeric_type, resolve_call, spec_at_execution};
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
        Ok(GroupRows::state_fields(self.kind, &spec, args.name))
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
        Ok(FitGroups {
            rows: GroupRows::new(self.kind, spec),
        })
    }
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
    rows: GroupRows,
}

impl GroupsAccumulator for FitGroups {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        self.rows.update(values, group_indices, opt_filter, total_num_groups)
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        let taken = self.rows.take(emit_to);
        Ok(Arc::new(evaluate_groups(&taken)?))
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        self.rows.take(emit_to).to_state()
    }

    fn merge_batch(&mut self, values: &[ArrayRef], group_indices: &[usize], total_num_groups: usize) -> Result<()> {
        self.rows.merge(values, group_indices, total_num_groups)
    }

    fn convert_to_state(&self, values: &[ArrayRef], opt_filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        self.rows.convert_to_state(values, opt_filter)
    }

    fn size(&self) -> usize {
        self.rows.size()
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
        self.0.rows.ensure_groups(1);
        let array = self.0.evaluate(EmitTo::All)?;
        ScalarValue::try_from_array(&array, 0)
    }

    fn size(&self) -> usize {
        self.0.size() + std::mem::size_of::<Self>()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        self.0.rows.ensure_groups(1);
        let arrays = self.0.state(EmitTo::All)?;
        arrays.iter().map(|a| ScalarValue::try_from_array(a, 0)).collect()
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let n = states.first().map_or(0, |a| a.len());
        self.0.merge_batch(states, &vec![0; n], 1)
    }
}

/// Fits every group of `rows` and returns one struct per group.
pub fn evaluate_groups(rows: &GroupRows) -> Result<datafusion::arrow::array::StructArray> {
    let mut out = FitColumns::new();
    let by_group = rows.rows_by_group();
    for (g, idx) in by_group.iter().enumerate() {
        fit_group(rows, g, idx, &mut out)?;
    }
    Ok(out.finish())
}

/// Per-group factor levels: the labels that occur, sorted, with the reference first.
struct GroupFactor {
    codes: Vec<u32>,
    levels: Vec<String>,
    reference: usize,
}

fn fit_group(rows: &GroupRows, g: usize, idx: &[usize], out: &mut FitColumns) -> Result<()> {
    let spec = &rows.spec;
    let settings = &spec.settings;
    let n = idx.len();
    let y: Vec<f64> = idx.iter().map(|&i| rows.y[i]).collect();
    let exposure: Vec<f64> = idx.iter().map(|&i| rows.exposure[i]).collect();
    let mut numeric: Vec<Option<Vec<f64>>> = Vec::new();
    let mut factors: Vec<Option<GroupFactor>> = Vec::new();
    let mut problem: Option<String> = None;
    for (c, p) in rows.columns.iter().zip(&spec.predictors) {
        match c {
            Column::Numeric(v) => {
                numeric.push(Some(idx.iter().map(|&i| v[i]).collect()));
                factors.push(None);
            }
            Column::Factor { codes, dictionary } => {
                let mut present: Vec<u32> = idx.iter().map(|&i| codes[i]).collect();
                present.sort_unstable();
                present.dedup();
                let mut levels: Vec<String> = present.iter().map(|&c| dictionary.labels[c as usize].clone()).collect();
                levels.sort();
                let local: std::collections::HashMap<&str, u32> =
                    levels.iter().enumerate().map(|(k, l)| (l.as_str(), k as u32)).collect();
                let group_codes = idx
                    .iter()
                    .map(|&i| local[dictionary.labels[codes[i] as usize].as_str()])
                    .collect();
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
                numeric.push(None);
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
            values: match (&numeric[k], &factors[k]) {
                (Some(v), _) => PredictorValues::Numeric(v),
                (None, Some(f)) => PredictorValues::Factor(FactorColumn {
                    codes: &f.codes,
                    levels: &f.levels,
                    reference: f.reference,
                }),
                _ => unreachable!(),
            },
        })
        .collect();
    let parts = term_parts(settings.intercept, &factors, &spec.interactions);
    let infos: Vec<PredictorInfo> = spec
        .predictors
        .iter()
        .zip(&factors)
        .map(|(p, f)| PredictorInfo {
            name: p.name.clone(),
            factor: p.factor,
            reference: f.as_ref().and_then(|f| f.levels.get(f.reference).cloned()),
        })
        .collect();
    let family = if rows.kind == FitKind::Linear {
        "gaussian"
    } else {
        "poisson"
    };
    let counted = rows.kind != FitKind::Linear;
    let base = |status: String, terms| GroupResult {
        status,
        family,
        fit: None,
        n_used: n as u64,
        n_skipped: rows.skipped[g],
        n_invalid: rows.invalid[g],
        terms,
        parts: parts.clone(),
        predictors: infos.clone(),
        se_type: &settings.se,
        level: settings.level,
        total_count: counted.then(|| y.iter().sum()),
        total_exposure: (rows.kind == FitKind::PoissonRate).then(|| exposure.iter().sum()),
    };
    let design_spec = DesignSpec {
        intercept: settings.intercept,
        predictors,
        interactions: spec.interactions.clone(),
    };
    let design = match (&problem, Design::build(n, &design_spec)) {
        (Some(p), _) => {
            out.push(GroupResult {
                parts: Vec::new(),
                ..base(p.clone(), Vec::new())
            });
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
    debug_assert_eq!(design.n_columns(), parts.len());
    let offset: Option<Vec<f64>> =
        (rows.kind == FitKind::PoissonRate).then(|| exposure.iter().map(|e| e.ln()).collect());
    let input = FitInput {
        y: &y,
        offset: offset.as_deref(),
        weights: None,
    };
    let fitted = match rows.kind {
        FitKind::Linear => fit(&Gaussian, &design, input, settings.fit_options()),
        _ => fit(&Poisson, &design, input, settings.fit_options()),
    }
    .map_err(|e| DataFusionError::Execution(format!("{}: {e}", rows.kind.sql_name())))?;
    let terms = term_table(&fitted, settings.se_type(), settings.level)
        .map_err(|e| DataFusionError::Execution(e.to_string()))?;
    out.push(GroupResult {
        fit: Some(&fitted),
        ..base(fitted.status(), terms)
    });
    Ok(())
}

/// How each design column is built, in the core's column order (see `glm::design`).
fn term_parts(intercept: bool, factors: &[Option<GroupFactor>], interactions: &[(usize, usize)]) -> Vec<TermPart> {
    let pieces = |k: usize| -> Vec<(u32, Option<String>)> {
        match &factors[k] {
            None => vec![(k as u32, None)],
            Some(f) => f
                .levels
                .iter()
                .enumerate()
                .filter(|(c, _)| *c != f.reference)
                .map(|(_, l)| (k as u32, Some(l.clone())))
                .collect(),
        }
    };
    let mut parts = Vec::new();
    if intercept {
        parts.push(TermPart {
            predictor: None,
            level: None,
            predictor2: None,
            level2: None,
        });
    }
    for k in 0..factors.len() {
        for (p, l) in pieces(k) {
            parts.push(TermPart {
                predictor: Some(p),
                level: l,
                predictor2: None,
                level2: None,
            });
        }
    }
    for &(a, b) in interactions {
        for (pa, la) in pieces(a) {
            for (pb, lb) in pieces(b) {
                parts.push(TermPart {
                    predictor: Some(pa),
                    level: la.clone(),
                    predictor2: Some(pb),
                    level2: lb,
                });
            }
        }
    }
    parts
}

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
         exp(estimate) (the rate_ratio field) reads as a relative change in the geometric mean.",
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
