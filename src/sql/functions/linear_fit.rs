//! `linear_fit(y, predictor, ... [, 'options'])`: a least-squares baseline per group, in the fit struct's shape.
//!
//! The implementation is shared by the three fit functions (`model::aggregate`); this file holds
//! the function's name binding and documentation.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::sql::model::aggregate::{DOC_SECTION, FitFunction};
use crate::sql::model::spec::FitKind;

pub fn linear_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::Linear, || &DOC))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits an ordinary least-squares model y = b0 + b1*x1 + ... per group, with the same result struct: \
         `z` holds t statistics (p-values and intervals from Student t on df_resid), `dispersion` the \
         residual variance, f_stat/f_p the F test against the intercept-only model. With y = ln(count + 1), \
         exp(estimate) (the rate_ratio field) reads as a relative change in the geometric mean; for any other \
         response the rate ratio fields are NULL and the status says why (option response=log|plain overrides \
         the detection of ln(...)).",
        "linear_fit(y, predictor, ... [, 'options'])",
    )
    .with_argument("y", "Numeric response.")
    .with_argument("predictor", "Numeric, text or boolean expressions.")
    .with_argument(
        "options",
        "Optional literal 'key=value, ...' (see poisson_fit); also response=log|plain (whether y is a natural logarithm).",
    )
    .with_sql_example(
        "SELECT fit_term(linear_fit(ln(breaks + 1), age), 'age')['estimate'] AS slope\n\
         FROM (VALUES (1, 10.0), (3, 20.0), (4, 30.0), (9, 40.0)) AS t(breaks, age);",
    )
    .build()
});
