//! The standardisation aggregates, `standardized_rate` (direct) and `standardized_ratio`
//! (indirect): one aggregate UDF over a [`tally::Tally`] of running sums per group.
//!
//! Options are resolved once at planning (`simplify`): the session's `level` and `invalid`
//! defaults and the call's own string become one fully written options literal, so the
//! accumulators (and any other process that runs them) read the same settings.

pub mod direct;
pub mod indirect;
pub mod settings;
pub mod tally;

use std::marker::PhantomData;
use std::sync::Arc;

use datafusion::arrow::array::{ArrayRef, BooleanArray};
use datafusion::arrow::datatypes::{DataType, Field, FieldRef};
use datafusion::common::ScalarValue;
use datafusion::error::{DataFusionError, Result};
use datafusion::logical_expr::expr::AggregateFunction;
use datafusion::logical_expr::function::{AccumulatorArgs, AggregateFunctionSimplification, StateFieldsArgs};
use datafusion::logical_expr::simplify::SimplifyContext;
use datafusion::logical_expr::{
    Accumulator, AggregateUDFImpl, Documentation, EmitTo, Expr, GroupsAccumulator, Signature, Volatility, lit,
};

use settings::{Standardization, StandardizeSettings};
use tally::{Group, Tallies, Tally};

/// The aggregate UDF of one standardisation function.
#[derive(Debug)]
pub struct StandardizeFunction<T: Tally> {
    kind: Standardization,
    signature: Signature,
    documentation: fn() -> &'static Documentation,
    tally: PhantomData<T>,
}

impl<T: Tally> StandardizeFunction<T> {
    pub fn new(kind: Standardization, documentation: fn() -> &'static Documentation) -> Self {
        StandardizeFunction {
            kind,
            signature: Signature::user_defined(Volatility::Immutable),
            documentation,
            tally: PhantomData,
        }
    }

    /// The names of the numeric arguments for `count` of them, or why `count` is wrong.
    fn numeric_names(&self, count: usize) -> Result<&'static [&'static str]> {
        let function = self.kind.sql_name();
        match (self.kind, count) {
            (Standardization::Direct, 3) => Ok(&["events", "exposure", "standard_weight"]),
            (Standardization::Indirect, 3) => Ok(&["events", "exposure", "reference_rate"]),
            (Standardization::Indirect, 2) => Ok(&["events", "expected"]),
            (Standardization::Direct, _) => Err(plan(format!(
                "{function} takes events, exposure, standard_weight and an optional options string; got {count} \
                 numeric argument{}",
                if count == 1 { "" } else { "s" }
            ))),
            (Standardization::Indirect, _) => Err(plan(format!(
                "{function} takes (events, exposure, reference_rate) or (events, expected), then an optional \
                 options string; got {count} numeric argument{}",
                if count == 1 { "" } else { "s" }
            ))),
        }
    }

    /// Settings and the number of numeric arguments of an accumulator's call.
    fn settings(&self, args: &AccumulatorArgs) -> Result<(StandardizeSettings, usize)> {
        use datafusion::physical_expr::expressions::Literal;
        let text = args.exprs.last().and_then(|e| {
            e.downcast_ref::<Literal>().and_then(|l| match l.value() {
                ScalarValue::Utf8(Some(s)) | ScalarValue::LargeUtf8(Some(s)) | ScalarValue::Utf8View(Some(s)) => {
                    Some(s.clone())
                }
                _ => None,
            })
        });
        match text {
            Some(t) => Ok((StandardizeSettings::parse(&t, self.kind)?, args.exprs.len() - 1)),
            None if args.expr_fields.last().is_some_and(|f| is_text(f.data_type())) => Err(plan(format!(
                "{}: the options must be a constant string such as 'level=0.9'",
                self.kind.sql_name()
            ))),
            None => Ok((StandardizeSettings::builtin(), args.exprs.len())),
        }
    }

    fn tallies(&self, args: &AccumulatorArgs) -> Result<Tallies<T>> {
        let (settings, numeric) = self.settings(args)?;
        Ok(Tallies::new(settings, numeric))
    }
}

impl<T: Tally> PartialEq for StandardizeFunction<T> {
    fn eq(&self, other: &Self) -> bool {
        self.kind == other.kind
    }
}

impl<T: Tally> Eq for StandardizeFunction<T> {}

impl<T: Tally> std::hash::Hash for StandardizeFunction<T> {
    fn hash<H: std::hash::Hasher>(&self, state: &mut H) {
        self.kind.hash(state);
    }
}

fn plan(msg: String) -> DataFusionError {
    DataFusionError::Plan(msg)
}

fn is_text(t: &DataType) -> bool {
    matches!(t, DataType::Utf8 | DataType::LargeUtf8 | DataType::Utf8View)
}

impl<T: Tally> AggregateUDFImpl for StandardizeFunction<T> {
    fn name(&self) -> &str {
        self.kind.sql_name()
    }

    fn signature(&self) -> &Signature {
        &self.signature
    }

    /// Numeric arguments become Float64; a trailing text argument is the options string.
    fn coerce_types(&self, arg_types: &[DataType]) -> Result<Vec<DataType>> {
        let function = self.kind.sql_name();
        let numeric = arg_types.len() - usize::from(arg_types.last().is_some_and(is_text));
        let names = self.numeric_names(numeric)?;
        arg_types
            .iter()
            .enumerate()
            .map(|(i, t)| {
                if i >= numeric {
                    Ok(DataType::Utf8)
                } else if is_text(t) {
                    // Refused in `return_field`, which knows the column's name.
                    Ok(t.clone())
                } else if t.is_numeric() || matches!(t, DataType::Null) {
                    Ok(DataType::Float64)
                } else {
                    Err(plan(format!("{function}: {} must be numeric, got {t}", names[i])))
                }
            })
            .collect()
    }

