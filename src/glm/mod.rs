//! The numerical core: generalized linear models for counts with exposure, fitted exactly.
//!
//! This module knows nothing about SQL, Arrow or terminals (it imports neither DataFusion nor
//! Arrow): it takes columnar `f64` slices and returns plain Rust values, so that the SQL
//! functions, the shell, the benchmarks and any other executor call the same code.
//!
//! * [`design`]: predictors -> model matrix with stable column names;
//! * [`family`]: distributions and links (Poisson/log, Gaussian/identity);
//! * [`fit()`]: the fit in small steps (checks, aliasing, IRLS, boundary handling, covariances,
//!   statistics);
//! * [`inference`]: coefficient tables (model, quasi, HC0, HC1) and model tests;
//! * [`distributions`]: tail probabilities and quantiles (normal, t, chi-square, F);
//! * [`collapse`]: Poisson fits on merged covariate patterns with row-level statistics;
//! * [`closed_form`]: exact single-rate intervals and two-rate comparisons;
//! * [`standardize`]: direct (gamma intervals) and indirect (observed/expected) standardisation.

pub mod closed_form;
pub mod collapse;
pub mod design;
pub mod distributions;
mod error;
pub mod family;
mod fit;
pub mod inference;
mod irls;
mod kernels;
pub mod negbin;
mod overdispersion;
pub mod profile;
mod solve;
pub mod standardize;

pub use design::{
    ColumnKind, Design, DesignSpec, FactorColumn, MAX_DESIGN_COLUMNS, OwnedFactor, Predictor, PredictorValues,
};
pub use error::FitError;
pub use family::{Family, FamilyKind, FamilyTests, Gaussian, Poisson, Scale};
pub use fit::{
    FamilyParameter, FitInput, FitIssue, FitStats, GlmFit, TermState, deviance_residuals, fit, log_exposure,
    pearson_residuals,
};
pub use inference::{ModelTest, SeType, TermRow, model_test, term_table};
pub use irls::{FitOptions, WARM_START_ROWS};
pub use negbin::{NegativeBinomial, fit_negative_binomial};
pub use overdispersion::ScoreTest;
