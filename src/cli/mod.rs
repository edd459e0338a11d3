//! The command-line program: sessions over files, rendering of results, the interactive shell.
//!
//! This layer only wires things together: it opens files as DataFusion tables, runs SQL, and
//! renders Arrow batches. Everything statistical lives in `glm` and `sql`.

pub mod allocator;
pub mod guard;
pub mod hints;
pub mod output;
pub mod picture;
pub mod progress;
pub mod session;
pub mod shell;
pub mod statements;
pub mod workbook;
