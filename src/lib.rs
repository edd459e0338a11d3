//! ratesheet: per-group Poisson rate models as SQL aggregate functions over Parquet and CSV.
//!
//! Data flows one way: files -> DataFusion scan -> our aggregates -> [`glm`] (the numerical
//! core) -> Arrow result columns -> rendering. See DEVELOPERS.md for the code map.

pub mod glm;
pub mod sql;

pub use sql::{register_functions, register_functions_on_state, session_state, with_ratesheet_options};
/// The command-line program (feature `cli`, on by default).
#[cfg(feature = "cli")]
pub mod cli;
/// Apache Ballista: scheduler and executor processes with ratesheet's functions, and a client
/// session that runs every statement on such a cluster (feature `cluster`, part of `cli`).
#[cfg(feature = "cluster")]
pub mod cluster;
/// The seeded generator of the demo data (feature `cli`).
#[cfg(feature = "cli")]
pub mod demo;
/// `s3://` object storage from the AWS environment variables (feature `s3`, part of `cli`).
#[cfg(feature = "s3")]
pub mod storage;
