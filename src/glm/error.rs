//! Errors of the numerical core: invalid inputs, each naming the column, row and value.

use std::fmt;

/// Why a fit could not even be attempted. Conditions found while fitting (aliasing, boundary
/// estimates, no convergence) are not errors: they are reported as issues on the fit.
#[derive(Debug, Clone, PartialEq)]
pub enum FitError {
    /// A value that must be finite is NaN or infinite.
    NonFinite { column: String, row: usize, value: f64 },
    /// A response value the family does not accept (for example a negative count).
    BadResponse {
        row: usize,
        value: f64,
        reason: &'static str,
    },
    /// Exposure must be finite and strictly positive.
    BadExposure { row: usize, value: f64 },
    /// Prior weights must be finite and strictly positive.
    BadWeight { row: usize, value: f64 },
    /// Two inputs that must have one value per row differ in length.
    LengthMismatch {
        what: String,
        expected: usize,
        found: usize,
    },
    /// The design would be wider than the documented limit.
    TooManyColumns { columns: usize, limit: usize },
    /// A malformed model specification or option.
    BadSpec(String),
}

impl fmt::Display for FitError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            FitError::NonFinite { column, row, value } => {
                write!(f, "{column} has the non-finite value {value} in row {row}")
            }
            FitError::BadResponse { row, value, reason } => {
                write!(f, "response value {value} in row {row} is not allowed: {reason}")
            }
            FitError::BadExposure { row, value } => {
                write!(
                    f,
                    "exposure {value} in row {row} is not allowed: exposure must be finite and > 0"
                )
            }
            FitError::BadWeight { row, value } => {
                write!(
                    f,
                    "weight {value} in row {row} is not allowed: weights must be finite and > 0"
                )
            }
            FitError::LengthMismatch { what, expected, found } => {
                write!(f, "{what} has {found} values but the model has {expected} rows")
            }
            FitError::TooManyColumns { columns, limit } => write!(
                f,
                "the model would have {columns} design columns, above the limit of {limit}; \
                 a factor with that many levels is usually an identifier, not a predictor"
            ),
            FitError::BadSpec(msg) => f.write_str(msg),
        }
    }
}

impl std::error::Error for FitError {}
