//! The Arrow struct a fit returns, and its builder.
//!
//! Field names marked "fixed" in the SQL contract (`n_used`, `n_skipped`, `n_params`,
//! `df_resid`, `converged`, `iterations`, `status`, `deviance`, `null_deviance`,
//! `pearson_chi2`, `dispersion`, `loglik`, `aic`, `bic`, `se_type`, `level`, `terms` and the
//! term fields) must never change; the others are ours and documented in the README.

use std::sync::{Arc, LazyLock};

use datafusion::arrow::array::{
    ArrayRef, BooleanArray, Float64Array, ListArray, StringArray, StructArray, UInt32Array, UInt64Array,
};
use datafusion::arrow::buffer::OffsetBuffer;
use datafusion::arrow::datatypes::{DataType, Field, Fields};

use crate::glm::design::{ColumnSource, SourcePart};
use crate::glm::{GlmFit, TermRow};

/// Fields of one term (fixed names).
pub static TERM_FIELDS: LazyLock<Fields> = LazyLock::new(|| {
    let f = |name: &str, t: DataType| Field::new(name, t, true);
    Fields::from(vec![
        f("term", DataType::Utf8),
        f("estimate", DataType::Float64),
        f("std_error", DataType::Float64),
        f("z", DataType::Float64),
        f("p_value", DataType::Float64),
        f("ci_low", DataType::Float64),
        f("ci_high", DataType::Float64),
        f("rate_ratio", DataType::Float64),
        f("rr_low", DataType::Float64),
        f("rr_high", DataType::Float64),
        f("flag", DataType::Utf8),
    ])
});

/// Fields describing a predictor (used by scoring).
pub static PREDICTOR_FIELDS: LazyLock<Fields> = LazyLock::new(|| {
    Fields::from(vec![
        Field::new("name", DataType::Utf8, true),
        Field::new("kind", DataType::Utf8, true),
        Field::new("reference", DataType::Utf8, true),
    ])
});

/// How each term is built from the predictors (used by scoring): predictor indices and, for
/// factor parts, the level; both NULL for the intercept, `predictor2` NULL for a main effect.
pub static DESIGN_FIELDS: LazyLock<Fields> = LazyLock::new(|| {
    Fields::from(vec![
        Field::new("term", DataType::Utf8, true),
        Field::new("predictor", DataType::UInt32, true),
        Field::new("level", DataType::Utf8, true),
        Field::new("predictor2", DataType::UInt32, true),
        Field::new("level2", DataType::Utf8, true),
    ])
});

fn list_of(fields: &Fields) -> DataType {
    DataType::List(Arc::new(Field::new("item", DataType::Struct(fields.clone()), true)))
}

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

/// Names, types and ranges of the fit-level fields, in order.
const FIT_FIELDS: &[(&str, DataType, Range)] = &[
    ("status", DataType::Utf8, Range::Any),
    ("family", DataType::Utf8, Range::Any),
    ("n_used", DataType::UInt64, Range::Any),
    ("n_skipped", DataType::UInt64, Range::Any),
    ("n_invalid", DataType::UInt64, Range::Any),
    ("n_params", DataType::UInt64, Range::Any),
    ("rank", DataType::UInt64, Range::Any),
    ("df_resid", DataType::UInt64, Range::Any),
    ("converged", DataType::Boolean, Range::Any),
    ("iterations", DataType::UInt64, Range::Any),
    ("deviance", DataType::Float64, Range::NonNegative),
    ("null_deviance", DataType::Float64, Range::NonNegative),
    ("pearson_chi2", DataType::Float64, Range::NonNegative),
    ("dispersion", DataType::Float64, Range::NonNegative),
    ("deviance_df", DataType::Float64, Range::NonNegative),
    ("deviance_p", DataType::Float64, Range::Probability),
    ("pearson_p", DataType::Float64, Range::Probability),
    ("lr_chi2", DataType::Float64, Range::NonNegative),
    ("lr_df", DataType::UInt64, Range::Any),
    ("lr_p", DataType::Float64, Range::Probability),
    ("f_stat", DataType::Float64, Range::NonNegative),
    ("f_p", DataType::Float64, Range::Probability),
    ("overdispersion_z", DataType::Float64, Range::Any),
    ("overdispersion_p", DataType::Float64, Range::Probability),
    ("loglik", DataType::Float64, Range::Any),
    ("aic", DataType::Float64, Range::Any),
    ("bic", DataType::Float64, Range::Any),
    ("total_count", DataType::Float64, Range::NonNegative),
    ("total_exposure", DataType::Float64, Range::NonNegative),
    ("crude_rate", DataType::Float64, Range::NonNegative),
    ("se_type", DataType::Utf8, Range::Any),
    ("level", DataType::Float64, Range::Probability),
];

