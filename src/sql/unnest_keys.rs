//! A planning correction: rows that come out of `unnest` are not unique by their input's keys.
//!
//! DataFusion 55 builds an `Unnest` node with its input's functional dependencies unchanged
//! (`Unnest::try_new`: "we can use the existing functional dependencies"). A list unnest turns
//! one input row into several, so a key that was unique before (the `district` of a
//! `GROUP BY district`) repeats afterwards and no longer determines the unnested column.
//! Optimizer rules that read the dependencies then drop work that was needed:
//! `eliminate_duplicated_expr` prunes the second key of `ORDER BY district, term`,
//! `replace_distinct_aggregate` drops a `DISTINCT`, `eliminate_join` turns a join into a semi
//! join. Each is a silently wrong answer.
//!
//! [`UnnestForgetsKeys`] removes the dependencies of every `Unnest` node and recomputes the
//! schemas above it; [`with_unnest_correction`] places it before each rule that reads them
//! ([`DEPENDENCY_READERS`]), because any rule may rebuild an `Unnest` node (and
//! `Unnest::try_new` copies the dependencies again).
//!
//! The SQL planner reads them too, before any rule runs: it adds every column a `GROUP BY` key
//! "determines" to the grouping (so that `SELECT k, v ... GROUP BY k` plans), and after `unnest`
//! that adds the unnested column to `GROUP BY k`. Plain DataFusion takes it out again in
//! `optimize_projections` with the same wrong dependency. [`ImplicitGroupKeys`], an analyzer
//! rule, takes out exactly the keys the planner added (the tail of the grouping that the
//! planner's own expansion of a shorter head produces) when nothing above reads them. What it
//! cannot tell apart, and nobody can from the plan: an explicit `GROUP BY k, v` over unnested
//! `v` whose `v` nothing above reads (a count of (k, v) pairs) plans exactly like `GROUP BY k`,
//! and groups by `k` alone, as in plain DataFusion 55; select `v` as well. The README says so.
//!
//! Both can go once DataFusion's `Unnest` stops copying its input's dependencies (see
//! DEVELOPERS.md).

use std::collections::HashSet;
use std::sync::Arc;

use datafusion::common::config::ConfigOptions;
use datafusion::common::tree_node::{Transformed, TreeNode, TreeNodeRecursion};
use datafusion::common::{Column, DFSchema, FunctionalDependencies, Result};
use datafusion::logical_expr::logical_plan::builder::add_group_by_exprs_from_dependencies;
use datafusion::logical_expr::{Aggregate, Expr, LogicalPlan};
use datafusion::optimizer::{AnalyzerRule, OptimizerConfig, OptimizerRule};

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

/// The analyzer rule's name.
pub const IMPLICIT_KEYS_NAME: &str = "ratesheet_unnest_implicit_group_keys";

impl OptimizerRule for UnnestForgetsKeys {
    fn name(&self) -> &str {
        RULE_NAME
    }

    fn supports_rewrite(&self) -> bool {
        true
    }

    fn rewrite(&self, plan: LogicalPlan, _config: &dyn OptimizerConfig) -> Result<Transformed<LogicalPlan>> {
        if !contains_unnest(&plan)? {
            return Ok(Transformed::no(plan));
        }
        forget_unnest_keys(plan)
    }
}

/// Whether `plan` (subqueries included) has an `Unnest` node.
fn contains_unnest(plan: &LogicalPlan) -> Result<bool> {
    let mut found = false;
    plan.apply_with_subqueries(|p| {
        found |= matches!(p, LogicalPlan::Unnest(_));
        Ok(if found {
            TreeNodeRecursion::Stop
        } else {
            TreeNodeRecursion::Continue
        })
    })?;
    Ok(found)
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

/// The analyzer rule that takes out the grouping keys the SQL planner added after `unnest`
/// (see the module doc).
#[derive(Debug, Default)]
pub struct ImplicitGroupKeys;

impl AnalyzerRule for ImplicitGroupKeys {
    fn analyze(&self, plan: LogicalPlan, _config: &ConfigOptions) -> Result<LogicalPlan> {
        if !contains_unnest(&plan)? {
            return Ok(plan);
        }
        Ok(drop_implicit_keys(plan, &HashSet::new())?.data)
    }

    fn name(&self) -> &str {
        IMPLICIT_KEYS_NAME
    }
}

/// Top-down with the columns read by the nodes above (`read_above`): an aggregation over an
/// `Unnest` loses the keys the planner added that nothing above reads; nodes above a changed
/// child recompute their schemas.
fn drop_implicit_keys(plan: LogicalPlan, read_above: &HashSet<Column>) -> Result<Transformed<LogicalPlan>> {
    let mut plan = plan;
    if let LogicalPlan::Aggregate(aggregate) = &plan {
        if contains_unnest(&aggregate.input)? {
            if let Some(keep) = explicit_group_len(aggregate)? {
                let output = aggregate.schema.clone();
                let needed = |i: usize| read_above.contains(&Column::from(output.qualified_field(i)));
                let group: Vec<Expr> = aggregate
                    .group_expr
                    .iter()
                    .enumerate()
                    .filter(|(i, _)| *i < keep || needed(*i))
                    .map(|(_, e)| e.clone())
                    .collect();
                if group.len() < aggregate.group_expr.len() {
                    plan = LogicalPlan::Aggregate(Aggregate::try_new(
                        aggregate.input.clone(),
                        group,
                        aggregate.aggr_expr.clone(),
                    )?);
                }
            }
        }
    }
    let mut here = read_above.clone();
    plan.apply_expressions(|e| {
        e.apply(|sub| {
            if let Expr::Column(c) = sub {
                here.insert(c.clone());
            }
            Ok(TreeNodeRecursion::Continue)
        })
    })?;
    let children = plan.map_children(|child| drop_implicit_keys(child, &here))?;
    let changed = children.transformed;
    let node = if changed {
        children.data.recompute_schema()?
    } else {
        children.data
    };
    Ok(Transformed::new_transformed(node, changed))
}

/// The number of leading grouping keys the query wrote, when the rest are exactly what the
/// planner's dependency expansion of those adds; `None` when nothing was added.
fn explicit_group_len(aggregate: &Aggregate) -> Result<Option<usize>> {
    let schema: &Arc<DFSchema> = aggregate.input.schema();
    let group = &aggregate.group_expr;
    for head in 1..group.len() {
        if add_group_by_exprs_from_dependencies(group[..head].to_vec(), schema)? == *group {
            return Ok(Some(head));
        }
    }
    Ok(None)
}
