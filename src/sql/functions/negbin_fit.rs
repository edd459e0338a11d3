//! `negbin_fit(count, exposure, predictor, ... [, 'options'])`: a negative binomial rate model per group.
//!
//! The implementation is shared by the fit functions (`model::aggregate`); this file holds the
//! function's name binding and documentation.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::sql::model::aggregate::{DOC_SECTION, FitFunction};
use crate::sql::model::spec::FitKind;

pub fn negbin_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::NegBinRate, || &DOC))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits a negative binomial (NB2) rate model log(mu) = log(exposure) + b0 + b1*x1 + ..., Var(y) = mu + alpha*mu^2, to the rows of each group, with alpha estimated by maximum likelihood together with the coefficients. Returns the fit struct of poisson_fit with family 'negative binomial', plus alpha with its standard error and interval (Wald on log alpha) and poisson_lr_chi2/poisson_lr_p, the likelihood-ratio test of alpha = 0 (boundary p-value). Standard errors come from the joint observed information; se=hc0/hc1 work, se=quasi does not. Rows are buffered (no pattern sums).",
        "negbin_fit(count, exposure, predictor, ... [, 'options'])",
    )
    .with_argument("count", "Event count per row (>= 0).")
    .with_argument("exposure", "Exposure per row (> 0); the offset is log(exposure).")
    .with_argument("predictor", "Numeric, text or boolean expressions; interaction(a, b) adds a product term.")
    .with_argument("options", "Optional literal 'key=value, ...' (see poisson_fit; se=quasi is refused).")
    .with_sql_example(
        "SELECT negbin_fit(breaks, km_years, material)['alpha'] AS alpha\n\
         FROM (VALUES (12, 40.0, 'iron'), (3, 30.0, 'pvc'), (19, 35.0, 'iron'), (2, 28.0, 'pvc'), (1, 41.0, 'iron'), (9, 33.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});
