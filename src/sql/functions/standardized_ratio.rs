//! `standardized_ratio(events, exposure, reference_rate [, 'options'])` and
//! `standardized_ratio(events, expected [, 'options'])`: observed over expected per group
//! (indirect standardisation). Implementation: `sql::standardize` and `glm::standardize`.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::standardize::StandardizeFunction;
use crate::sql::standardize::indirect::ObservedExpected;
use crate::sql::standardize::settings::Standardization;

pub fn standardized_ratio() -> AggregateUDF {
    AggregateUDF::from(StandardizeFunction::<ObservedExpected>::new(
        Standardization::Indirect,
        || &DOC,
    ))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Indirectly standardised ratio of each group (SMR/SIR): observed = sum of events, expected = sum of \
         exposure * reference_rate (or of the expected column in the two-argument form, e.g. from \
         fit_expected). Returns {observed, expected, ratio, low, high, p_value, method, level, n_rows, \
         n_skipped, n_invalid, status}: ratio = observed/expected with the exact (Garwood) interval and the \
         exact two-sided Poisson p-value of ratio 1 (NULL, with a reason in status, when observed is not a \
         whole number).",
        "standardized_ratio(events, exposure, reference_rate [, 'options'])",
    )
    .with_argument("events", "Observed events (>= 0).")
    .with_argument("exposure", "Exposure (> 0); omit it and give expected counts instead.")
    .with_argument(
        "reference_rate",
        "The reference (standard) rate for the row's stratum (>= 0).",
    )
    .with_argument(
        "options",
        "Optional literal 'key=value, ...': level, invalid (error|skip).",
    )
    .with_sql_example(
        "SELECT standardized_ratio(events, exposure, reference)['p_value'] AS p\n\
         FROM (VALUES (3, 1200.0, 0.002), (9, 800.0, 0.01)) AS t(events, exposure, reference);",
    )
    .build()
});
