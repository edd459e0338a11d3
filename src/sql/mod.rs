//! The SQL surface: ratesheet's aggregate and scalar functions for DataFusion.
//!
//! Two folders: [`model`] is the machinery of the fit aggregates (the typed model spec
//! resolved at planning, batch decoding, the group buffers and their state codec, evaluation,
//! the fit struct's field table); [`functions`] holds the SQL functions, one file each, with
//! their signature, evaluation and documentation. [`register_functions`] registers all of
//! them, the `ratesheet.*` session options and the `unnest` planning correction on a session.

pub mod functions;
pub mod model;
pub mod single_phase;
pub mod standardize;
pub mod unnest_keys;

use datafusion::error::Result;
use datafusion::execution::FunctionRegistry;
use datafusion::execution::session_state::{SessionState, SessionStateBuilder};
use datafusion::logical_expr::{AggregateUDF, ScalarUDF};
use datafusion::prelude::{SessionConfig, SessionContext};

pub use model::options::RatesheetConfig;

/// All aggregate functions ratesheet adds.
pub fn aggregate_functions() -> Vec<AggregateUDF> {
    vec![
        functions::poisson_fit::poisson_fit(),
        functions::poisson_count_fit::poisson_count_fit(),
        functions::linear_fit::linear_fit(),
        functions::negbin_fit::negbin_fit(),
        functions::negbin_count_fit::negbin_count_fit(),
        functions::standardized_rate::standardized_rate(),
        functions::standardized_ratio::standardized_ratio(),
    ]
}

/// All scalar functions ratesheet adds.
pub fn scalar_functions() -> Vec<ScalarUDF> {
    vec![
        functions::fit_term::fit_term(),
        functions::fit_expected::fit_expected(),
        functions::fit_expected_interval::fit_expected_interval(),
        functions::fit_comparison::fit_lr_test(),
        functions::rate_interval::rate_interval(),
        functions::rate_comparison::rate_ratio_test(),
        functions::standardized_rate_ratio::standardized_rate_ratio(),
        functions::interaction::interaction(),
        functions::ratesheet_version::ratesheet_version(),
    ]
}

/// Registers every ratesheet function and the `ratesheet.*` options on a session context.
pub fn register_functions(ctx: &SessionContext) -> Result<()> {
    let state = ctx.state_ref();
    let mut state = state.write();
    register_functions_on_state(&mut state)
}

/// As [`register_functions`], for a `SessionState`. Also installs the planning correction of
/// [`unnest_keys`] (sort and grouping keys kept after `unnest`) and, when the session's memory
/// pool is unbounded, the physical rule of [`single_phase`] (fit aggregates in one phase over
/// hash-partitioned input).
pub fn register_functions_on_state(state: &mut SessionState) -> Result<()> {
    let rules = unnest_keys::with_unnest_correction(state.optimizers());
    if rules.len() != state.optimizers().len() {
        *state = SessionStateBuilder::new_from_existing(state.clone())
            .with_optimizer_rules(rules)
            .build();
    }
    let installed = state
        .physical_optimizers()
        .iter()
        .any(|r| r.name() == single_phase::NAME);
    if !installed && single_phase::suits(state.runtime_env()) {
        *state = SessionStateBuilder::new_from_existing(state.clone())
            .with_physical_optimizer_rule(std::sync::Arc::new(single_phase::SinglePhaseFits))
            .build();
    }
    let analyzed = state
        .analyzer()
        .rules
        .iter()
        .any(|r| r.name() == unnest_keys::IMPLICIT_KEYS_NAME);
    if !analyzed {
        state.add_analyzer_rule(std::sync::Arc::new(unnest_keys::ImplicitGroupKeys));
    }
    for f in aggregate_functions() {
        state.register_udaf(f.into())?;
    }
    for f in scalar_functions() {
        state.register_udf(f.into())?;
    }
    let config = std::mem::take(state.config_mut());
    *state.config_mut() = with_ratesheet_options(config);
    Ok(())
}

/// `config` with the `ratesheet.*` options registered (unchanged if they are already), so that
/// `SET ratesheet.level = 0.9` and settings arriving by name (a cluster's session settings) are
/// accepted and validated instead of dropped.
pub fn with_ratesheet_options(mut config: SessionConfig) -> SessionConfig {
    let options = config.options_mut();
    if options.extensions.get::<RatesheetConfig>().is_none() {
        options.extensions.insert(RatesheetConfig::default());
    }
    config
}

/// A session state with DataFusion's default features and everything [`register_functions`]
/// adds: what an embedding program hands to a distributed engine (a Ballista scheduler's
/// session builder, an executor's function registry, a client's `remote_with_state`).
pub fn session_state(config: SessionConfig) -> Result<SessionState> {
    let mut state = SessionStateBuilder::new()
        .with_default_features()
        .with_config(with_ratesheet_options(config))
        .build();
    register_functions_on_state(&mut state)?;
    Ok(state)
}
