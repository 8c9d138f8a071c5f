//! `tidemark serve`: the same work as `run-once`, on the `[schedule]`, until SIGTERM/SIGINT.
//!
//! The loop only decides; the work runs in one task at a time. Each wake-up is one of:
//! a shutdown request (stop taking work, raise the cancel flag, wait for the run to reach
//! a safe point, release the lease), the end of the current run (log it), or a tick. A
//! tick that comes while a run is still going does no work and is recorded as a `skipped`
//! run with the reason. At start, when a tick fell between the newest finished run and
//! now (the service was down), one `catch-up` run is made first (`[schedule] catch_up`).
//!
//! The loop never sleeps longer than [`MAX_NAP`], so a wall-clock change (NTP, a suspended
//! machine) shifts a tick by at most that much, and a lost lease is noticed promptly.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use chrono::{DateTime, Utc};
use tokio::task::JoinHandle;
use tracing::{error, info, warn};

use crate::config::Config;
use crate::lease::Lease;
use crate::pipeline::run::{run_once, RunReport};
use crate::signals::ShutdownSignals;
use crate::store::RunOrigin;
use crate::store::Store;
use crate::vocabulary::{RunStatus, RunTrigger};

/// Longest sleep between looks at the clock.
pub const MAX_NAP: Duration = Duration::from_secs(1);
/// How long a shutdown waits for the current run to reach a safe point. systemd's
/// `TimeoutStopSec=15` and Kubernetes' default 30 s grace leave room above this.
pub const STOP_GRACE: Duration = Duration::from_secs(8);

/// The run in progress.
struct Running {
    trigger: RunTrigger,
    started: DateTime<Utc>,
    task: JoinHandle<anyhow::Result<RunReport>>,
}

fn start(
    store: &Store,
    config: &Arc<Config>,
    origin: RunOrigin,
    cancel: &Arc<AtomicBool>,
) -> Running {
    let (store, config, cancel) = (store.clone(), config.clone(), cancel.clone());
    Running {
        trigger: origin.trigger,
        started: Utc::now(),
        task: tokio::spawn(async move { run_once(&store, &config, &origin, cancel).await }),
    }
}

fn log_end(ended: Result<anyhow::Result<RunReport>, tokio::task::JoinError>) {
    match ended {
        Ok(Ok(r)) if r.status == RunStatus::Succeeded && !r.has_problems() => {
            info!(run_id = r.run_id, status = %r.status, "run finished")
        }
        Ok(Ok(r)) => warn!(
            run_id = r.run_id,
            status = %r.status,
            "run finished with problems; see `tidemark status`"
        ),
        Ok(Err(e)) => error!("run failed: {}", crate::reason::reason_of(&e)),
        Err(e) => error!("run task ended abnormally: {e}"),
    }
}

fn parse_time(text: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc3339(text)
        .ok()
        .map(|t| t.with_timezone(&Utc))
}

/// Serve until a shutdown request. Returns an error only when the service could not
/// start (lease held, signals) or lost its lease to another process.
pub async fn serve(store: Store, config: Config) -> anyhow::Result<()> {
    let mut signals = ShutdownSignals::install()?;
    let cancel = Arc::new(AtomicBool::new(false));
    let lease = Lease::acquire(&store, config.lease_stale_after, cancel.clone(), "serve").await?;
    let config = Arc::new(config);
    let schedule = config.schedule.clone();
    info!(
        cron = %schedule.cron,
        timezone = %schedule.timezone.name(),
        pid = lease.claim().pid,
        "serving"
    );

    let mut current: Option<Running> = None;
    if schedule.catch_up {
        let last = store
            .last_finished_run_start()
            .await?
            .as_deref()
            .and_then(parse_time);
        if let Some(missed) = schedule.missed_since(last, Utc::now()) {
            info!(
                missed = %schedule.local(missed),
                "a scheduled run was missed while tidemark was not serving; catching up"
            );
            current = Some(start(
                &store,
                &config,
                lease.run_origin(RunTrigger::CatchUp),
                &cancel,
            ));
        }
    }
    let mut next = schedule.next_after(Utc::now());
    match next {
        Some(t) => info!(next_run = %schedule.local(t), "next scheduled run"),
        None => {
            warn!(cron = %schedule.cron, "the schedule has no future tick; serve will only wait for a shutdown request")
        }
    }

    let stop = loop {
        let nap = next
            .and_then(|t| (t - Utc::now()).to_std().ok())
            .unwrap_or(Duration::ZERO)
            .min(MAX_NAP);
        tokio::select! {
            name = signals.recv() => break name,
            ended = async { (&mut current.as_mut().expect("guarded by the condition").task).await }, if current.is_some() => {
                current = None;
                log_end(ended);
            }
            _ = tokio::time::sleep(nap) => {
                if lease.lost() {
                    break "lost lease";
                }
                let now = Utc::now();
                let Some(tick) = next.filter(|&t| t <= now) else { continue };
                next = schedule.next_after(now.max(tick));
                match &current {
                    Some(r) => {
                        let why = format!(
                            "tick of {} skipped: the {} run started {} was still going",
                            schedule.local(tick),
                            r.trigger,
                            schedule.local(r.started)
                        );
                        info!("{why}");
                        if let Err(e) = store.record_skipped_run(&lease.run_origin(RunTrigger::Schedule), &why).await {
                            warn!("cannot record the skipped tick: {e}");
                        }
                    }
                    None => {
                        current = Some(start(&store, &config, lease.run_origin(RunTrigger::Schedule), &cancel))
                    }
                }
            }
        }
    };

    info!("{stop}: taking no new work");
    cancel.store(true, Ordering::Relaxed);
    if let Some(r) = current.take() {
        match tokio::time::timeout(STOP_GRACE, r.task).await {
            Ok(ended) => log_end(ended),
            Err(_) => {
                warn!(
                    "the {} run did not reach a safe point within {} s; marking it abandoned",
                    r.trigger,
                    STOP_GRACE.as_secs()
                );
                let why = format!(
                    "abandoned: tidemark serve stopped ({stop}) before the run reached a safe point"
                );
                store
                    .abandon_running_runs(&lease.claim().holder, &why)
                    .await?;
            }
        }
    }
    let lost = lease.lost();
    lease.release().await?;
    if lost {
        anyhow::bail!(
            "another tidemark took over the lease of {} (this process's heartbeat was late); stopped",
            store.path().display()
        );
    }
    info!("stopped");
    Ok(())
}