/// The full struct type returned by `poisson_fit`, `poisson_count_fit` and `linear_fit`.
pub static FIT_FIELDS_ALL: LazyLock<Fields> = LazyLock::new(|| {
    let mut fields: Vec<Field> = FIT_FIELDS
        .iter()
        .map(|(n, t, _)| Field::new(*n, t.clone(), true))
        .collect();
    fields.push(Field::new("terms", list_of(&TERM_FIELDS), true));
    fields.push(Field::new("predictors", list_of(&PREDICTOR_FIELDS), true));
    fields.push(Field::new("design", list_of(&DESIGN_FIELDS), true));
    Fields::from(fields)
});

pub fn fit_type() -> DataType {
    DataType::Struct(FIT_FIELDS_ALL.clone())
}

pub fn term_type() -> DataType {
    DataType::Struct(TERM_FIELDS.clone())
}

/// Predictor description for the result.
#[derive(Debug, Clone)]
pub struct PredictorInfo {
    pub name: String,
    pub factor: bool,
    pub reference: Option<String>,
}

/// One design column's construction, as the `design` field lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct TermPart {
    pub predictor: Option<u32>,
    pub level: Option<String>,
    pub predictor2: Option<u32>,
    pub level2: Option<String>,
}

impl TermPart {
    pub fn from_source(source: &ColumnSource) -> TermPart {
        let split = |p: &SourcePart| (Some(p.predictor as u32), p.level.clone());
        let ((predictor, level), (predictor2, level2)) = match source {
            ColumnSource::Intercept | ColumnSource::Given => ((None, None), (None, None)),
            ColumnSource::Main(a) => (split(a), (None, None)),
            ColumnSource::Product(a, b) => (split(a), split(b)),
        };
        TermPart {
            predictor,
            level,
            predictor2,
            level2,
        }
    }
}

/// Everything reported for one group.
pub struct GroupResult<'a> {
    pub status: String,
    pub family: &'static str,
    pub n_used: u64,
    pub n_skipped: u64,
    pub n_invalid: u64,
    pub fit: Option<&'a GlmFit>,
    pub terms: Vec<TermRow>,
    pub parts: Vec<TermPart>,
    pub predictors: Vec<PredictorInfo>,
    pub se_type: &'a str,
    pub level: f64,
    pub total_count: Option<f64>,
    pub total_exposure: Option<f64>,
}

#[derive(Default)]
pub struct FitColumns {
    text: Vec<Vec<Option<String>>>,
    uints: Vec<Vec<Option<u64>>>,
    floats: Vec<Vec<Option<f64>>>,
    bools: Vec<Vec<Option<bool>>>,
    terms: Vec<TermRow>,
    term_offsets: Vec<i32>,
    predictors: Vec<PredictorInfo>,
    predictor_offsets: Vec<i32>,
    design: Vec<(String, TermPart)>,
    design_offsets: Vec<i32>,
}

/// A term row with only reportable numbers; an estimate lost that way is flagged, never a
/// silent NULL.
fn reportable_term(mut t: TermRow) -> TermRow {
    if t.flag.is_none() && t.estimate.is_some_and(|e| !e.is_finite()) {
        t.flag = Some("not estimated");
    }
    for (v, range) in [
        (&mut t.estimate, Range::Any),
        (&mut t.std_error, Range::NonNegative),
        (&mut t.statistic, Range::Any),
        (&mut t.p_value, Range::Probability),
        (&mut t.ci_low, Range::Any),
        (&mut t.ci_high, Range::Any),
        (&mut t.rate_ratio, Range::NonNegative),
        (&mut t.rr_low, Range::NonNegative),
        (&mut t.rr_high, Range::NonNegative),
    ] {
        *v = range.report(*v);
    }
    t
}

