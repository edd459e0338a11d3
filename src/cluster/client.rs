//! A session whose statements run on a cluster: `ratesheet --cluster HOST:PORT`.
//!
//! [`connect`] checks that the scheduler answers, turns a local session state into a Ballista
//! client session (every statement is planned here and sent to the scheduler), and shakes hands:
//! one small job that an executor answers with its ratesheet version. [`CancelOnDrop`] cancels a
//! statement's job on the scheduler when the statement is abandoned (Ctrl-C), instead of leaving
//! it to run.

use std::sync::{Arc, Mutex};
use std::time::Duration;

use ballista::prelude::SessionContextExt;
use ballista_core::execution_plans::DistributedQueryExec;
use ballista_core::serde::protobuf::CancelJobParams;
use ballista_core::serde::protobuf::scheduler_grpc_client::SchedulerGrpcClient;
use datafusion::error::{DataFusionError, Result};
use datafusion::execution::SessionState;
use datafusion::physical_plan::{ExecutionPlan, collect};
use datafusion::prelude::SessionContext;
use datafusion_proto::protobuf::LogicalPlanNode;

use crate::sql::functions::ratesheet_version::VERSION;

/// How long to wait for the scheduler to accept a connection.
const REACH_TIMEOUT: Duration = Duration::from_secs(3);
/// How long the handshake may wait for an executor before giving up.
pub const EXECUTOR_WAIT: Duration = Duration::from_secs(30);
/// After this long without an executor's answer, say that the client is waiting.
const WAIT_NOTICE: Duration = Duration::from_secs(3);

/// Marks a session as a cluster client (kept in the session config's extensions).
#[derive(Debug, Clone)]
pub struct ClusterClient {
    /// As given on the command line.
    pub address: String,
    /// `http://host:port`, for cancelling jobs.
    pub scheduler_url: String,
}

/// The cluster a session runs on, if any.
pub fn cluster_of(ctx: &SessionContext) -> Option<Arc<ClusterClient>> {
    // Read through the lock: `ctx.state()` would clone the whole state on every statement.
    ctx.state_ref().read().config().get_extension::<ClusterClient>()
}

/// A client session for the scheduler at `address` (`HOST:PORT`) built from `state` (a local
/// session state with ratesheet's functions, whose settings and registered tables it keeps).
pub async fn connect(state: SessionState, address: &str) -> Result<SessionContext> {
    let (host, port) = super::host_and_port(address, "--cluster").map_err(DataFusionError::Configuration)?;
    reach(&host, port, address).await?;
    let scheduler_url = format!("http://{host}:{port}");
    let marker = ClusterClient {
        address: address.to_string(),
        scheduler_url: scheduler_url.clone(),
    };
    let mut state = state;
    state.config_mut().set_extension(Arc::new(marker));
    let ctx = SessionContext::remote_with_state(&format!("df://{host}:{port}"), state).await?;
    // Ballista's upgrade replaces the function lists with its own; put ours back.
    crate::register_functions(&ctx)?;
    // Ballista 55's adaptive planner can leave a job running forever when an executor is lost
    // mid-job (the stage it re-runs is no longer found: "Can't find active stage to update stage
    // outputs"); the static planner re-runs the lost work. Users may SET it back.
    ctx.state_ref()
        .write()
        .config_mut()
        .options_mut()
        .set(ballista_core::config::BALLISTA_ADAPTIVE_PLANNER_ENABLED, "false")?;
    handshake(&ctx, address).await?;
    Ok(ctx)
}

/// The scheduler must accept a TCP connection within [`REACH_TIMEOUT`].
async fn reach(host: &str, port: u16, address: &str) -> Result<()> {
    let unreachable = |why: String| {
        DataFusionError::Execution(format!(
            "cannot reach the scheduler at {address}: {why} (start one with: ratesheet cluster scheduler --bind {host}:{port})"
        ))
    };
    match tokio::time::timeout(REACH_TIMEOUT, tokio::net::TcpStream::connect((host, port))).await {
        Ok(Ok(_)) => Ok(()),
        Ok(Err(e)) => Err(unreachable(e.to_string())),
        Err(_) => Err(unreachable(format!("no answer within {} s", REACH_TIMEOUT.as_secs()))),
    }
}

/// One job answered by an executor: its ratesheet version must be ours.
async fn handshake(ctx: &SessionContext, address: &str) -> Result<()> {
    let not_ours = |e: DataFusionError| {
        let text = e.to_string();
        if text.contains("ratesheet_version") {
            DataFusionError::Execution(format!(
                "the cluster at {address} does not know ratesheet's functions: start its scheduler and executors with 'ratesheet cluster scheduler' and 'ratesheet cluster executor'"
            ))
        } else {
            let why = explain(ctx, e).to_string();
            DataFusionError::Execution(format!(
                "the cluster at {address} did not run a first test job: {}",
                short(&why)
            ))
        }
    };
    let plan = ctx
        .sql("SELECT ratesheet_version() AS version")
        .await?
        .create_physical_plan()
        .await
        .map_err(not_ours)?;
    let guard = CancelOnDrop::new(ctx, &plan);
    let run = collect(plan.clone(), ctx.task_ctx());
    tokio::pin!(run);
    let answer = tokio::select! {
        r = &mut run => Some(r),
        _ = tokio::time::sleep(WAIT_NOTICE) => None,
    };
    let answer = match answer {
        Some(r) => r,
        None => {
            eprintln!("waiting for an executor of the cluster at {address} to answer…");
            match tokio::time::timeout(EXECUTOR_WAIT - WAIT_NOTICE, &mut run).await {
                Ok(r) => r,
                Err(_) => {
                    return Err(DataFusionError::Execution(format!(
                        "the cluster at {address} ran no job within {} s: does it have executors? (start one with: ratesheet cluster executor --scheduler {address})",
                        EXECUTOR_WAIT.as_secs()
                    )));
                }
            }
        }
    };
    let batches = answer.map_err(not_ours)?;
    guard.disarm();
    let theirs = batches
        .first()
        .and_then(|b| {
            b.column(0)
                .as_any()
                .downcast_ref::<datafusion::arrow::array::StringArray>()
                .map(|a| a.value(0).to_string())
        })
        .ok_or_else(|| {
            DataFusionError::Execution(format!("the cluster at {address} gave an empty answer to the test job"))
        })?;
    if theirs != VERSION {
        return Err(DataFusionError::Execution(format!(
            "version mismatch: this is ratesheet {VERSION}, the executors of the cluster at {address} run ratesheet {theirs}; run the same build everywhere"
        )));
    }
    Ok(())
}