    fn return_type(&self, _arg_types: &[DataType]) -> Result<DataType> {
        Ok(T::result_type())
    }

    /// The result struct; a text column where a number belongs is refused here, by name.
    fn return_field(&self, arg_fields: &[FieldRef]) -> Result<FieldRef> {
        let numeric = arg_fields.len() - usize::from(arg_fields.last().is_some_and(|f| is_text(f.data_type())));
        let names = self.numeric_names(numeric)?;
        crate::sql::functions::args::refuse_text_columns(self.kind.sql_name(), names, arg_fields)?;
        Ok(Arc::new(Field::new(self.name(), T::result_type(), true)))
    }

    fn state_fields(&self, args: StateFieldsArgs) -> Result<Vec<FieldRef>> {
        Ok(T::STATE
            .iter()
            .chain(&["n_skipped", "n_invalid"])
            .map(|s| Arc::new(Field::new(format!("{}[{s}]", args.name), DataType::Float64, true)))
            .collect())
    }

    fn accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn Accumulator>> {
        Ok(Box::new(OneGroup(self.tallies(&args)?)))
    }

    fn groups_accumulator_supported(&self, _args: AccumulatorArgs) -> bool {
        true
    }

    fn create_groups_accumulator(&self, args: AccumulatorArgs) -> Result<Box<dyn GroupsAccumulator>> {
        Ok(Box::new(self.tallies(&args)?))
    }

    /// Writes the resolved options (session defaults included) into the call.
    fn simplify(&self) -> Option<AggregateFunctionSimplification> {
        let kind = self.kind;
        Some(Box::new(move |call, info| resolve_options(kind, call, info)))
    }

    fn documentation(&self) -> Option<&Documentation> {
        Some((self.documentation)())
    }
}

/// The planning-time rewrite: the trailing options string (or none) becomes the fully written
/// settings. Idempotent: a written string resolves to itself.
fn resolve_options(kind: Standardization, mut call: AggregateFunction, info: &SimplifyContext) -> Result<Expr> {
    let args = &mut call.params.args;
    let options = match args.last() {
        Some(Expr::Literal(
            ScalarValue::Utf8(Some(s)) | ScalarValue::LargeUtf8(Some(s)) | ScalarValue::Utf8View(Some(s)),
            _,
        )) => {
            let s = s.clone();
            args.pop();
            s
        }
        Some(last) if info.get_data_type(last).is_ok_and(|t| is_text(&t)) => {
            return Err(plan(format!(
                "{}: the options must be a constant string such as 'level=0.9'",
                kind.sql_name()
            )));
        }
        _ => String::new(),
    };
    let settings = StandardizeSettings::resolve(info.config_options(), &options, kind)?;
    args.push(lit(settings.to_options(kind)));
    Ok(Expr::AggregateFunction(call))
}

impl<T: Tally> GroupsAccumulator for Tallies<T> {
    fn update_batch(
        &mut self,
        values: &[ArrayRef],
        group_indices: &[usize],
        opt_filter: Option<&BooleanArray>,
        total_num_groups: usize,
    ) -> Result<()> {
        self.update(values, |r| group_indices[r], opt_filter, total_num_groups)
    }

    fn evaluate(&mut self, emit_to: EmitTo) -> Result<ArrayRef> {
        let groups = emit_to.take_needed(&mut self.groups);
        Ok(Arc::new(T::results(&groups, &self.settings)))
    }

    fn state(&mut self, emit_to: EmitTo) -> Result<Vec<ArrayRef>> {
        let groups = emit_to.take_needed(&mut self.groups);
        Ok(Tallies::state_of(&groups))
    }

    fn merge_batch(&mut self, values: &[ArrayRef], group_indices: &[usize], total_num_groups: usize) -> Result<()> {
        self.merge(values, |r| group_indices[r], total_num_groups)
    }

    /// Each row as its own group's state (rows filtered out give empty states).
    fn convert_to_state(&self, values: &[ArrayRef], opt_filter: Option<&BooleanArray>) -> Result<Vec<ArrayRef>> {
        let rows = values.first().map_or(0, |a| a.len());
        let mut one_per_row = Tallies::<T>::new(self.settings, self.numeric);
        one_per_row.update(values, |r| r, opt_filter, rows)?;
        Ok(Tallies::state_of(&one_per_row.groups))
    }

    fn size(&self) -> usize {
        Tallies::size(self)
    }
}

/// The plain accumulator: one group; evaluating does not consume it (window frames grow).
#[derive(Debug)]
struct OneGroup<T: Tally>(Tallies<T>);

impl<T: Tally> Accumulator for OneGroup<T> {
    fn update_batch(&mut self, values: &[ArrayRef]) -> Result<()> {
        self.0.update(values, |_| 0, None, 1)
    }

    fn evaluate(&mut self) -> Result<ScalarValue> {
        let group = self.0.groups.first().cloned().unwrap_or_else(Group::empty);
        let array = T::results(&[group], &self.0.settings);
        ScalarValue::try_from_array(&array, 0)
    }

    fn size(&self) -> usize {
        self.0.size() + std::mem::size_of::<Self>()
    }

    fn state(&mut self) -> Result<Vec<ScalarValue>> {
        let group = self.0.groups.first().cloned().unwrap_or_else(Group::empty);
        Tallies::state_of(&[group])
            .iter()
            .map(|a| ScalarValue::try_from_array(a, 0))
            .collect()
    }

    fn merge_batch(&mut self, states: &[ArrayRef]) -> Result<()> {
        self.0.merge(states, |_| 0, 1)
    }
}
