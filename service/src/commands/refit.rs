//! `tidemark refit [--series NAME] [--cold] [--force]`: refit series whose data changed,
//! publish those that pass the gate, and write their forecasts.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::Context;
use crate::lease::Lease;
use crate::pipeline::run::refit_run;
use crate::pipeline::{RefitOptions, SeriesOutcome, SeriesReport};
use crate::progress::FitProgress;
use crate::signals::cancel_on_shutdown;
use crate::vocabulary::{RunStatus, RunTrigger};

/// One line per series, for people.
pub fn describe(r: &SeriesReport) -> String {
    match r.outcome {
        SeriesOutcome::Unchanged => format!("{}: unchanged ({})", r.series, r.message),
        SeriesOutcome::Failed => format!("{}: FAILED: {}", r.series, r.message),
        SeriesOutcome::Published | SeriesOutcome::Rejected => {
            let sds = r
                .sd_q50
                .iter()
                .map(|(n, v)| format!("{n} {v:.3}"))
                .collect::<Vec<_>>()
                .join(", ");
            let diag = r.diagnostics.as_ref().map_or(String::new(), |d| {
                format!(
                    "max R-hat {:.4}, min ESS {:.0}, warm-up {}",
                    d.max_rhat,
                    d.min_ess_bulk.min(d.min_ess_tail),
                    d.warmup
                )
            });
            let start = r.warm_start_from.map_or("cold start".to_string(), |f| {
                format!("warm start from fit {f}")
            });
            let head = match (r.outcome == SeriesOutcome::Published, r.version) {
                (true, Some(v)) => format!("published version {v}"),
                _ => "REJECTED".to_string(),
            };
            let fit = r.fit_id.map_or(String::new(), |f| format!("fit {f}, "));
            let mut line = format!(
                "{}: {head} ({fit}{start}, {:.1} s); sd median (model scale): {sds}; {diag}",
                r.series, r.wall_seconds
            );
            if !r.message.is_empty() {
                line.push_str(&format!("; note: {}", r.message));
            }
            line
        }
    }
}

pub async fn run(
    ctx: &Context,
    series: Option<String>,
    cold: bool,
    force: bool,
) -> anyhow::Result<()> {
    // An unknown series is a usage mistake, not a run.
    super::select_series(ctx, series.as_deref())?;
    let store = ctx.open_store().await?;
    let cancel = Arc::new(AtomicBool::new(false));
    let watcher = cancel_on_shutdown(cancel.clone())?;
    let lease = Lease::acquire(
        &store,
        ctx.config.lease_stale_after,
        cancel.clone(),
        "refit",
    )
    .await?;
    let opts = RefitOptions {
        series,
        cold,
        force,
        cancel,
        progress: FitProgress::on_terminal(),
        ..RefitOptions::default()
    };
    let outcome = refit_run(
        &store,
        &ctx.config,
        &lease.run_origin(RunTrigger::Manual),
        opts,
    )
    .await;
    watcher.abort();
    lease.release().await?;
    let run = outcome?;
    if run.status == RunStatus::Failed {
        anyhow::bail!("{}", run.message);
    }
    let reports = run.series;
    for r in &reports {
        crate::say!("{}", describe(r));
    }
    store.close().await;
    let bad: Vec<&str> = reports
        .iter()
        .filter(|r| matches!(r.outcome, SeriesOutcome::Failed | SeriesOutcome::Rejected))
        .map(|r| r.series.as_str())
        .collect();
    if !bad.is_empty() {
        anyhow::bail!("series not published: {}", bad.join(", "));
    }
    Ok(())
}