/// An error of a cluster session that shows a file missing where an executor looked gets the
/// reason most likely behind it; other errors, and errors of local sessions, pass unchanged.
pub fn explain(ctx: &SessionContext, e: DataFusionError) -> DataFusionError {
    if cluster_of(ctx).is_none() {
        return e;
    }
    let text = e.to_string();
    if text.contains("Error serializing custom table") {
        return DataFusionError::Plan(
            "this statement reads a table that lives only in this process (a table function such as \
             generate_series or range, a table made with CREATE TABLE or INSERT, or a spreadsheet): it \
             cannot travel to the cluster; write it to a Parquet file the executors can read, then open that"
                .to_string(),
        );
    }
    if let Some(at) = text
        .split("Error connecting to Ballista scheduler or executor at ")
        .nth(1)
    {
        let address = at.split(": ").next().unwrap_or(at).trim();
        return DataFusionError::Execution(format!(
            "lost contact with {address} while the statement ran (a cluster process stopped or is unreachable); \
             run the statement again"
        ));
    }
    let missing = ["No such file", "not found", "NotFound", "does not exist"]
        .iter()
        .any(|m| text.contains(m));
    let local = text.contains("file://") || text.contains(" /") || text.contains("path: \"/");
    if missing && local && !text.contains("s3://") {
        DataFusionError::Execution(format!(
            "{} (on a cluster the executors read local paths themselves: a local file must be readable at the \
             same place on every executor's machine; or give an s3:// path)",
            short(&text)
        ))
    } else {
        e
    }
}

fn short(text: &str) -> String {
    let line = text.lines().next().unwrap_or("");
    line.chars().take(300).collect()
}

/// Cancels the cluster jobs of a running plan if it is dropped before [`CancelOnDrop::disarm`].
pub struct CancelOnDrop {
    scheduler_url: Option<String>,
    plan: Arc<dyn ExecutionPlan>,
}

/// Cancellations sent on drop, awaited by [`finish_cancels`] before a process exits.
static PENDING: Mutex<Vec<tokio::task::JoinHandle<()>>> = Mutex::new(Vec::new());

impl CancelOnDrop {
    /// A guard for `plan` when `ctx` is a cluster session (else one that does nothing).
    pub fn new(ctx: &SessionContext, plan: &Arc<dyn ExecutionPlan>) -> Self {
        CancelOnDrop {
            scheduler_url: cluster_of(ctx).map(|c| c.scheduler_url.clone()),
            plan: plan.clone(),
        }
    }

    /// The plan finished: nothing to cancel.
    pub fn disarm(mut self) {
        self.scheduler_url = None;
    }
}

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        let Some(url) = self.scheduler_url.take() else { return };
        let jobs = job_ids(&self.plan);
        let Ok(runtime) = tokio::runtime::Handle::try_current() else {
            return;
        };
        if jobs.is_empty() {
            return;
        }
        let task = runtime.spawn(async move {
            for job in jobs {
                if let Err(e) = cancel_job(&url, &job).await {
                    eprintln!("note: could not cancel job {job} on the scheduler: {e}");
                }
            }
        });
        if let Ok(mut pending) = PENDING.lock() {
            pending.push(task);
        }
    }
}

/// The scheduler's ids of the jobs a plan has started.
pub fn job_ids(plan: &Arc<dyn ExecutionPlan>) -> Vec<String> {
    let mut out = Vec::new();
    if let Some(job) = plan
        .downcast_ref::<DistributedQueryExec<LogicalPlanNode>>()
        .and_then(|d| d.job_id())
    {
        out.push(job.to_string());
    }
    for child in plan.children() {
        out.extend(job_ids(child));
    }
    out
}

/// Asks the scheduler to cancel `job`.
pub async fn cancel_job(scheduler_url: &str, job: &str) -> Result<()> {
    let failed = |e: String| DataFusionError::Execution(format!("cancelling job {job}: {e}"));
    let mut client = SchedulerGrpcClient::connect(scheduler_url.to_string())
        .await
        .map_err(|e| failed(e.to_string()))?;
    client
        .cancel_job(CancelJobParams {
            job_id: job.to_string(),
        })
        .await
        .map_err(|e| failed(e.to_string()))?;
    Ok(())
}

/// Waits (at most `limit`) for the cancellations sent so far to reach the scheduler.
pub async fn finish_cancels(limit: Duration) {
    let tasks: Vec<_> = PENDING.lock().map(|mut p| std::mem::take(&mut *p)).unwrap_or_default();
    let all = async {
        for task in tasks {
            let _ = task.await;
        }
    };
    let _ = tokio::time::timeout(limit, all).await;
}