enum Value {
    Text(Option<String>),
    UInt(Option<u64>),
    Float(Option<f64>),
    Bool(Option<bool>),
}

impl FitColumns {
    pub fn new() -> Self {
        FitColumns {
            term_offsets: vec![0],
            predictor_offsets: vec![0],
            design_offsets: vec![0],
            ..Default::default()
        }
    }

    pub fn push(&mut self, g: GroupResult<'_>) {
        use crate::glm::inference::{gof_p_value, model_test};
        let fit = g.fit;
        let stats = fit.map(|f| &f.stats);
        let test = fit.and_then(model_test);
        let (lr, f_test) = match test {
            Some(t) if t.df_denominator.is_none() => (Some(t), None),
            Some(t) => (None, Some(t)),
            None => (None, None),
        };
        let od = stats.and_then(|s| s.extra.overdispersion);
        let values = [
            Value::Text(Some(g.status)),
            Value::Text(Some(g.family.to_string())),
            Value::UInt(Some(g.n_used)),
            Value::UInt(Some(g.n_skipped)),
            Value::UInt(Some(g.n_invalid)),
            Value::UInt(Some(g.parts.len() as u64)),
            Value::UInt(stats.map(|s| s.rank as u64)),
            Value::UInt(stats.and_then(|s| s.df_resid).map(|d| d as u64)),
            Value::Bool(Some(fit.is_some_and(|f| f.converged))),
            Value::UInt(Some(fit.map_or(0, |f| f.iterations as u64))),
            Value::Float(stats.and_then(|s| s.deviance)),
            Value::Float(stats.and_then(|s| s.null_deviance)),
            Value::Float(stats.and_then(|s| s.pearson_chi2)),
            Value::Float(fit.and_then(GlmFit::dispersion)),
            Value::Float(fit.and_then(GlmFit::deviance_per_df)),
            Value::Float(
                stats
                    .and_then(|s| gof_p_value(s.deviance, s.df_resid))
                    .filter(|_| fixed_scale(fit)),
            ),
            Value::Float(
                stats
                    .and_then(|s| gof_p_value(s.pearson_chi2, s.df_resid))
                    .filter(|_| fixed_scale(fit)),
            ),
            Value::Float(lr.map(|t| t.statistic)),
            Value::UInt(lr.map(|t| t.df as u64)),
            Value::Float(lr.map(|t| t.p_value)),
            Value::Float(f_test.map(|t| t.statistic)),
            Value::Float(f_test.map(|t| t.p_value)),
            Value::Float(od.map(|t| t.statistic)),
            Value::Float(od.map(|t| t.p_value)),
            Value::Float(stats.and_then(|s| s.loglik)),
            Value::Float(stats.and_then(|s| s.aic)),
            Value::Float(stats.and_then(|s| s.bic)),
            Value::Float(g.total_count),
            Value::Float(g.total_exposure),
            Value::Float(match (g.total_count, g.total_exposure) {
                (Some(c), Some(e)) if e > 0.0 => Some(c / e),
                _ => None,
            }),
            Value::Text(Some(g.se_type.to_string())),
            Value::Float(Some(g.level)),
        ];
        if self.text.is_empty() {
            self.text = vec![Vec::new(); FIT_FIELDS.len()];
            self.uints = vec![Vec::new(); FIT_FIELDS.len()];
            self.floats = vec![Vec::new(); FIT_FIELDS.len()];
            self.bools = vec![Vec::new(); FIT_FIELDS.len()];
        }
        for (i, v) in values.into_iter().enumerate() {
            match v {
                Value::Text(v) => self.text[i].push(v),
                Value::UInt(v) => self.uints[i].push(v),
                Value::Float(v) => self.floats[i].push(FIT_FIELDS[i].2.report(v)),
                Value::Bool(v) => self.bools[i].push(v),
            }
        }
        let names: Vec<String> = g.terms.iter().map(|t| t.term.clone()).collect();
        self.terms.extend(g.terms.into_iter().map(reportable_term));
        self.term_offsets.push(self.terms.len() as i32);
        self.predictors.extend(g.predictors);
        self.predictor_offsets.push(self.predictors.len() as i32);
        self.design.extend(names.into_iter().zip(g.parts));
        self.design_offsets.push(self.design.len() as i32);
    }

