//! `ratesheet cluster scheduler`: a Ballista scheduler whose sessions know ratesheet.

use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use ballista_scheduler::cluster::BallistaCluster;
use ballista_scheduler::config::{SchedulerConfig, TaskDistributionPolicy};
use ballista_scheduler::scheduler_process::{create_scheduler, start_grpc_service_with_listener};
use datafusion::error::{DataFusionError, Result};
use datafusion_proto::protobuf::{LogicalPlanNode, PhysicalPlanNode};
use tokio::net::TcpListener;

use super::{cluster_config, cluster_state};

/// How a scheduler runs.
#[derive(Debug, Clone)]
pub struct SchedulerSettings {
    /// Address to listen on (loopback unless told otherwise: the cluster has no authentication).
    pub bind: SocketAddr,
    /// An executor that has not been heard from for this long is taken as lost: its tasks are
    /// run again elsewhere.
    pub lost_after: Duration,
}

impl Default for SchedulerSettings {
    fn default() -> Self {
        SchedulerSettings {
            bind: SocketAddr::from(([127, 0, 0, 1], super::DEFAULT_SCHEDULER_PORT)),
            lost_after: Duration::from_secs(10),
        }
    }
}

/// Binds the scheduler's address; the listener is handed to [`serve`]. Port 0 picks a free one.
pub async fn bind(address: SocketAddr) -> Result<TcpListener> {
    TcpListener::bind(address)
        .await
        .map_err(|e| DataFusionError::Execution(format!("scheduler: cannot listen on {address}: {e}")))
}

/// Runs a scheduler on `listener` until the returned future is dropped or fails.
pub async fn serve(listener: TcpListener, settings: &SchedulerSettings) -> Result<()> {
    let address = listener
        .local_addr()
        .map_err(|e| DataFusionError::Execution(format!("scheduler: {e}")))?;
    let lost_after = settings.lost_after.as_secs().max(2);
    let mut config = SchedulerConfig::default()
        .with_hostname(address.ip().to_string())
        .with_port(address.port())
        .with_override_config_producer(Arc::new(cluster_config))
        .with_override_session_builder(Arc::new(cluster_state))
        // Tasks spread over the executors one at a time, rather than filling one executor first.
        .with_task_distribution(TaskDistributionPolicy::RoundRobin)
        .with_no_executors_grace_period_seconds(lost_after);
    config.bind_host = address.ip().to_string();
    config.executor_timeout_seconds = lost_after;
    config.expire_dead_executor_interval_seconds = 1;
    let cluster = BallistaCluster::new_from_config(&config)
        .await
        .map_err(ballista_error)?;
    let scheduler = create_scheduler::<LogicalPlanNode, PhysicalPlanNode>(cluster, Arc::new(config))
        .await
        .map_err(ballista_error)?;
    start_grpc_service_with_listener(listener, scheduler)
        .await
        .map_err(ballista_error)
}

/// The `ratesheet cluster scheduler` process: serve until Ctrl-C or SIGTERM.
pub async fn run(settings: SchedulerSettings) -> Result<()> {
    let listener = bind(settings.bind).await?;
    let address = listener
        .local_addr()
        .map_err(|e| DataFusionError::Execution(format!("scheduler: {e}")))?;
    eprintln!(
        "scheduler listening on {address} (ratesheet {}); start executors with: ratesheet cluster executor --scheduler {address}",
        crate::sql::functions::ratesheet_version::VERSION
    );
    tokio::select! {
        r = serve(listener, &settings) => r,
        _ = super::stop_signal() => {
            eprintln!("scheduler stopped");
            Ok(())
        }
    }
}

pub(crate) fn ballista_error(e: ballista_core::error::BallistaError) -> DataFusionError {
    DataFusionError::Execution(e.to_string())
}
