//! Beyond one machine (feature `cluster`): Apache Ballista processes that know ratesheet.
//!
//! Ballista has no plugin mechanism, so every process of a cluster is built from the same
//! pieces here: [`cluster_config`] (Ballista's settings plus the `ratesheet.*` options, so that
//! session settings arriving by name are applied, not dropped) and [`cluster_state`] (that config,
//! every ratesheet function and planning correction, and `s3://` stores from the process's own
//! environment). [`scheduler`] and [`executor`] start the two kinds of process with them;
//! [`client`] turns a shell session into one that runs every statement on a cluster.
//!
//! What crosses machines: the client plans and optimises a statement (so a fit's options are
//! resolved there, into the spec literal of the call) and sends the logical plan; the scheduler
//! plans it again with the same functions and splits it into stages; executors decode their
//! tasks with the same function registry; fit states travel through Ballista's shuffle files in
//! the versioned state layout. Credentials never travel: each process reads its own AWS
//! environment variables.

pub mod client;
pub mod executor;
pub mod scheduler;

use std::path::Path;
use std::sync::Arc;

use ballista_core::extension::SessionConfigExt;
use datafusion::error::Result;
use datafusion::execution::SessionState;
use datafusion::execution::runtime_env::{RuntimeEnv, RuntimeEnvBuilder};
use datafusion::prelude::SessionConfig;

/// The scheduler's gRPC port when none is given (Ballista's usual one).
pub const DEFAULT_SCHEDULER_PORT: u16 = 50050;

/// Ballista's session settings with the `ratesheet.*` options registered, and the static
/// planner (see [`client::connect`] for why not the adaptive one).
pub fn cluster_config() -> SessionConfig {
    let config = SessionConfig::new_with_ballista()
        .with_information_schema(true)
        .with_ballista_adaptive_query_planner(false);
    crate::with_ratesheet_options(config)
}

/// A session state for any process of a cluster: `config` (which should come from
/// [`cluster_config`]), DataFusion's defaults, every ratesheet function and correction, and a
/// runtime whose `s3://` stores come from this process's environment.
pub fn cluster_state(config: SessionConfig) -> Result<SessionState> {
    let state = crate::session_state(config)?;
    let runtime = cluster_runtime(None)?;
    Ok(datafusion::execution::SessionStateBuilder::new_from_existing(state)
        .with_runtime_env(runtime)
        .build())
}

/// A runtime with `s3://` stores built from this process's environment; spill files go to
/// `work_dir` when given.
pub fn cluster_runtime(work_dir: Option<&Path>) -> Result<Arc<RuntimeEnv>> {
    let mut builder =
        RuntimeEnvBuilder::new().with_object_store_registry(Arc::new(crate::storage::EnvObjectStores::new()));
    if let Some(dir) = work_dir {
        builder = builder.with_temp_file_path(dir);
    }
    builder.build_arc()
}

/// `HOST:PORT` (or `HOST`, with [`DEFAULT_SCHEDULER_PORT`]) as host and port, refusing anything
/// else with a message naming `what`.
pub fn host_and_port(text: &str, what: &str) -> std::result::Result<(String, u16), String> {
    let text = text.trim();
    let bare = text
        .strip_prefix("df://")
        .or_else(|| text.strip_prefix("http://"))
        .unwrap_or(text);
    let (host, port) = match bare.rsplit_once(':') {
        Some((h, p)) => {
            let port = p
                .parse::<u16>()
                .map_err(|_| format!("{what} {text}: the port must be a number from 1 to 65535"))?;
            (h, port)
        }
        None => (bare, DEFAULT_SCHEDULER_PORT),
    };
    if host.is_empty() || host.contains('/') || port == 0 {
        return Err(format!(
            "{what} {text}: expected HOST:PORT, such as 127.0.0.1:{DEFAULT_SCHEDULER_PORT}"
        ));
    }
    Ok((host.trim_start_matches('[').trim_end_matches(']').to_string(), port))
}

/// Ballista's own log lines go to stderr, and only when asked for: `RATESHEET_LOG=info` (or
/// `debug`, `warn`, a filter such as `ballista_scheduler=debug`). `default` applies otherwise.
pub fn init_logging(default: &str) {
    let filter = std::env::var("RATESHEET_LOG").unwrap_or_else(|_| default.to_string());
    let _ = env_logger::Builder::new()
        .parse_filters(&filter)
        .target(env_logger::Target::Stderr)
        .try_init();
}

/// Waits for Ctrl-C or SIGTERM.
pub async fn stop_signal() {
    #[cfg(unix)]
    {
        let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(s) => s,
            Err(_) => {
                let _ = tokio::signal::ctrl_c().await;
                return;
            }
        };
        tokio::select! {
            _ = tokio::signal::ctrl_c() => {}
            _ = term.recv() => {}
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn addresses_are_read_with_a_default_port_and_refused_by_name() {
        assert_eq!(
            host_and_port("127.0.0.1:7000", "--cluster"),
            Ok(("127.0.0.1".into(), 7000))
        );
        assert_eq!(
            host_and_port("node-a", "--cluster"),
            Ok(("node-a".into(), DEFAULT_SCHEDULER_PORT))
        );
        assert_eq!(host_and_port("df://node-a:1", "--cluster"), Ok(("node-a".into(), 1)));
        let e = host_and_port("node-a:http", "--cluster").unwrap_err();
        assert!(e.starts_with("--cluster node-a:http: the port"), "{e}");
        assert!(
            host_and_port(":7000", "--scheduler")
                .unwrap_err()
                .contains("expected HOST:PORT")
        );
    }

    #[test]
    fn a_cluster_config_accepts_ratesheet_settings_by_name() {
        let mut config = cluster_config();
        config.options_mut().set("ratesheet.level", "0.9").unwrap();
        let entries = config.options().entries();
        let level = entries.iter().find(|e| e.key == "ratesheet.level").unwrap();
        assert_eq!(level.value.as_deref(), Some("0.9"));
    }
}
