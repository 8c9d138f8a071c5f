//! One scheduled run: ingest the inbox, refit what changed, record the run and each
//! series' outcome. Used by `run-once`, `serve` and `demo`.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use tracing::{info, info_span, warn, Instrument};

use super::{refit, RefitOptions, SeriesOutcome, SeriesReport};
use crate::config::Config;
use crate::ingest;
use crate::progress::FitProgress;
use crate::store::{RunOrigin, Store, StoreError};
use crate::vocabulary::RunStatus;

/// What a run did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct RunReport {
    pub run_id: i64,
    /// `succeeded`, `partial`, `failed` or `abandoned` (cut short by the cancel flag).
    pub status: RunStatus,
    pub files: Vec<String>,
    /// Files left in the inbox for the next run (they changed while they were read).
    pub deferred: Vec<String>,
    /// The inbox entries that are not regular files, in one line, if any.
    pub skipped: Option<String>,
    pub file_errors: Vec<String>,
    pub series: Vec<SeriesReport>,
    /// The run's one-line summary, as recorded in `runs.message`.
    pub message: String,
}

impl RunReport {
    /// True when a file could not be ingested or a series failed or was rejected.
    pub fn has_problems(&self) -> bool {
        !self.file_errors.is_empty()
            || self
                .series
                .iter()
                .any(|s| matches!(s.outcome, SeriesOutcome::Failed | SeriesOutcome::Rejected))
    }
}

/// Ingest every file in the inbox, then refit. The run row is written first and closed at
/// the end; a run cut short stays `running` until the next start marks it `abandoned`.
pub async fn run_once(
    store: &Store,
    config: &Config,
    origin: &RunOrigin,
    cancel: Arc<AtomicBool>,
) -> anyhow::Result<RunReport> {
    run_once_with_progress(store, config, origin, cancel, None).await
}

/// [`run_once`], drawing the fits' progress on a terminal.
pub async fn run_once_with_progress(
    store: &Store,
    config: &Config,
    origin: &RunOrigin,
    cancel: Arc<AtomicBool>,
    progress: Option<FitProgress>,
) -> anyhow::Result<RunReport> {
    let run_id = store.start_run(origin).await?;
    let span = info_span!("run", run_id, trigger = origin.trigger.as_str());
    async move {
        let mut report = RunReport::new(run_id);
        ingest_inbox(store, config, &cancel, &mut report).await?;
        let opts = RefitOptions {
            run_id: Some(run_id),
            cancel: cancel.clone(),
            progress,
            fence: origin.fence.clone(),
            ..RefitOptions::default()
        };
        refit_and_record(store, config, &opts, &mut report).await?;
        prune_draws(store, config, opts.fence.as_ref(), &mut report).await?;
        finish(store, config, &cancel, &mut report).await?;
        Ok(report)
    }
    .instrument(span)
    .await
}

/// A manual `refit`: the same refit and records as in a run, without the ingest.
pub async fn refit_run(
    store: &Store,
    config: &Config,
    origin: &RunOrigin,
    opts: RefitOptions,
) -> anyhow::Result<RunReport> {
    let run_id = store.start_run(origin).await?;
    let span = info_span!("run", run_id, trigger = origin.trigger.as_str());
    async move {
        let mut report = RunReport::new(run_id);
        let opts = RefitOptions {
            run_id: Some(run_id),
            fence: origin.fence.clone(),
            ..opts
        };
        refit_and_record(store, config, &opts, &mut report).await?;
        prune_draws(store, config, opts.fence.as_ref(), &mut report).await?;
        let selected = config.select_series(opts.series.as_deref())?.len();
        finish_with(store, &opts.cancel, selected, &mut report).await?;
        Ok(report)
    }
    .instrument(span)
    .await
}

/// Prune the draws of published versions beyond `store.keep_draws` per series, under the
/// run's fence; what was pruned joins the run's message.
async fn prune_draws(
    store: &Store,
    config: &Config,
    fence: Option<&crate::store::Fence>,
    report: &mut RunReport,
) -> anyhow::Result<()> {
    let pruned = store.prune_draws(config.keep_draws, false, fence).await?;
    if !pruned.is_empty() {
        let bytes: i64 = pruned.iter().map(|p| p.bytes).sum();
        info!(
            versions = pruned.len(),
            bytes, "pruned the draws of older versions"
        );
        report.message.push_str(&format!(
            "; draws of {} older version(s) pruned ({:.1} MB, store.keep_draws = {})",
            pruned.len(),
            bytes as f64 / 1e6,
            config.keep_draws
        ));
    }
    Ok(())
}