    pub fn finish(self) -> StructArray {
        let rows = self.term_offsets.len() - 1;
        let mut arrays: Vec<ArrayRef> = Vec::new();
        for (i, (_, t, _)) in FIT_FIELDS.iter().enumerate() {
            let take = |v: &Vec<Vec<Option<String>>>| v.get(i).cloned().unwrap_or_else(|| vec![None; rows]);
            arrays.push(match t {
                DataType::Utf8 => Arc::new(StringArray::from(take(&self.text))),
                DataType::UInt64 => Arc::new(UInt64Array::from(
                    self.uints.get(i).cloned().unwrap_or_else(|| vec![None; rows]),
                )),
                DataType::Float64 => Arc::new(Float64Array::from(
                    self.floats.get(i).cloned().unwrap_or_else(|| vec![None; rows]),
                )),
                DataType::Boolean => Arc::new(BooleanArray::from(
                    self.bools.get(i).cloned().unwrap_or_else(|| vec![None; rows]),
                )),
                _ => unreachable!(),
            });
        }
        let t = &self.terms;
        let floats =
            |f: fn(&TermRow) -> Option<f64>| -> ArrayRef { Arc::new(t.iter().map(f).collect::<Float64Array>()) };
        let term_struct = StructArray::new(
            TERM_FIELDS.clone(),
            vec![
                Arc::new(t.iter().map(|r| Some(r.term.as_str())).collect::<StringArray>()),
                floats(|r| r.estimate),
                floats(|r| r.std_error),
                floats(|r| r.statistic),
                floats(|r| r.p_value),
                floats(|r| r.ci_low),
                floats(|r| r.ci_high),
                floats(|r| r.rate_ratio),
                floats(|r| r.rr_low),
                floats(|r| r.rr_high),
                Arc::new(t.iter().map(|r| r.flag).collect::<StringArray>()),
            ],
            None,
        );
        let p = &self.predictors;
        let predictor_struct = StructArray::new(
            PREDICTOR_FIELDS.clone(),
            vec![
                Arc::new(p.iter().map(|x| Some(x.name.as_str())).collect::<StringArray>()),
                Arc::new(
                    p.iter()
                        .map(|x| Some(if x.factor { "factor" } else { "numeric" }))
                        .collect::<StringArray>(),
                ),
                Arc::new(p.iter().map(|x| x.reference.as_deref()).collect::<StringArray>()),
            ],
            None,
        );
        let d = &self.design;
        let design_struct = StructArray::new(
            DESIGN_FIELDS.clone(),
            vec![
                Arc::new(d.iter().map(|(n, _)| Some(n.as_str())).collect::<StringArray>()),
                Arc::new(d.iter().map(|(_, x)| x.predictor).collect::<UInt32Array>()),
                Arc::new(d.iter().map(|(_, x)| x.level.as_deref()).collect::<StringArray>()),
                Arc::new(d.iter().map(|(_, x)| x.predictor2).collect::<UInt32Array>()),
                Arc::new(d.iter().map(|(_, x)| x.level2.as_deref()).collect::<StringArray>()),
            ],
            None,
        );
        let list = |fields: &Fields, offsets: Vec<i32>, values: StructArray| -> ArrayRef {
            Arc::new(ListArray::new(
                Arc::new(Field::new("item", DataType::Struct(fields.clone()), true)),
                OffsetBuffer::new(offsets.into()),
                Arc::new(values),
                None,
            ))
        };
        arrays.push(list(&TERM_FIELDS, self.term_offsets, term_struct));
        arrays.push(list(&PREDICTOR_FIELDS, self.predictor_offsets, predictor_struct));
        arrays.push(list(&DESIGN_FIELDS, self.design_offsets, design_struct));
        StructArray::new(FIT_FIELDS_ALL.clone(), arrays, None)
    }
}

fn fixed_scale(fit: Option<&GlmFit>) -> bool {
    fit.is_some_and(|f| f.scale.has_gof_tests())
}
