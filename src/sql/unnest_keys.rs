//! A planning correction: rows that come out of `unnest` are not unique by their input's keys.
//!
//! DataFusion 55 builds an `Unnest` node with its input's functional dependencies unchanged
//! (`Unnest::try_new`: "we can use the existing functional dependencies"). A list unnest turns
//! one input row into several, so a key that was unique before (the `district` of a
//! `GROUP BY district`) repeats afterwards, and it no longer determines the unnested column.
//! Optimizer rules that read functional dependencies then drop work that was needed:
//! `eliminate_duplicated_expr` prunes the second key of `ORDER BY district, term`,
//! `optimize_projections` prunes grouping keys, `replace_distinct_aggregate` drops a
//! `DISTINCT`, `eliminate_join` turns a join into a semi join. Each is a silently wrong answer.
//!
//! [`UnnestForgetsKeys`] removes the dependencies of every `Unnest` node and recomputes the
//! schemas above it. [`with_unnest_correction`] places it before each rule that reads
//! dependencies ([`DEPENDENCY_READERS`]), because any rule may rebuild an `Unnest` node (and
//! `Unnest::try_new` copies the dependencies again). It can go once DataFusion's `Unnest` stops
//! copying them (see DEVELOPERS.md).

use std::sync::Arc;

use datafusion::common::tree_node::{Transformed, TreeNode};
use datafusion::common::{FunctionalDependencies, Result};
use datafusion::logical_expr::LogicalPlan;
use datafusion::optimizer::{OptimizerConfig, OptimizerRule};

/// Names of DataFusion 55's optimizer rules that read functional dependencies. A test checks
/// that each is in DataFusion's default rule list, so a renamed rule is noticed.
pub const DEPENDENCY_READERS: &[&str] = &[
    "replace_distinct_aggregate",
    "eliminate_join",
    "eliminate_duplicated_expr",
    "optimize_projections",
];

/// The optimizer rule (see the module doc).
#[derive(Debug, Default)]
pub struct UnnestForgetsKeys;

/// The rule's name in the optimizer's list (and in `EXPLAIN VERBOSE`).
pub const RULE_NAME: &str = "ratesheet_unnest_forgets_keys";

impl OptimizerRule for UnnestForgetsKeys {
    fn name(&self) -> &str {
        RULE_NAME
    }

    fn supports_rewrite(&self) -> bool {
        true
    }

    fn rewrite(&self, plan: LogicalPlan, _config: &dyn OptimizerConfig) -> Result<Transformed<LogicalPlan>> {
        if !plan.exists(|p| Ok(matches!(p, LogicalPlan::Unnest(_))))? {
            return Ok(Transformed::no(plan));
        }
        forget_unnest_keys(plan)
    }
}

/// Bottom-up: an `Unnest` loses its dependencies; a node above a changed child recomputes its
/// schema (and with it the dependencies it derives from its inputs).
fn forget_unnest_keys(plan: LogicalPlan) -> Result<Transformed<LogicalPlan>> {
    let below = plan
        .map_subqueries(forget_unnest_keys)?
        .transform_data(|p| p.map_children(forget_unnest_keys))?;
    let changed = below.transformed;
    let mut node = if changed {
        below.data.recompute_schema()?
    } else {
        below.data
    };
    if let LogicalPlan::Unnest(unnest) = &mut node {
        if !unnest.schema.functional_dependencies().is_empty() {
            let schema = unnest
                .schema
                .as_ref()
                .clone()
                .with_functional_dependencies(FunctionalDependencies::empty())?;
            unnest.schema = Arc::new(schema);
            return Ok(Transformed::yes(node));
        }
    }
    Ok(Transformed::new_transformed(node, changed))
}

/// `rules` with [`UnnestForgetsKeys`] before each rule named in [`DEPENDENCY_READERS`]; a list
/// that has it already is returned unchanged.
pub fn with_unnest_correction(
    rules: &[Arc<dyn OptimizerRule + Send + Sync>],
) -> Vec<Arc<dyn OptimizerRule + Send + Sync>> {
    if rules.iter().any(|r| r.name() == RULE_NAME) {
        return rules.to_vec();
    }
    let correction: Arc<dyn OptimizerRule + Send + Sync> = Arc::new(UnnestForgetsKeys);
    let mut out = Vec::with_capacity(rules.len() + DEPENDENCY_READERS.len());
    for rule in rules {
        if DEPENDENCY_READERS.contains(&rule.name()) {
            out.push(correction.clone());
        }
        out.push(rule.clone());
    }
    out
}
