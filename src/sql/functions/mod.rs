//! The SQL functions, one file each: signature, evaluation and documentation. The three fit
//! aggregates share their implementation (`model`); their files bind the name and the
//! documentation.

pub mod args;
pub mod fit_comparison;
pub mod fit_expected;
pub mod fit_expected_interval;
pub mod fit_term;
pub mod interaction;
pub mod linear_fit;
pub mod negbin_count_fit;
pub mod negbin_fit;
pub mod poisson_count_fit;
pub mod poisson_fit;
pub mod rate_comparison;
pub mod rate_interval;
pub mod ratesheet_version;
pub mod standardized_rate;
pub mod standardized_rate_ratio;
pub mod standardized_ratio;
