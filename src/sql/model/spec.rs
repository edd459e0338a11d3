//! Resolution of a fit call at planning time.
//!
//! During logical optimisation each fit call is rewritten once: the trailing options string is
//! merged with the session defaults and validated, predictor names are rendered from the
//! argument expressions (`age - 40`, not `t.age - Int64(40)`), `interaction(a, b)` markers are
//! removed from the argument list and recorded by predictor index, each predictor's kind is
//! decided from its type, the buffer is chosen, and the result ([`ModelSpec`]) is appended as a
//! single JSON string literal that the accumulators read. A call that
//! reaches execution without the optimizer still works: its options are parsed with built-in
//! defaults and names come from the physical expressions.

use std::sync::Arc;

use datafusion::arrow::datatypes::DataType;
use datafusion::common::ScalarValue;
use datafusion::error::Result;
use datafusion::logical_expr::expr::{AggregateFunction, ScalarFunction};
use datafusion::logical_expr::simplify::SimplifyContext;
use datafusion::logical_expr::{Expr, lit};
use datafusion::physical_expr::PhysicalExpr;
use serde::{Deserialize, Serialize};

use super::options::{FitSettings, plan_error};
use crate::glm::FamilyKind;

/// Marker that identifies a resolved spec literal (and its layout version).
const SPEC_TAG: &str = "ratesheet-model-spec/3";

/// Which fit function a call is: its leading (response) arguments and its family.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum FitKind {
    /// `poisson_fit(count, exposure, predictors...)`
    PoissonRate,
    /// `poisson_count_fit(count, predictors...)`
    PoissonCount,
    /// `linear_fit(y, predictors...)`
    Linear,
    /// `negbin_fit(count, exposure, predictors...)`
    NegBinRate,
    /// `negbin_count_fit(count, predictors...)`
    NegBinCount,
}

impl FitKind {
    pub fn sql_name(self) -> &'static str {
        match self {
            FitKind::PoissonRate => "poisson_fit",
            FitKind::PoissonCount => "poisson_count_fit",
            FitKind::Linear => "linear_fit",
            FitKind::NegBinRate => "negbin_fit",
            FitKind::NegBinCount => "negbin_count_fit",
        }
    }

    /// Number of arguments before the predictors.
    pub fn leading(self) -> usize {
        self.leading_names().len()
    }

    /// Names of the leading arguments, for messages.
    pub fn leading_names(self) -> &'static [&'static str] {
        match self {
            FitKind::PoissonRate | FitKind::NegBinRate => &["count", "exposure"],
            FitKind::PoissonCount | FitKind::NegBinCount => &["count"],
            FitKind::Linear => &["response"],
        }
    }

    pub fn family(self) -> FamilyKind {
        match self {
            FitKind::PoissonRate | FitKind::PoissonCount => FamilyKind::Poisson,
            FitKind::Linear => FamilyKind::Gaussian,
            FitKind::NegBinRate | FitKind::NegBinCount => FamilyKind::NegativeBinomial,
        }
    }

    /// Whether the second argument is an exposure (its log is the offset).
    pub fn has_exposure(self) -> bool {
        matches!(self, FitKind::PoissonRate | FitKind::NegBinRate)
    }

    /// Whether the response must be a count (>= 0).
    pub fn counts(self) -> bool {
        self.family() != FamilyKind::Gaussian
    }
}

/// How a predictor enters the model, decided once from its SQL type ([`PredictorKind::of`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum PredictorKind {
    /// Text, boolean or dictionary values: a treatment-coded factor.
    Factor,
    /// Whole numbers used as numbers (one term); their few distinct values let Poisson fits
    /// keep pattern sums.
    Integer,
    /// Any other number (one term).
    Numeric,
}

