//! One-line hints on stderr about statements whose SQL is valid but rarely what a rate job
//! means. Each hint shows once per session; `~prefer hints off` or `--no-hints` turns them off.
//!
//! The one hint so far: dividing two whole-number expressions. SQL keeps that division whole
//! (`1000 * SUM(cases) / SUM(pop)` gives 10 for 10.217), which is the first line of a typical
//! rate job and easy to miss. SQL semantics stay as they are; the hint only says so.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

use datafusion::common::tree_node::{TreeNode, TreeNodeRecursion};
use datafusion::logical_expr::{BinaryExpr, Expr, ExprSchemable, LogicalPlan, Operator};

/// Whether the hint may still show in this session (shared by the shell's statement tasks).
#[derive(Debug, Clone)]
pub struct Hints {
    armed: Arc<AtomicBool>,
    /// Whether the user wants hints (`armed` also turns off once a hint has shown).
    wanted: Arc<AtomicBool>,
}

impl Hints {
    pub fn new(enabled: bool) -> Self {
        Hints {
            armed: Arc::new(AtomicBool::new(enabled)),
            wanted: Arc::new(AtomicBool::new(enabled)),
        }
    }

    /// Turns hints on (again) or off.
    pub fn set_enabled(&self, on: bool) {
        self.armed.store(on, Ordering::Relaxed);
        self.wanted.store(on, Ordering::Relaxed);
    }

    /// Whether hints are on (as the user last set them).
    pub fn enabled(&self) -> bool {
        self.wanted.load(Ordering::Relaxed)
    }

    /// Prints the hint for `plan` if it applies and has not been shown in this session.
    pub fn after_planning(&self, plan: &LogicalPlan) {
        if !self.armed.load(Ordering::Relaxed) {
            return;
        }
        if let Some(text) = integer_division_hint(plan) {
            if self.armed.swap(false, Ordering::Relaxed) {
                eprintln!("{text}");
            }
        }
    }
}

/// The hint text when `plan` has a whole-number result column and computes a value by dividing
/// two whole-number expressions.
pub fn integer_division_hint(plan: &LogicalPlan) -> Option<String> {
    if !plan.schema().fields().iter().any(|f| f.data_type().is_integer()) {
        return None;
    }
    let division = integer_division(plan)?;
    Some(format!(
        "hint: {division} divides whole numbers, and SQL keeps the result whole (10217 / 1000 gives 10); \
         for a rate, write 1000.0 or CAST(... AS DOUBLE). (Shown once; ~prefer hints off or --no-hints silences hints.)"
    ))
}

/// The first division of two whole-number expressions computed by a projection or an
/// aggregation of `plan`, rendered as SQL.
fn integer_division(plan: &LogicalPlan) -> Option<String> {
    let mut found = None;
    let _ = plan.apply_with_subqueries(|node| {
        if !matches!(node, LogicalPlan::Projection(_) | LogicalPlan::Aggregate(_)) {
            return Ok(TreeNodeRecursion::Continue);
        }
        let Some(input) = node.inputs().first().map(|i| i.schema().clone()) else {
            return Ok(TreeNodeRecursion::Continue);
        };
        node.apply_expressions(|e| {
            e.apply(|sub| {
                if let Expr::BinaryExpr(BinaryExpr {
                    left,
                    op: Operator::Divide,
                    right,
                }) = sub
                {
                    let whole = |x: &Expr| x.get_type(&input).is_ok_and(|t| t.is_integer());
                    if whole(left) && whole(right) {
                        found = Some(crate::sql::model::spec::render(sub));
                        return Ok(TreeNodeRecursion::Stop);
                    }
                }
                Ok(TreeNodeRecursion::Continue)
            })
        })
    });
    found
}
