//! `poisson_fit(count, exposure, predictor, ... [, 'options'])`: a Poisson rate model per group.
//!
//! The implementation is shared by the three fit functions (`model::aggregate`); this file holds
//! the function's name binding and documentation.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::sql::model::aggregate::{DOC_SECTION, FitFunction};
use crate::sql::model::spec::FitKind;

pub fn poisson_fit() -> AggregateUDF {
    AggregateUDF::from(FitFunction::new(FitKind::PoissonRate, || &DOC))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Fits a Poisson rate model log(mu) = log(exposure) + b0 + b1*x1 + ... to the rows of each group \
         and returns the fit as a struct: status, counts, deviance, Pearson chi-square, dispersion, \
         goodness-of-fit and likelihood-ratio tests, the overdispersion test, log-likelihood, AIC/BIC and \
         `terms`, one entry per coefficient with estimate, standard error, z, p-value, confidence interval, \
         rate ratio exp(b) and its interval. Text and boolean predictors are factors (treatment coding, \
         reference = first level in sorted order unless ref.<name> says otherwise). Rows with a NULL are \
         skipped and counted in n_skipped.",
        "poisson_fit(count, exposure, predictor, ... [, 'options'])",
    )
    .with_argument("count", "Event count per row (>= 0).")
    .with_argument("exposure", "Exposure per row (> 0), e.g. km-years of pipe; the offset is log(exposure).")
    .with_argument("predictor", "Numeric, text or boolean expressions; interaction(a, b) adds a product term.")
    .with_argument(
        "options",
        "Optional literal 'key=value, ...': level, se (model|quasi|hc0|hc1), invalid (error|skip), \
         intercept (yes|no), max_iter, tol, ref.<predictor>=<level>.",
    )
    .with_sql_example(
        "SELECT fit_term(poisson_fit(breaks, km_years, material, 'ref.material=iron'), 'material=pvc')['rate_ratio'] AS rr\n\
         FROM (VALUES (12, 40.0, 'iron'), (9, 35.0, 'iron'), (3, 30.0, 'pvc'), (2, 28.0, 'pvc')) AS t(breaks, km_years, material);",
    )
    .build()
});
