//! The machinery of the fit aggregates, in the order data flows through it: the call is
//! resolved once at planning into a typed [`spec::ModelSpec`] (with its [`options`]); input
//! batches are decoded ([`decode`]) into a group buffer ([`group_buffer`]: [`rows`] or
//! [`patterns`]) whose aggregate state crosses partitions and processes in one versioned
//! layout ([`state`]); at evaluation each group is fitted ([`evaluate`]) and reported through
//! the field table ([`fields`]). [`aggregate`] is the DataFusion UDF that ties them together.

pub mod aggregate;
pub mod decode;
pub mod evaluate;
pub mod fields;
#[doc(hidden)]
pub mod fuzzing;
pub mod group_buffer;
pub mod options;
pub mod patterns;
pub mod rows;
pub mod spec;
pub mod state;