impl RunReport {
    fn new(run_id: i64) -> RunReport {
        RunReport {
            run_id,
            status: RunStatus::Succeeded,
            files: Vec::new(),
            deferred: Vec::new(),
            skipped: None,
            file_errors: Vec::new(),
            series: Vec::new(),
            message: String::new(),
        }
    }
}

/// Ingest every file waiting in the inbox, in name order, until `cancel` is raised.
async fn ingest_inbox(
    store: &Store,
    config: &Config,
    cancel: &AtomicBool,
    report: &mut RunReport,
) -> anyhow::Result<()> {
    let inbox = &config.feed.inbox;
    if !inbox.is_dir() {
        report.file_errors.push(format!(
            "inbox {} does not exist; run `tidemark init` or fix feed.inbox",
            crate::visible::visible_path(inbox)
        ));
        return Ok(());
    }
    let pass = ingest::ingest_inbox(store, config, cancel, |outcome| match outcome {
        Ok(r) => {
            info!("{r}");
            report.files.push(r.to_string());
        }
        Err(e) if e.is_deferral() => {
            warn!("{e}");
            report.deferred.push(e.to_string());
        }
        Err(e) => {
            warn!("{e}");
            report.file_errors.push(e.to_string());
        }
    })
    .await;
    match pass {
        Ok(pass) if !pass.skipped.is_empty() => {
            let line = ingest::SkippedLine(&pass.skipped).to_string();
            warn!("{line}");
            report.skipped = Some(line);
        }
        Ok(_) => {}
        Err(e) => {
            warn!("{e}");
            report.file_errors.push(e.to_string());
        }
    }
    Ok(())
}

/// Refit, and record each series' outcome with the run. A refit that fails as a whole
/// marks the run `failed` with the reason.
async fn refit_and_record(
    store: &Store,
    config: &Config,
    opts: &RefitOptions,
    report: &mut RunReport,
) -> anyhow::Result<()> {
    match refit(store, config, opts).await {
        Ok(series) => {
            if let Some(run_id) = opts.run_id {
                for s in &series {
                    store
                        .record_run_series(
                            run_id,
                            &s.series,
                            s.outcome.as_str(),
                            s.fit_id,
                            Some(&s.message),
                        )
                        .await?;
                }
            }
            report.series = series;
            if report.has_problems() {
                report.status = RunStatus::Partial;
            }
            let counts = |o: SeriesOutcome| report.series.iter().filter(|s| s.outcome == o).count();
            report.message = format!(
                "series: {} published, {} rejected, {} failed, {} unchanged",
                counts(SeriesOutcome::Published),
                counts(SeriesOutcome::Rejected),
                counts(SeriesOutcome::Failed),
                counts(SeriesOutcome::Unchanged)
            );
        }
        // A process that lost its lease stops here: the takeover already closed its run.
        Err(e) if matches!(e.downcast_ref(), Some(StoreError::LeaseLost { .. })) => return Err(e),
        Err(e) => {
            report.status = RunStatus::Failed;
            report.message = crate::reason::reason_of(&e);
        }
    }
    Ok(())
}

/// Close the run record of a whole run (files, then every configured series).
async fn finish(
    store: &Store,
    config: &Config,
    cancel: &AtomicBool,
    report: &mut RunReport,
) -> anyhow::Result<()> {
    if report.status != RunStatus::Failed {
        let mut files = format!(
            "{} file(s) ingested, {} file error(s)",
            report.files.len(),
            report.file_errors.len()
        );
        if !report.deferred.is_empty() {
            files.push_str(&format!(
                ", {} left for the next run",
                report.deferred.len()
            ));
        }
        if let Some(line) = &report.skipped {
            files.push_str(&format!(", {line}"));
        }
        report.message = format!("{files}; {}", report.message);
    }
    if !report.file_errors.is_empty() && report.status == RunStatus::Succeeded {
        report.status = RunStatus::Partial;
    }
    finish_with(store, cancel, config.series.len(), report).await
}

/// Close the run record. A shutdown request (or a lost lease) that stopped the run
/// before its `expected` series were done makes it `abandoned`: what was recorded is
/// whole, the rest waits for the next run.
async fn finish_with(
    store: &Store,
    cancel: &AtomicBool,
    expected: usize,
    report: &mut RunReport,
) -> anyhow::Result<()> {
    let cut_short = report.series.len() < expected || report.status == RunStatus::Failed;
    if cancel.load(std::sync::atomic::Ordering::Relaxed) && cut_short {
        report.status = RunStatus::Abandoned;
        report.message = format!(
            "abandoned: stopped at a safe point by a shutdown request; {}",
            report.message
        );
    }
    report.status = store
        .finish_run(report.run_id, report.status, Some(&report.message))
        .await?;
    info!(status = %report.status, "{}", report.message);
    Ok(())
}
