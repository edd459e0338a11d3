//! `negbin_count_fit(count, predictor, ... [, 'options'])`: a negative binomial model of plain counts per group.
//!
//! The implementation is shared by the fit functions (`model::aggregate`); this file holds the
//! function's name binding and documentation.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::sql::model::aggregate::{DOC_SECTION, FitFunction};
use crate::sql::model::spec::FitKind;

pub fn negbin_count_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::NegBinCount, || &DOC))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits a negative binomial (NB2) model log(mu) = b0 + b1*x1 + ... to plain counts (every row has the same exposure). Same result struct and options as negbin_fit.",
        "negbin_count_fit(count, predictor, ... [, 'options'])",
    )
    .with_argument("count", "Event count per row (>= 0).")
    .with_argument("predictor", "Numeric, text or boolean expressions; interaction(a, b) adds a product term.")
    .with_argument("options", "Optional literal 'key=value, ...' (see negbin_fit).")
    .with_sql_example(
        "SELECT negbin_count_fit(callouts, season)['poisson_lr_p'] AS p\n\
         FROM (VALUES (5, 'winter'), (17, 'winter'), (0, 'winter'), (2, 'summer'), (9, 'summer'), (0, 'summer')) AS t(callouts, season);",
    )
    .build()
});
