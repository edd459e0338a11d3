//! `ratesheet cluster executor`: a Ballista executor whose tasks can run ratesheet's functions.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use ballista_core::registry::BallistaFunctionRegistry;
use ballista_executor::executor_process::{ExecutorProcessConfig, start_executor_process};
use datafusion::error::{DataFusionError, Result};

use super::scheduler::ballista_error;
use super::{cluster_config, cluster_runtime, cluster_state};

/// How an executor runs.
#[derive(Debug, Clone)]
pub struct ExecutorSettings {
    /// The scheduler to join.
    pub scheduler_host: String,
    pub scheduler_port: u16,
    /// Host to listen on and to advertise to the scheduler and the other executors.
    pub bind_host: String,
    /// The data port (Arrow Flight: shuffle files and results) and the control port; free ports
    /// are picked when not given, so that several executors run on one machine.
    pub data_port: Option<u16>,
    pub control_port: Option<u16>,
    /// Tasks run at once (default: the number of cores).
    pub slots: Option<usize>,
    /// Where shuffle files and spills go (default: a new temporary folder).
    pub work_dir: Option<PathBuf>,
    /// Memory for all running tasks together, in bytes; tasks spill beyond their share.
    pub memory_limit: Option<usize>,
    /// How often the executor tells the scheduler it is alive.
    pub heartbeat: Duration,
}

impl ExecutorSettings {
    pub fn new(scheduler_host: impl Into<String>, scheduler_port: u16) -> Self {
        ExecutorSettings {
            scheduler_host: scheduler_host.into(),
            scheduler_port,
            bind_host: "127.0.0.1".into(),
            data_port: None,
            control_port: None,
            slots: None,
            work_dir: None,
            memory_limit: None,
            heartbeat: Duration::from_secs(2),
        }
    }
}

/// A free TCP port on `host` (taken by the executor right after; another process could take it
/// first, in which case the executor fails with an error naming the port).
fn free_port(host: &str) -> Result<u16> {
    std::net::TcpListener::bind((host, 0))
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .map_err(|e| DataFusionError::Execution(format!("executor: no free port on {host}: {e}")))
}

/// Ballista's process settings for `settings`, with ratesheet's config, functions and runtime
/// (what [`run`] starts; public so that an embedding program can adjust it first).
pub fn process_config(settings: &ExecutorSettings) -> Result<ExecutorProcessConfig> {
    let state = cluster_state(cluster_config())?;
    let data_port = match settings.data_port {
        Some(p) => p,
        None => free_port(&settings.bind_host)?,
    };
    let control_port = match settings.control_port {
        Some(p) => p,
        None => free_port(&settings.bind_host)?,
    };
    if let Some(dir) = &settings.work_dir {
        std::fs::create_dir_all(dir)
            .map_err(|e| DataFusionError::Execution(format!("executor: --work-dir {}: {e}", dir.display())))?;
    }
    let work_dir = settings.work_dir.clone();
    let mut config = ExecutorProcessConfig {
        bind_host: settings.bind_host.clone(),
        external_host: Some(settings.bind_host.clone()),
        port: data_port,
        grpc_port: control_port,
        scheduler_host: settings.scheduler_host.clone(),
        scheduler_port: settings.scheduler_port,
        scheduler_connect_timeout_seconds: 10,
        work_dir: work_dir.as_ref().map(|d| d.to_string_lossy().to_string()),
        executor_heartbeat_interval_seconds: settings.heartbeat.as_secs().max(1),
        memory_pool_size: settings.memory_limit.map(|m| m as u64),
        override_function_registry: Some(Arc::new(BallistaFunctionRegistry::from(&state))),
        override_config_producer: Some(Arc::new(cluster_config)),
        override_runtime_producer: Some(Arc::new(move |_| cluster_runtime(work_dir.as_deref()))),
        ..Default::default()
    };
    if let Some(slots) = settings.slots {
        config.vcores = slots.max(1);
    }
    Ok(config)
}

/// Runs an executor until Ctrl-C or SIGTERM (Ballista's process handles both and tells the
/// scheduler it is leaving).
pub async fn run(settings: ExecutorSettings) -> Result<()> {
    let config = process_config(&settings)?;
    eprintln!(
        "executor joining the scheduler at {}:{} (ratesheet {}), data port {}, {} task slots",
        settings.scheduler_host,
        settings.scheduler_port,
        crate::sql::functions::ratesheet_version::VERSION,
        config.port,
        config.vcores
    );
    start_executor_process(Arc::new(config)).await.map_err(ballista_error)?;
    eprintln!("executor stopped");
    Ok(())
}
