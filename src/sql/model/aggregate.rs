//! The aggregate UDF behind `poisson_fit`, `poisson_count_fit` and `linear_fit`: one
//! implementation parameterised by [`FitKind`]. The call is resolved once at planning
//! ([`resolve_call`]); the accumulator is a [`FitGroups`] over the buffer the spec chose.

use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, BooleanArray};
use datafusion::arrow::datatypes::{DataType, FieldRef};
use datafusion::common::ScalarValue;
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::function::{AccumulatorArgs, AggregateFunctionSimplification, StateFieldsArgs};
use datafusion::logical_expr::{
    Accumulator, AggregateUDFImpl, Documentation, EmitTo, GroupsAccumulator, Signature, Volatility,
};

use super::evaluate::evaluate_groups;
use super::fields::fit_type;
use super::group_buffer::GroupBuffer;
use super::patterns::GroupPatterns;
use super::rows::GroupRows;
use super::spec::{BufferKind, FitKind, ModelSpec, PredictorKind, is_numeric_type, resolve_call, spec_at_execution};
use super::state::state_fields;

/// The aggregate UDF behind one fit function (identified by its kind).
#[derive(Debug)]
pub struct FitFunction {
    kind: FitKind,
    signature: Signature,
    documentation: fn() -> &'static Documentation,
}

impl FitFunction {
    pub fn new(kind: FitKind, documentation: fn() -> &'static Documentation) -> Self {
        FitFunction {
            kind,
            signature: Signature::user_defined(Volatility::Immutable),
            documentation,
        }
    }

    fn spec(&self, args: &AccumulatorArgs) -> Result<Arc<ModelSpec>> {
        let types: Vec<DataType> = args.expr_fields.iter().map(|f| f.data_type().clone()).collect();
        Ok(Arc::new(spec_at_execution(self.kind, args.exprs, &types)?.0))
    }
}

impl PartialEq for FitFunction {
    fn eq(&self, other: &Self) -> bool {
        self.kind == other.kind
    }
}

impl Eq for FitFunction {}

impl std::hash::Hash for FitFunction {
    fn hash<H: std::hash::Hasher>(&self, state: &mut H) {
        self.kind.hash(state);
    }
}

impl AggregateUDFImpl for FitFunction {
    fn name(&self) -> &str {
        self.kind.sql_name()
    }
    fn signature(&self) -> &Signature {
        &self.signature
    }