impl PredictorKind {
    /// The one rule: text, boolean and dictionary types are factors, integer types whole
    /// numbers, other numeric types (and NULL) numbers; anything else is refused.
    pub fn of(function: &str, argument: &str, data_type: &DataType) -> Result<PredictorKind> {
        match data_type {
            DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View | DataType::Boolean => Ok(PredictorKind::Factor),
            DataType::Dictionary(_, value) if Self::of(function, argument, value)? == PredictorKind::Factor => {
                Ok(PredictorKind::Factor)
            }
            t if t.is_integer() => Ok(PredictorKind::Integer),
            t if t.is_numeric() || matches!(t, DataType::Null) => Ok(PredictorKind::Numeric),
            other => Err(plan_error(format!(
                "{function}: predictor {argument} has type {other}, which is not supported; predictors must \
                 be numeric (one term) or text/boolean (a factor); cast dates to a number of days or to text"
            ))),
        }
    }

    pub fn is_factor(self) -> bool {
        self == PredictorKind::Factor
    }

    /// The name reported in the fit's `predictors` list.
    pub fn report_name(self) -> &'static str {
        if self.is_factor() { "factor" } else { "numeric" }
    }
}

/// Where a fit keeps its groups' data until evaluation.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum BufferKind {
    /// Every row (`rows`).
    Rows,
    /// Sums per covariate pattern (`patterns`): for families that can be fitted on them, when
    /// every predictor is a factor or a whole number.
    Patterns,
}

impl BufferKind {
    pub fn choose(family: FamilyKind, predictors: &[PredictorSpec]) -> BufferKind {
        let discrete = predictors.iter().all(|p| p.kind != PredictorKind::Numeric);
        if family.family().collapsible() && discrete {
            BufferKind::Patterns
        } else {
            BufferKind::Rows
        }
    }
}

/// One main-effect predictor of a fit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PredictorSpec {
    pub name: String,
    pub kind: PredictorKind,
}

/// Everything decided about a fit call, once, at planning: the function (so the family and
/// whether there is an exposure), the predictors and their kinds, the interactions, the
/// settings, where rows are kept, and whether exp(coefficient) is a ratio. Every later stage
/// reads this spec; nothing re-derives it from Arrow types.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelSpec {
    pub tag: String,
    pub kind: FitKind,
    pub settings: FitSettings,
    pub predictors: Vec<PredictorSpec>,
    /// Pairs of predictor indices.
    pub interactions: Vec<(usize, usize)>,
    pub buffer: BufferKind,
    /// Whether exp(coefficient) is a ratio: always for Poisson fits (log link); for
    /// `linear_fit` only when the response is a natural logarithm (`ln(...)`, or the option
    /// `response=log`).
    pub ratio_scale: bool,
}

impl ModelSpec {
    /// A spec with the built-in settings and the given predictors (no interactions).
    pub fn new(kind: FitKind, predictors: Vec<PredictorSpec>) -> ModelSpec {
        ModelSpec {
            tag: SPEC_TAG.to_string(),
            kind,
            settings: FitSettings::builtin(),
            buffer: BufferKind::choose(kind.family(), &predictors),
            predictors,
            interactions: Vec::new(),
            ratio_scale: kind.family() != FamilyKind::Gaussian,
        }
    }

    pub fn family(&self) -> FamilyKind {
        self.kind.family()
    }

    pub fn to_literal(&self) -> String {
        serde_json::to_string(self).expect("spec serialises")
    }

    pub fn from_literal(text: &str) -> Option<ModelSpec> {
        if !text.starts_with('{') {
            return None;
        }
        serde_json::from_str::<ModelSpec>(text)
            .ok()
            .filter(|s| s.tag == SPEC_TAG)
    }
}

/// True when `t` can be a count, exposure or response.
pub fn is_numeric_type(t: &DataType) -> bool {
    t.is_numeric() || matches!(t, DataType::Null)
}

