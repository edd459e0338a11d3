//! Panics inside the readers become errors. Decoders of file formats can panic on damaged
//! metadata (a fuzzed Parquet footer made the Arrow schema decoder panic); a damaged file must
//! be refused with an error, never end the session.

use std::future::Future;

use datafusion::common::runtime::SpawnedTask;
use datafusion::error::{DataFusionError, Result};

/// Every error made from a caught panic contains this text; it survives wrapping (the run path
/// adds the files read), so callers and tests can tell a caught panic from a refusal.
pub const CAUGHT_PANIC: &str = "the reader panicked";

/// Whether an error's text comes from a panic caught by [`without_panics`].
pub fn is_caught_panic(text: &str) -> bool {
    text.contains(CAUGHT_PANIC)
}

/// Runs `work` on its own task; a panic there becomes an execution error starting with `what`.
/// The task is aborted when the returned future is dropped (a cancelled statement must not
/// keep running, or holding memory, in the background).
pub async fn without_panics<T: Send + 'static>(
    what: &str,
    work: impl Future<Output = Result<T>> + Send + 'static,
) -> Result<T> {
    match SpawnedTask::spawn(work).join().await {
        Ok(result) => result,
        Err(e) if e.is_panic() => {
            let payload = e.into_panic();
            let text = payload
                .downcast_ref::<String>()
                .cloned()
                .or_else(|| payload.downcast_ref::<&str>().map(|s| s.to_string()))
                .unwrap_or_else(|| "no message".into());
            Err(DataFusionError::Execution(format!(
                "{what}: {CAUGHT_PANIC} on damaged data ({text})"
            )))
        }
        Err(e) => Err(DataFusionError::Execution(format!("{what}: stopped ({e})"))),
    }
}
