//! `standardized_rate(events, exposure, standard_weight [, 'options'])`: the directly
//! standardised rate per group with a gamma interval. Implementation: `sql::standardize`
//! (aggregate) and `glm::standardize` (formulas); this file binds the name and documentation.

use std::sync::LazyLock;

use datafusion::logical_expr::{AggregateUDF, Documentation};

use crate::glm::standardize::StrataSums;
use crate::sql::model::aggregate::DOC_SECTION;
use crate::sql::standardize::StandardizeFunction;
use crate::sql::standardize::settings::Standardization;

pub fn standardized_rate() -> AggregateUDF {
    AggregateUDF::from(StandardizeFunction::<StrataSums>::new(Standardization::Direct, || &DOC))
}

static DOC: LazyLock<Documentation> = LazyLock::new(|| {
    Documentation::builder(
        DOC_SECTION,
        "Directly standardised rate of each group: each input row is one stratum (for example one age \
         band or one material and decade) with its events, exposure and the standard population's weight. \
         Weights are normalised over the group's rows, rate = sum of w_j * events_j / exposure_j. Returns \
         {rate, low, high, crude_rate, events, exposure, n_strata, method, std_error, shift_mean, \
         shift_variance, weight_total, per, level, n_skipped, n_invalid, status}; the interval is the Fay-Feuer (1997) \
         gamma interval, or with method=tiwari the Tiwari-Clegg-Zou (2006) one. A stratum must appear once \
         per group; a group missing strata is normalised over the strata it has: compare n_strata and \
         weight_total (the group's sum of standard weights) across groups to see it.",
        "standardized_rate(events, exposure, standard_weight [, 'options'])",
    )
    .with_argument("events", "Events in the stratum (>= 0).")
    .with_argument(
        "exposure",
        "Exposure of the stratum (> 0), e.g. km-years or person-years.",
    )
    .with_argument(
        "standard_weight",
        "The standard population's weight of the stratum (>= 0); normalised per group.",
    )
    .with_argument(
        "options",
        "Optional literal 'key=value, ...': level, per (rates per this much exposure, e.g. 100000), \
         method (fay_feuer|tiwari), invalid (error|skip).",
    )
    .with_sql_example(
        "SELECT standardized_rate(events, exposure, standard, 'per=1000')['high'] AS upper_per_1000\n\
         FROM (VALUES (3, 1200.0, 0.6), (9, 800.0, 0.4)) AS t(events, exposure, standard);",
    )
    .build()
});