/// The planning-time rewrite of a fit call (see the module doc).
pub fn resolve_call(kind: FitKind, mut call: AggregateFunction, info: &SimplifyContext) -> Result<Expr> {
    let function = kind.sql_name();
    let args = &call.params.args;
    if let Some(Expr::Literal(ScalarValue::Utf8(Some(text)) | ScalarValue::Utf8View(Some(text)), _)) = args.last() {
        if ModelSpec::from_literal(text).is_some() {
            return Ok(Expr::AggregateFunction(call));
        }
    }
    let mut args = std::mem::take(&mut call.params.args);
    let options = match args.last() {
        Some(Expr::Literal(
            ScalarValue::Utf8(Some(_)) | ScalarValue::LargeUtf8(Some(_)) | ScalarValue::Utf8View(Some(_)),
            _,
        )) if args.len() > kind.leading() => match args.pop() {
            Some(Expr::Literal(v, _)) => v.to_string(),
            _ => unreachable!(),
        },
        _ => String::new(),
    };
    let settings = FitSettings::resolve(info.config_options(), &options, function)?;
    let mut mains: Vec<Expr> = Vec::new();
    let mut predictors: Vec<PredictorSpec> = Vec::new();
    let mut pending: Vec<(String, String)> = Vec::new();
    for arg in args.drain(kind.leading()..).collect::<Vec<_>>() {
        if let Some((a, b)) = interaction_parts(&arg) {
            pending.push((render(a), render(b)));
            continue;
        }
        let name = render(&arg);
        let kind = PredictorKind::of(function, &name, &info.get_data_type(&arg)?)?;
        if predictors.iter().any(|p| p.name == name) {
            return Err(plan_error(format!(
                "{function}: predictor {name} is given twice; each predictor may appear once"
            )));
        }
        predictors.push(PredictorSpec { name, kind });
        mains.push(arg);
    }
    let position = |name: &str| predictors.iter().position(|p| p.name == name);
    let mut interactions = Vec::new();
    for (a, b) in pending {
        match (position(&a), position(&b)) {
            (Some(i), Some(j)) if i != j => interactions.push((i, j)),
            _ => {
                return Err(plan_error(format!(
                    "{function}: interaction({a}, {b}) needs {a} and {b} as two distinct predictors of the same \
                     call (main effects come first: {function}(..., {a}, {b}, interaction({a}, {b})))"
                )));
            }
        }
    }
    check_references(function, &settings, &predictors)?;
    check_family_settings(kind, &settings)?;
    let ratio_scale = ratio_scale(kind, &settings, || args.first().is_some_and(is_natural_log))?;
    let spec = ModelSpec {
        settings,
        interactions,
        ratio_scale,
        ..ModelSpec::new(kind, predictors)
    };
    args.extend(mains);
    // A Utf8View literal: the engine expands literal arguments to one value per input row, and
    // a repeated view costs 16 bytes per row where a repeated Utf8 string copies the whole spec.
    args.push(lit(ScalarValue::Utf8View(Some(spec.to_literal()))));
    call.params.args = args;
    Ok(Expr::AggregateFunction(call))
}

/// Every `ref.<name>` option must name a factor predictor of the call.
pub fn check_references(function: &str, settings: &FitSettings, predictors: &[PredictorSpec]) -> Result<()> {
    for name in settings.references.keys() {
        match predictors.iter().find(|p| &p.name == name) {
            Some(p) if p.kind.is_factor() => {}
            Some(_) => {
                return Err(plan_error(format!(
                    "{function}: ref.{name} names a numeric predictor; reference levels apply to text or boolean predictors"
                )));
            }
            None => {
                let names: Vec<&str> = predictors.iter().map(|p| p.name.as_str()).collect();
                return Err(plan_error(format!(
                    "{function}: ref.{name} does not name a predictor; predictors are: {}",
                    names.join(", ")
                )));
            }
        }
    }
    Ok(())
}

