//! The whole test suite in one binary (each extra test binary would link DataFusion again).

mod cli;
mod cluster;
mod core_behaviour;
mod core_closed_form;
mod core_reference;
mod core_simulation;
mod demo;
mod features;
mod fuzz_inputs;
mod hostile_files;
mod limits;
mod object_storage;
mod pictures;
mod shell;
mod soak;
mod sql_engine;
mod sql_examples;
mod sql_smoke;
mod sql_standardize;
mod support;
