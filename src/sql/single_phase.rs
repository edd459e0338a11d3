//! Planning correction for the fit aggregates: one aggregation phase over input that is
//! hash-partitioned on the group keys, instead of a partial and a final phase.
//!
//! A fit cannot be reduced to a small partial state: the partial phase of a two-phase
//! aggregation would buffer every row, write the rows out as list state, send that state through
//! the hash repartition and decode it again in the final phase — every row copied about four
//! times more than needed. The engine plans
//!
//! ```text
//! Aggregate(FinalPartitioned) <- Repartition(Hash(keys)) <- Aggregate(Partial) <- input
//! ```
//!
//! and this rule, run after the engine's own rules, turns it into
//!
//! ```text
//! Aggregate(SinglePartitioned) <- Repartition(Hash(keys)) <- input
//! ```
//!
//! when the aggregate holds a fit function that buffers rows (pattern-sum fits keep both phases:
//! their partial state is small). The repartition then moves plain Arrow columns (on a
//! cluster, the shuffle carries the input columns). Results are unchanged: a group's rows still
//! meet in one accumulator and are put in canonical order before the fit. The rule is installed
//! only on sessions with an unbounded memory pool ([`suits`]); it leaves the plan alone when the
//! repartition is off, for grouping sets, for aggregates that need ordered input,
//! and whenever the rewritten node would not have exactly the original output schema.

use std::sync::Arc;

use datafusion::common::config::ConfigOptions;
use datafusion::common::tree_node::{Transformed, TreeNode};
use datafusion::error::Result;
use datafusion::execution::memory_pool::MemoryLimit;
use datafusion::execution::runtime_env::RuntimeEnv;
use datafusion::physical_optimizer::PhysicalOptimizerRule;
use datafusion::physical_plan::aggregates::{AggregateExec, AggregateMode};
use datafusion::physical_plan::repartition::RepartitionExec;
use datafusion::physical_plan::{ExecutionPlan, Partitioning};

use super::model::spec::{BufferKind, planned_buffer};

/// The rule's name, by which registration recognises it.
pub const NAME: &str = "ratesheet_single_phase_fits";

/// The fit functions; their partial state is every row unless the spec chose pattern sums
/// (factor-only Poisson fits), whose small partial state keeps the two phases worthwhile.
const ROW_STATE_FUNCTIONS: [&str; 5] = [
    "poisson_fit",
    "poisson_count_fit",
    "linear_fit",
    "negbin_fit",
    "negbin_count_fit",
];

/// Whether the rule suits a session with this runtime: only when its memory pool is unbounded.
/// Under a bounded pool the engine's partial phase can emit early when memory runs short, which
/// degrades more gently than spilling the whole row state of one phase (measured: a pool that
/// the two-phase plan finishes in by spilling is too small for the one-phase plan's sort).
pub fn suits(runtime: &RuntimeEnv) -> bool {
    matches!(runtime.memory_pool.memory_limit(), MemoryLimit::Infinite)
}

/// See the module documentation.
#[derive(Debug, Default)]
pub struct SinglePhaseFits;

impl PhysicalOptimizerRule for SinglePhaseFits {
    fn optimize(&self, plan: Arc<dyn ExecutionPlan>, _config: &ConfigOptions) -> Result<Arc<dyn ExecutionPlan>> {
        plan.transform_down(|node| {
            Ok(match single_phase(&node)? {
                Some(rewritten) => Transformed::yes(rewritten),
                None => Transformed::no(node),
            })
        })
        .map(|t| t.data)
    }

    fn name(&self) -> &str {
        NAME
    }

    fn schema_check(&self) -> bool {
        true
    }
}

/// The one-phase equivalent of `node`, if `node` is the final phase of a fit aggregation over a
/// hash repartition of its partial phase.
fn single_phase(node: &Arc<dyn ExecutionPlan>) -> Result<Option<Arc<dyn ExecutionPlan>>> {
    let Some(last) = node.downcast_ref::<AggregateExec>() else {
        return Ok(None);
    };
    if *last.mode() != AggregateMode::FinalPartitioned {
        return Ok(None);
    }
    let Some(repartition) = last.input().downcast_ref::<RepartitionExec>() else {
        return Ok(None);
    };
    let Partitioning::Hash(_, partitions) = repartition.partitioning() else {
        return Ok(None);
    };
    let Some(first) = repartition.input().downcast_ref::<AggregateExec>() else {
        return Ok(None);
    };
    let buffers_rows = first.aggr_expr().iter().any(|a| {
        ROW_STATE_FUNCTIONS.contains(&a.fun().name())
            && planned_buffer(&a.expressions()).is_none_or(|b| b == BufferKind::Rows)
    });
    if *first.mode() != AggregateMode::Partial || !first.group_expr().is_single() || !buffers_rows {
        return Ok(None);
    }
    let keys = first.group_expr().input_exprs();
    if keys.is_empty() {
        return Ok(None);
    }
    let spread = RepartitionExec::try_new(first.input().clone(), Partitioning::Hash(keys, *partitions))?;
    let Ok(one) = AggregateExec::try_new(
        AggregateMode::SinglePartitioned,
        first.group_expr().clone(),
        first.aggr_expr().to_vec(),
        first.filter_expr().to_vec(),
        Arc::new(spread),
        first.input_schema(),
    ) else {
        return Ok(None);
    };
    let one = one.with_limit_options(last.limit_options());
    let same_output = one.schema().fields().len() == last.schema().fields().len()
        && one
            .schema()
            .fields()
            .iter()
            .zip(last.schema().fields())
            .all(|(a, b)| a.name() == b.name() && a.data_type() == b.data_type());
    let needs_order = one.required_input_ordering().iter().any(Option::is_some);
    if !same_output || needs_order {
        return Ok(None);
    }
    Ok(Some(Arc::new(one)))
}