/// Settings a family cannot use: quasi standard errors for a family whose own parameter already
/// models the extra variance.
fn check_family_settings(kind: FitKind, settings: &FitSettings) -> Result<()> {
    if kind.family() == FamilyKind::Gaussian && settings.ci == super::options::CiMethod::Profile {
        return Err(plan_error(format!(
            "{}: ci=profile is for Poisson and negative binomial fits; least-squares intervals are exact t intervals",
            kind.sql_name()
        )));
    }
    if kind.family() == FamilyKind::NegativeBinomial && settings.se_type() == crate::glm::SeType::Quasi {
        return Err(plan_error(format!(
            "{}: se=quasi is not available for negative binomial fits (alpha already models the extra \
             variance); use se=model, hc0 or hc1",
            kind.sql_name()
        )));
    }
    Ok(())
}

/// Whether a fit's exp(coefficient) is a ratio (see [`ModelSpec::ratio_scale`]); `log_response`
/// tells whether the response expression is `ln(...)`.
fn ratio_scale(kind: FitKind, settings: &FitSettings, log_response: impl FnOnce() -> bool) -> Result<bool> {
    use super::options::ResponseScale;
    match (kind, settings.response) {
        (FitKind::Linear, Some(scale)) => Ok(scale == ResponseScale::Log),
        (FitKind::Linear, None) => Ok(log_response()),
        (_, None) => Ok(true),
        (_, Some(_)) => Err(plan_error(format!(
            "{}: the option response applies to linear_fit only (Poisson fits are on the log scale already)",
            kind.sql_name()
        ))),
    }
}

/// A natural logarithm: `ln(...)` of an expression, or a sum or difference of such terms and
/// constants (`ln(cases) - ln(pop)` is the log of a rate), under any casts the planner inserted.
fn is_natural_log(e: &Expr) -> bool {
    use datafusion::logical_expr::{BinaryExpr, Operator};
    match strip_casts(e) {
        Expr::ScalarFunction(f) => f.func.name() == "ln",
        Expr::Alias(a) => is_natural_log(&a.expr),
        Expr::BinaryExpr(BinaryExpr { left, op, right }) if matches!(op, Operator::Plus | Operator::Minus) => {
            let constant = |x: &Expr| matches!(strip_casts(x), Expr::Literal(..));
            (is_natural_log(left) && (is_natural_log(right) || constant(right)))
                || (constant(left) && is_natural_log(right))
        }
        _ => false,
    }
}

fn interaction_parts(e: &Expr) -> Option<(&Expr, &Expr)> {
    match e {
        Expr::ScalarFunction(ScalarFunction { func, args }) if func.name() == "interaction" && args.len() == 2 => {
            Some((&args[0], &args[1]))
        }
        Expr::Alias(a) => interaction_parts(&a.expr),
        _ => None,
    }
}

/// A readable name for a predictor expression: a bare column gives its name; casts the planner
/// inserted are dropped; literals print as values; operators keep SQL spelling.
pub fn render(e: &Expr) -> String {
    match e {
        Expr::Column(c) => c.name.clone(),
        Expr::Alias(a) => a.name.clone(),
        Expr::Cast(c) => render(&c.expr),
        Expr::TryCast(c) => render(&c.expr),
        Expr::Literal(v, _) => match v {
            ScalarValue::Utf8(Some(s)) | ScalarValue::LargeUtf8(Some(s)) | ScalarValue::Utf8View(Some(s)) => {
                format!("'{s}'")
            }
            other => other.to_string(),
        },
        Expr::BinaryExpr(b) => {
            let side = |x: &Expr| match strip_casts(x) {
                Expr::BinaryExpr(_) => format!("({})", render(x)),
                _ => render(x),
            };
            format!("{} {} {}", side(&b.left), b.op, side(&b.right))
        }
        Expr::Negative(x) => format!("-{}", render(x)),
        Expr::ScalarFunction(f) => {
            let args: Vec<String> = f.args.iter().map(render).collect();
            format!("{}({})", f.func.name(), args.join(", "))
        }
        other => other.human_display().to_string(),
    }
}

/// The expression under any casts the planner inserted.
fn strip_casts(e: &Expr) -> &Expr {
    match e {
        Expr::Cast(c) => strip_casts(&c.expr),
        Expr::TryCast(c) => strip_casts(&c.expr),
        other => other,
    }
}

