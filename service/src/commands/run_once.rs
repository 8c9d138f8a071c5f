//! `tidemark run-once`: one scheduled run (ingest, refit, forecast) under the lease. Exits
//! non-zero when a file could not be ingested, a series failed or was rejected, or the run
//! was cut short, so that cron, systemd or a cluster scheduler can alert.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::Context;
use crate::commands::refit::describe;
use crate::lease::Lease;
use crate::pipeline::run::run_once_with_progress;
use crate::progress::FitProgress;
use crate::signals::cancel_on_shutdown;
use crate::vocabulary::{RunStatus, RunTrigger};

pub async fn run(ctx: &Context) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let cancel = Arc::new(AtomicBool::new(false));
    let watcher = cancel_on_shutdown(cancel.clone())?;
    let lease = Lease::acquire(
        &store,
        ctx.config.lease_stale_after,
        cancel.clone(),
        "run-once",
    )
    .await?;
    let origin = lease.run_origin(RunTrigger::Manual);
    let outcome = run_once_with_progress(
        &store,
        &ctx.config,
        &origin,
        cancel,
        FitProgress::on_terminal(),
    )
    .await;
    watcher.abort();
    lease.release().await?;
    let report = outcome?;
    for f in report.files.iter().chain(&report.deferred) {
        crate::say!("{f}");
    }
    if let Some(line) = &report.skipped {
        crate::say!("{line}");
    }
    for e in &report.file_errors {
        crate::say_err!("tidemark: {e}");
    }
    for s in &report.series {
        crate::say!("{}", describe(s));
    }
    crate::say!("run {}: {}", report.run_id, report.status);
    store.close().await;
    if report.has_problems() || report.status != RunStatus::Succeeded {
        anyhow::bail!(
            "run {} finished {}: see the lines above and `tidemark status`",
            report.run_id,
            report.status
        );
    }
    Ok(())
}
