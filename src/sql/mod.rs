//! The SQL surface: ratesheet's aggregate and scalar functions for DataFusion.
//!
//! Each SQL function lives in its own file with its signature, evaluation and documentation.
//! [`register_functions`] registers all of them, and the `ratesheet.*` session options, on a
//! DataFusion session.

mod batch;
mod buffer;
pub mod fit_aggregate;
pub mod fit_expected;
pub mod fit_lr_test;
pub mod fit_term;
#[doc(hidden)]
pub mod fuzzing;
pub mod interaction;
pub mod options;
mod patterns;
pub mod rate_interval;
pub mod rate_ratio_test;
pub mod result;
mod scalar_util;
pub mod spec;
pub mod unnest_keys;

use datafusion::error::Result;
use datafusion::execution::FunctionRegistry;
use datafusion::execution::session_state::{SessionState, SessionStateBuilder};
use datafusion::logical_expr::{AggregateUDF, ScalarUDF};
use datafusion::prelude::SessionContext;

pub use options::RatesheetConfig;

/// All aggregate functions ratesheet adds.
pub fn aggregate_functions() -> Vec<AggregateUDF> {
    vec![
        fit_aggregate::poisson_fit(),
        fit_aggregate::poisson_count_fit(),
        fit_aggregate::linear_fit(),
    ]
}

/// All scalar functions ratesheet adds.
pub fn scalar_functions() -> Vec<ScalarUDF> {
    vec![
        fit_term::fit_term(),
        fit_expected::fit_expected(),
        fit_lr_test::fit_lr_test(),
        rate_interval::rate_interval(),
        rate_ratio_test::rate_ratio_test(),
        interaction::interaction(),
    ]
}

/// Registers every ratesheet function and the `ratesheet.*` options on a session context.
pub fn register_functions(ctx: &SessionContext) -> Result<()> {
    let state = ctx.state_ref();
    let mut state = state.write();
    register_functions_on_state(&mut state)
}

/// As [`register_functions`], for a `SessionState`. Also installs the planning correction of
/// [`unnest_keys`] (sort and grouping keys kept after `unnest`).
pub fn register_functions_on_state(state: &mut SessionState) -> Result<()> {
    let rules = unnest_keys::with_unnest_correction(state.optimizers());
    if rules.len() != state.optimizers().len() {
        *state = SessionStateBuilder::new_from_existing(state.clone())
            .with_optimizer_rules(rules)
            .build();
    }
    for f in aggregate_functions() {
        state.register_udaf(f.into())?;
    }
    for f in scalar_functions() {
        state.register_udf(f.into())?;
    }
    let options = state.config_mut().options_mut();
    if options.extensions.get::<RatesheetConfig>().is_none() {
        options.extensions.insert(RatesheetConfig::default());
    }
    Ok(())
}