/// The physical-expression counterpart of [`render`], for calls that skipped the optimizer.
pub fn render_physical(e: &Arc<dyn PhysicalExpr>) -> String {
    use datafusion::physical_expr::expressions::{BinaryExpr, CastExpr, Column, Literal, TryCastExpr};
    if let Some(c) = e.downcast_ref::<Column>() {
        c.name().to_string()
    } else if let Some(c) = e.downcast_ref::<CastExpr>() {
        render_physical(c.expr())
    } else if let Some(c) = e.downcast_ref::<TryCastExpr>() {
        render_physical(c.expr())
    } else if let Some(l) = e.downcast_ref::<Literal>() {
        l.value().to_string()
    } else if let Some(b) = e.downcast_ref::<BinaryExpr>() {
        format!(
            "{} {} {}",
            render_physical(b.left()),
            b.op(),
            render_physical(b.right())
        )
    } else {
        e.to_string()
    }
}

/// The spec of a call at execution: the resolved literal when present, otherwise built from
/// the raw options string (built-in defaults) and physical expressions.
/// The text of a call's last argument when it is a text literal (the spec or an options string).
fn trailing_text(exprs: &[Arc<dyn PhysicalExpr>]) -> Option<String> {
    use datafusion::physical_expr::expressions::Literal;
    exprs.last().and_then(|e| {
        e.downcast_ref::<Literal>().and_then(|l| match l.value() {
            ScalarValue::Utf8(Some(s)) | ScalarValue::LargeUtf8(Some(s)) | ScalarValue::Utf8View(Some(s)) => {
                Some(s.clone())
            }
            _ => None,
        })
    })
}

/// The buffer a planned call's resolved spec chose; `None` when the call carries no spec
/// literal (it was not simplified).
pub fn planned_buffer(exprs: &[Arc<dyn PhysicalExpr>]) -> Option<BufferKind> {
    trailing_text(exprs)
        .as_deref()
        .and_then(ModelSpec::from_literal)
        .map(|spec| spec.buffer)
}

pub fn spec_at_execution(
    kind: FitKind,
    exprs: &[Arc<dyn PhysicalExpr>],
    types: &[DataType],
) -> Result<(ModelSpec, usize)> {
    let function = kind.sql_name();
    let last_text = trailing_text(exprs);
    if let Some(spec) = last_text.as_deref().and_then(ModelSpec::from_literal) {
        return Ok((spec, exprs.len() - 1));
    }
    let mut settings = FitSettings::builtin();
    let mut end = exprs.len();
    if let Some(text) = &last_text {
        if exprs.len() > kind.leading() {
            settings.apply_string(text, function)?;
            end -= 1;
        }
    }
    let mut predictors = Vec::new();
    for (e, t) in exprs[kind.leading()..end].iter().zip(&types[kind.leading()..end]) {
        let name = render_physical(e);
        if matches!(t, DataType::Struct(_)) {
            return Err(plan_error(format!(
                "{function}: interaction({name}) needs the query optimizer, which rewrites it; run the query through a SessionContext"
            )));
        }
        let kind = PredictorKind::of(function, &name, t)?;
        predictors.push(PredictorSpec { name, kind });
    }
    check_references(function, &settings, &predictors)?;
    check_family_settings(kind, &settings)?;
    let ratio_scale = ratio_scale(kind, &settings, || {
        use datafusion::physical_expr::ScalarFunctionExpr;
        let Some(mut e) = exprs.first() else { return false };
        while let Some(c) = e.downcast_ref::<datafusion::physical_expr::expressions::CastExpr>() {
            e = c.expr();
        }
        e.downcast_ref::<ScalarFunctionExpr>().is_some_and(|f| f.name() == "ln")
    })?;
    Ok((
        ModelSpec {
            settings,
            ratio_scale,
            ..ModelSpec::new(kind, predictors)
        },
        end,
    ))
}