    /// Responses and exposures become Float64. Predictors keep their type when it is a whole
    /// number type (the spec reads it to choose the buffer), text, boolean or a dictionary
    /// (factors); other numbers become Float64. The decoder reads every number as Float64.
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
                if i < lead && crate::sql::functions::args::is_text(t) {
                    // Refused in `return_field`, which knows the column's name.
                    return Ok(t.clone());
                }
                if i < lead && !is_numeric_type(t) {
                    return Err(DataFusionError::Plan(format!(
                        "{function}: {} must be numeric, got {t}",
                        self.kind.leading_names()[i]
                    )));
                }
                Ok(if i < lead || (is_numeric_type(t) && !t.is_integer()) {
                    DataType::Float64
                } else {
                    t.clone()
                })
            })
            .collect()
    }

    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(fit_type())
    }

    /// The fit struct; a text column where a number belongs is refused here, by name.
    fn return_field(&self, arg_fields: &[FieldRef]) -> Result<FieldRef> {
        crate::sql::functions::args::refuse_text_columns(self.kind.sql_name(), self.kind.leading_names(), arg_fields)?;
        Ok(Arc::new(datafusion::arrow::datatypes::Field::new(
            self.name(),
            fit_type(),
            true,
        )))
    }

    /// The state fields depend only on the function and on which predictors are factors (see
    /// `state`), which the input types show; the trailing spec literal is not a predictor.
    fn state_fields(&self, args: StateFieldsArgs) -> Result<Vec<FieldRef>> {
        let fields = args.input_fields;
        let mut end = fields.len();
        if end > self.kind.leading()
            && matches!(
                fields[end - 1].data_type(),
                DataType::Utf8 | DataType::Utf8View | DataType::LargeUtf8
            )
        {
            end -= 1;
        }
        let factors = fields[self.kind.leading().min(end)..end]
            .iter()
            .map(|f| Ok(PredictorKind::of(self.kind.sql_name(), f.name(), f.data_type())?.is_factor()))
            .collect::<Result<Vec<bool>>>()?;
        Ok(state_fields(self.kind, &factors, args.name))
    }

    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        let spec = self.spec(&args)?;
        Ok(match spec.buffer {
            BufferKind::Rows => Box::new(SingleGroup(FitGroups {
                buffer: GroupRows::empty(spec),
            })),
            BufferKind::Patterns => Box::new(SingleGroup(FitGroups {
                buffer: GroupPatterns::empty(spec),
            })),
        })
    }

    fn groups_accumulator_supported(&self, _args: AccumulatorArgs) -> bool {
        true
    }

    fn create_groups_accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn GroupsAccumulator>> {
        let spec = self.spec(&args)?;
        Ok(match spec.buffer {
            BufferKind::Rows => Box::new(FitGroups {
                buffer: GroupRows::empty(spec),
            }),
            BufferKind::Patterns => Box::new(FitGroups {
                buffer: GroupPatterns::empty(spec),
            }),
        })
    }

    fn simplify(&self) -> Option<AggregateFunctionSimplification> {
        let kind = self.kind;
        Some(Box::new(move |call, info| resolve_call(kind, call, info)))
    }

    fn documentation(&self) -> Option<&Documentation> {
        Some((self.documentation)())
    }
}

/// The groups accumulator of a fit function over buffer `B`.
#[derive(Debug)]
pub struct FitGroups<B: GroupBuffer> {
    pub buffer: B,
}

impl<B: GroupBuffer> GroupsAccumulator for FitGroups<B> {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        self.buffer.update(values, group_indices, opt_filter, total_num_groups)
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        Ok(Arc::new(evaluate_groups(&mut self.buffer.take(emit_to))?))
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        self.buffer.take(emit_to).to_state()
    }

    fn merge_batch(&mut self, values: &[ArrayRef], group_indices: &[usize], total_num_groups: usize) -> Result<()> {
        self.buffer.merge(values, group_indices, total_num_groups)
    }

    fn convert_to_state(&self, values: &[ArrayRef], opt_filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        self.buffer.convert_to_state(values, opt_filter)
    }

    fn size(&self) -> usize {
        self.buffer.size()
    }
}

/// The plain accumulator: the groups accumulator with a single group.
#[derive(Debug)]
pub struct SingleGroup<B: GroupBuffer>(pub FitGroups<B>);

impl<B: GroupBuffer> Accumulator for SingleGroup<B> {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        let n = values.first().map_or(0, |a| a.len());
        self.0.update_batch(values, &vec![0; n], None, 1)
    }

    /// Fits the one group without consuming it (DataFusion may call `evaluate` repeatedly, as
    /// window frames grow).
    fn evaluate(&mut self) -> Result<ScalarValue> {
        self.0.buffer.common_mut().counts.ensure(1);
        let array = evaluate_groups(&mut self.0.buffer)?;
        ScalarValue::try_from_array(&array, 0)
    }

    fn size(&self) -> usize {
        self.0.size() + std::mem::size_of::<Self>()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        self.0.buffer.common_mut().counts.ensure(1);
        let arrays = self.0.buffer.to_state()?;
        arrays.iter().map(|a| ScalarValue::try_from_array(a, 0)).collect()
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        let n = states.first().map_or(0, |a| a.len());
        self.0.merge_batch(states, &vec![0; n], 1)
    }
}

/// The documentation section all ratesheet functions are listed under.
pub const DOC_SECTION: datafusion::logical_expr::DocSection = datafusion::logical_expr::DocSection {
    include: true,
    label: "Rate models",
    description: Some("ratesheet's model-fitting and rate functions"),
};
