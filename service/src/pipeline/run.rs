//! One scheduled run: ingest the inbox, refit what changed, record the run and each
//! series' outcome. Used by `run-once`, `serve` and `demo`.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use tracing::{info, info_span, warn, Instrument};

use super::{refit, RefitOptions, SeriesOutcome, SeriesReport};
use crate::config::Config;
use crate::ingest;
use crate::progress::FitProgress;
use crate::store::Store;

/// What a run did.
#[derive(Debug, Clone, serde::Serialize)]
pub struct RunReport {
    pub run_id: i64,
    /// `succeeded`, `partial`, `failed` or `abandoned` (cut short by the cancel flag).
    pub status: String,
    pub files: Vec<String>,
    pub file_errors: Vec<String>,
    pub series: Vec<SeriesReport>,
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
    trigger: &str,
    cancel: Arc<AtomicBool>,
) -> anyhow::Result<RunReport> {
    run_once_with_progress(store, config, trigger, cancel, None).await
}

/// [`run_once`], drawing the fits' progress on a terminal.
pub async fn run_once_with_progress(
    store: &Store,
    config: &Config,
    trigger: &str,
    cancel: Arc<AtomicBool>,
    progress: Option<FitProgress>,
) -> anyhow::Result<RunReport> {
    let run_id = store.start_run(trigger).await?;
    let span = info_span!("run", run_id, trigger);
    async move {
        let mut report = RunReport {
            run_id,
            status: "succeeded".into(),
            files: Vec::new(),
            file_errors: Vec::new(),
            series: Vec::new(),
        };
        let inbox = &config.feed.inbox;
        let files = if inbox.is_dir() {
            ingest::inbox_files(inbox)?
        } else {
            report
                .file_errors
                .push(format!("inbox {} does not exist; run `tidemark init` or fix feed.inbox", inbox.display()));
            Vec::new()
        };
        for file in &files {
            if cancel.load(std::sync::atomic::Ordering::Relaxed) {
                break;
            }
            match ingest::ingest_file(store, config, file).await {
                Ok(r) => {
                    info!("{r}");
                    report.files.push(r.to_string());
                }
                Err(e) => {
                    warn!("{e}");
                    report.file_errors.push(e.to_string());
                }
            }
        }
        let opts = RefitOptions {
            run_id: Some(run_id),
            cancel: cancel.clone(),
            progress,
            ..RefitOptions::default()
        };
        let outcome = refit(store, config, &opts).await;
        let message = match outcome {
            Ok(series) => {
                for s in &series {
                    store
                        .record_run_series(run_id, &s.series, s.outcome.as_str(), s.fit_id, Some(&s.message))
                        .await?;
                }
                report.series = series;
                if report.has_problems() {
                    report.status = "partial".into();
                }
                let counts = |o: SeriesOutcome| report.series.iter().filter(|s| s.outcome == o).count();
                format!(
                    "{} file(s) ingested, {} file error(s); series: {} published, {} rejected, {} failed, {} unchanged",
                    report.files.len(),
                    report.file_errors.len(),
                    counts(SeriesOutcome::Published),
                    counts(SeriesOutcome::Rejected),
                    counts(SeriesOutcome::Failed),
                    counts(SeriesOutcome::Unchanged)
                )
            }
            Err(e) => {
                report.status = "failed".into();
                format!("{e:#}")
            }
        };
        // A shutdown request (or a lost lease) stopped the run before every series was
        // done: what was recorded is whole, the rest waits for the next run.
        let cut_short = report.series.len() < config.series.len() || report.status == "failed";
        let message = if cancel.load(std::sync::atomic::Ordering::Relaxed) && cut_short {
            report.status = "abandoned".into();
            format!("abandoned: stopped at a safe point by a shutdown request; {message}")
        } else {
            message
        };
        store.finish_run(run_id, &report.status, Some(&message)).await?;
        info!(status = %report.status, "{message}");
        Ok(report)
    }
    .instrument(span)
    .await
}
