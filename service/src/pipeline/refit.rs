//! Refit one series or all: change detection, warm start, the gate with its fallbacks,
//! and publishing.
//!
//! Attempts, in order, until one passes the gate (max R-hat and min bulk/tail ESS from the
//! config): warm start from the latest published version (skipped with `--cold` or when
//! there is none; refused by the model before sampling when the new data conflict with
//! that version's posterior, the reason kept in the message), then a cold start, then one extended cold start with twice the draws
//! and warm-up. If none passes, the last attempt is recorded as `rejected` with its
//! diagnostics and the previous version keeps serving.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::time::Instant;

use tidemark_model::{
    sample, Controls, FitDiagnostics, ForecastTarget, Posterior, SamplerSettings, SummaryKind,
    WarmStart,
};
use tracing::{info, info_span, warn, Instrument};

use super::{draws, input};
use crate::config::{Config, LocationPrior, SdPrior, SeriesConfig};
use crate::progress::{ChainBars, FitProgress};
use crate::store::{Fence, ForecastSet, NewExclusion, NewFit, PublishGuard, Store, StoreError};
use crate::vocabulary::FitStatus;

/// Joint effect draws per chain kept with a version for forecasts (the forecast basis).
pub const BASIS_DRAWS_PER_CHAIN: usize = 25;

/// What the caller asks of a refit.
#[derive(Debug, Clone, Default)]
pub struct RefitOptions {
    /// Only this series.
    pub series: Option<String>,
    /// Do not warm-start.
    pub cold: bool,
    /// Refit even when the data did not change.
    pub force: bool,
    /// The run this refit belongs to.
    pub run_id: Option<i64>,
    /// Raised to stop at the next safe point.
    pub cancel: Arc<AtomicBool>,
    /// Progress bars for the chains (a terminal only; never under `serve`).
    pub progress: Option<FitProgress>,
    /// The lease fence fits are written under (`None`: the caller takes no lease).
    pub fence: Option<Fence>,
}

/// The outcome of one series.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SeriesOutcome {
    Published,
    Rejected,
    Failed,
    Unchanged,
}

impl SeriesOutcome {
    pub fn as_str(&self) -> &'static str {
        match self {
            SeriesOutcome::Published => "published",
            SeriesOutcome::Rejected => "rejected",
            SeriesOutcome::Failed => "failed",
            SeriesOutcome::Unchanged => "unchanged",
        }
    }
}

/// What happened to one series.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SeriesReport {
    pub series: String,
    pub outcome: SeriesOutcome,
    pub fit_id: Option<i64>,
    pub version: Option<i64>,
    pub message: String,
    pub sd_q50: Vec<(String, f64)>,
    pub diagnostics: Option<FitDiagnostics>,
    pub wall_seconds: f64,
    pub warm_start_from: Option<i64>,
    pub n_obs: Option<i64>,
    /// How many of the fitted observations are censored (`fits.n_censored`).
    pub n_censored: Option<i64>,
    /// Seconds spent reading the series from the store and building the model input.
    pub load_seconds: f64,
    /// Seconds spent sampling (all attempts).
    pub fit_seconds: f64,
    /// Seconds spent after the fit: forecasts, draws file, the publishing transaction.
    pub publish_seconds: f64,
    /// Mean 80% interval width per forecast target (response scale).
    pub width80: Vec<(String, f64)>,
}

/// Refit every series named by `opts` (all when `opts.series` is `None`).
pub async fn refit(
    store: &Store,
    config: &Config,
    opts: &RefitOptions,
) -> anyhow::Result<Vec<SeriesReport>> {
    let selected = config.select_series(opts.series.as_deref())?;
    let mut reports = Vec::new();
    for series in selected {
        let span = info_span!("refit", series = %series.name);
        let report = refit_series(store, series, opts).instrument(span).await?;
        reports.push(report);
        if opts.cancel.load(std::sync::atomic::Ordering::Relaxed) {
            break;
        }
    }
    Ok(reports)
}

pub(crate) fn model_priors(series: &SeriesConfig) -> tidemark_model::Priors {
    let sd = |p: Option<SdPrior>| {
        p.map(|p| match p {
            SdPrior::HalfNormal(scale) => tidemark_model::SdPrior::HalfNormal { scale },
            SdPrior::HalfStudentT { df, scale } => {
                tidemark_model::SdPrior::HalfStudentT { df, scale }
            }
            SdPrior::Exponential(rate) => tidemark_model::SdPrior::Exponential { rate },
        })
    };
    let loc = |p: Option<LocationPrior>| {
        p.map(|LocationPrior::Normal { mean, sd }| tidemark_model::NormalPrior { mean, sd })
    };
    let pr = &series.priors;
    tidemark_model::Priors {
        residual_sd: sd(pr.residual_sd),
        site_sd: sd(pr.site_sd),
        year_sd: sd(pr.year_sd),
        group_sd: sd(pr.group_sd),
        intercept: loc(pr.intercept),
        coefficients: loc(pr.coefficients),
    }
}

fn settings(series: &SeriesConfig) -> SamplerSettings {
    let s = &series.sampler;
    SamplerSettings {
        chains: s.chains as usize,
        draws: s.draws as usize,
        warmup: s.warmup as usize,
        warm_warmup: s.warm_warmup as usize,
        seed: s.seed,
        ..SamplerSettings::default()
    }
}

fn passes(d: &FitDiagnostics, series: &SeriesConfig) -> bool {
    d.max_rhat <= series.sampler.max_rhat
        && d.min_ess_bulk >= series.sampler.min_ess
        && d.min_ess_tail >= series.sampler.min_ess
}

fn gate_message(d: &FitDiagnostics, series: &SeriesConfig) -> String {
    format!(
        "max R-hat {:.4} (gate {}), min bulk-ESS {:.0}, min tail-ESS {:.0} (gate {})",
        d.max_rhat, series.sampler.max_rhat, d.min_ess_bulk, d.min_ess_tail, series.sampler.min_ess
    )
}

/// One try at a fit: its label, its settings, and the version it warm-starts from.
type Attempt = (&'static str, SamplerSettings, Option<(i64, WarmStart)>);

/// Run the sampler off the async threads.
async fn run_sampler(
    data: Arc<tidemark_model::Data>,
    priors: tidemark_model::Priors,
    settings: SamplerSettings,
    warm: Option<WarmStart>,
    cancel: Arc<AtomicBool>,
    bars: Option<ChainBars>,
) -> anyhow::Result<Posterior> {
    let joined = tokio::task::spawn_blocking(move || {
        let report = |p: tidemark_model::Progress| {
            if let Some(b) = &bars {
                b.update(p);
            }
        };
        let controls = Controls {
            cancel: Some(&cancel),
            progress: bars
                .as_ref()
                .map(|_| &report as &(dyn Fn(tidemark_model::Progress) + Sync)),
        };
        sample(&data, &priors, &settings, warm.as_ref(), controls)
    })
    .await?;
    Ok(joined?)
}

async fn refit_series(
    store: &Store,
    series: &SeriesConfig,
    opts: &RefitOptions,
) -> anyhow::Result<SeriesReport> {
    let started = Instant::now();
    let mut report = SeriesReport::unchanged(&series.name);
    let Some((watermark, why)) = detect_change(store, series, opts).await? else {
        report.message = "no new data since the last fit".into();
        return Ok(report);
    };
    let why = why.map(|w| format!("refitted because {w}"));
    let mut fit = new_fit(series, watermark, opts.run_id);
    let to = Destination {
        store,
        guard: PublishGuard {
            fence: opts.fence.as_ref(),
            allow_older: opts.force,
        },
    };
    let rows = store
        .load_series_rows(
            &series.response,
            &series.covariates,
            &series.groups,
            series.censoring.as_ref().map(|c| c.column.as_str()),
        )
        .await?;
    let with_why = |message: String| match &why {
        Some(w) => format!("{w}; {message}"),
        None => message,
    };
    let built = match input::build(series, &rows) {
        Ok(b) => b,
        Err(e) => {
            warn!(series = %series.name, "{e}");
            return record_failure(to, fit, report, with_why(e.to_string()), &[], started).await;
        }
    };
    let exclusions: Vec<NewExclusion> = built.excluded;
    let data = Arc::new(built.data);
    report.load_seconds = started.elapsed().as_secs_f64();
    fit.n_obs = Some(data.n_obs() as i64);
    fit.n_censored = Some(data.n_censored() as i64);
    fit.n_sites = Some(data.n_sites() as i64);
    fit.n_years = Some(data.n_years() as i64);
    fit.data_through_year = data.year_labels().last().map(|&y| y as i64);

    let mut notes: Vec<String> = why.iter().cloned().collect();
    let warm = if opts.cold {
        None
    } else {
        match warm_start(store, series).await? {
            Ok(w) => w,
            Err(reason) => {
                notes.push(format!("warm start not used: {reason}"));
                None
            }
        }
    };
    let (plan, skipped) = match within_memory(series, &data, attempt_plan(series, warm)) {
        Ok(planned) => planned,
        Err(message) => {
            warn!(series = %series.name, "{message}");
            let message = with_why(message);
            return record_failure(to, fit, report, message, &exclusions, started).await;
        }
    };
    notes.extend(skipped);
    let skipped = notes;
    let sampling = Instant::now();
    let fitted = match attempt_fits(series, opts, data, plan, skipped).await? {
        Attempts::Fitted(f) => f,
        Attempts::Failed(message) => {
            let message = with_why(message);
            return record_failure(to, fit, report, message, &exclusions, started).await;
        }
    };
    report.fit_seconds = sampling.elapsed().as_secs_f64();
    publish(to, series, fit, report, *fitted, &exclusions, started).await
}

impl SeriesReport {
    fn unchanged(series: &str) -> SeriesReport {
        SeriesReport {
            series: series.to_string(),
            outcome: SeriesOutcome::Unchanged,
            fit_id: None,
            version: None,
            message: String::new(),
            sd_q50: Vec::new(),
            diagnostics: None,
            wall_seconds: 0.0,
            warm_start_from: None,
            n_obs: None,
            n_censored: None,
            load_seconds: 0.0,
            fit_seconds: 0.0,
            publish_seconds: 0.0,
            width80: Vec::new(),
        }
    }
}

/// The series' current watermark when it needs a refit (new values since the latest
/// attempt, no attempt yet, a changed model definition, or `--force`), with the reason
/// when it is the definition; `None` when nothing changed.
async fn detect_change(
    store: &Store,
    series: &SeriesConfig,
    opts: &RefitOptions,
) -> anyhow::Result<Option<(i64, Option<String>)>> {
    let watermark = store.series_watermark(&series.columns()).await?;
    // No value of the series' columns has arrived yet: nothing to fit, and nothing to
    // record as a failure at every start (a forced refit still says why it cannot fit).
    if watermark == 0 && !opts.force {
        return Ok(None);
    }
    if opts.force {
        return Ok(Some((watermark, None)));
    }
    let Some(last) = store.latest_attempt(&series.name).await? else {
        return Ok(Some((watermark, None)));
    };
    let changed = definition_change(
        series,
        last.definition_sha256.as_deref(),
        last.definition_text.as_deref(),
    );
    if last.watermark >= watermark && changed.is_none() {
        return Ok(None);
    }
    Ok(Some((watermark, changed)))
}

/// Whether the series uses a definition field that fits made before stored definitions
/// could not have had (censoring, a trend, a unit): such a series changed since them.
fn uses_later_fields(series: &SeriesConfig) -> bool {
    series.censoring.is_some() || series.trend || series.unit.is_some()
}

/// How the series' definition differs from the one a stored fit was made under, said
/// for the analyst; `None` when it is the same. A fit made before definitions were stored
/// (no text) counts as the same when its digest is the legacy digest of this definition
/// and the series names no censoring (which that digest could not cover), or when it has
/// no digest at all (nothing to compare: an upgrade must not refit every series).
pub fn definition_change(
    series: &SeriesConfig,
    sha256: Option<&str>,
    text: Option<&str>,
) -> Option<String> {
    let now = series.definition();
    if sha256 == Some(now.sha256().as_str()) {
        return None;
    }
    match (text, sha256) {
        (Some(text), _) => {
            let changes = serde_json::from_str::<crate::config::ModelDefinition>(text)
                .map(|earlier| now.changes_from(&earlier))
                .unwrap_or_default();
            Some(if changes.is_empty() {
                "the model definition changed".to_string()
            } else {
                format!("the model definition changed ({})", changes.join(", "))
            })
        }
        // Fits without a digest predate schema version 5: nothing to compare.
        (None, None) => None,
        (None, Some(old))
            if old == series.legacy_definition_sha256() && !uses_later_fields(series) =>
        {
            None
        }
        (None, Some(_)) => Some(
            "the model definition changed (the last fit was made before definitions were stored)"
                .to_string(),
        ),
    }
}

fn new_fit(series: &SeriesConfig, watermark: i64, run_id: Option<i64>) -> NewFit {
    NewFit {
        series: series.name.clone(),
        watermark,
        run_id,
        response: Some(series.response.clone()),
        transform: Some(series.transform.to_string()),
        seed: Some(series.sampler.seed as i64),
        chains: Some(series.sampler.chains as i64),
        draws: Some(series.sampler.draws as i64),
        definition_sha256: Some(series.definition_sha256()),
        definition_text: Some(series.definition().text()),
        unit: series.unit.clone(),
        ..NewFit::default()
    }
}

/// Where a series' attempt is recorded: the store, under the caller's lease fence.
#[derive(Clone, Copy)]
struct Destination<'a> {
    store: &'a Store,
    guard: PublishGuard<'a>,
}

/// Record a `failed` attempt with its reason; the previous version keeps serving.
async fn record_failure(
    to: Destination<'_>,
    mut fit: NewFit,
    mut report: SeriesReport,
    message: String,
    exclusions: &[NewExclusion],
    started: Instant,
) -> anyhow::Result<SeriesReport> {
    fit.status = FitStatus::Failed;
    fit.message = Some(message.clone());
    fit.wall_seconds = Some(started.elapsed().as_secs_f64());
    let recorded = to
        .store
        .record_fit(
            &fit,
            &[],
            None,
            ForecastSet::default(),
            exclusions,
            to.guard,
        )
        .await?;
    report.outcome = SeriesOutcome::Failed;
    report.fit_id = Some(recorded.fit_id);
    report.message = message;
    Ok(report)
}

/// The latest published version's fit id and warm start, when its draws decode.
/// The latest published version's warm start, when its model definition is compatible
/// with the series' (`ModelDefinition::warm_compatible`); the reason when it is not.
async fn warm_start(
    store: &Store,
    series: &SeriesConfig,
) -> anyhow::Result<Result<Option<(i64, WarmStart)>, String>> {
    let Some(published) = store.serving_fit(&series.name).await? else {
        return Ok(Ok(None));
    };
    let earlier = match &published.definition_text {
        Some(text) => serde_json::from_str::<crate::config::ModelDefinition>(text).ok(),
        // Made before definitions were stored: it had no censoring, trend or unit; the
        // rest is taken as today's (its digest is compared by `definition_change`).
        None => Some(crate::config::ModelDefinition {
            censoring: None,
            trend: None,
            unit: None,
            ..series.definition()
        }),
    };
    if let Some(earlier) = earlier {
        if let Err(reason) = series.definition().warm_compatible(&earlier) {
            return Ok(Err(reason));
        }
    }
    let Some((_, blob)) = store.fit_draws(published.fit_id).await? else {
        return Ok(Ok(None));
    };
    match draws::decode(&blob) {
        Ok(decoded) => Ok(Ok(Some((published.fit_id, decoded.warm_start)))),
        Err(e) => {
            warn!(
                fit_id = published.fit_id,
                "cannot read the draws of the last version, starting cold: {e}"
            );
            Ok(Ok(None))
        }
    }
}

/// The attempts against the gate, in order: warm (when there is a previous version),
/// cold, then cold with twice the draws and warm-up.
fn attempt_plan(series: &SeriesConfig, warm: Option<(i64, WarmStart)>) -> Vec<Attempt> {
    let base = settings(series);
    let mut attempts: Vec<Attempt> = Vec::new();
    if let Some(w) = warm {
        attempts.push(("warm start", base.clone(), Some(w)));
    }
    attempts.push(("cold start", base.clone(), None));
    attempts.push((
        "extended cold start",
        SamplerSettings {
            draws: base.draws * 2,
            warmup: base.warmup * 2,
            ..base.clone()
        },
        None,
    ));
    attempts
}

/// Keep the attempts whose estimated memory is within `sampler.max_memory_mib`; the
/// others are dropped before anything is allocated. Returns the kept attempts and a note
/// per dropped one; when none is kept, the error says the smallest estimate and how the
/// settings got there.
fn within_memory(
    series: &SeriesConfig,
    data: &tidemark_model::Data,
    attempts: Vec<Attempt>,
) -> Result<(Vec<Attempt>, Vec<String>), String> {
    const MIB: u64 = 1 << 20;
    let limit = series.sampler.max_memory_mib;
    let mut notes = Vec::new();
    let mut smallest: Option<(u64, &'static str, SamplerSettings)> = None;
    let mut kept = Vec::new();
    for attempt in attempts {
        let need = memory_estimate(series, data, &attempt.1);
        if need <= limit.saturating_mul(MIB) {
            kept.push(attempt);
            continue;
        }
        notes.push(format!(
            "{} not run: it would need an estimated {} MiB, above sampler.max_memory_mib = {limit}",
            attempt.0,
            need.div_ceil(MIB)
        ));
        // On a tie the later attempt is named: a cold start rather than the warm one.
        if smallest.as_ref().is_none_or(|(n, _, _)| need <= *n) {
            smallest = Some((need, attempt.0, attempt.1));
        }
    }
    match smallest {
        Some((need, label, s)) if kept.is_empty() => {
            // Name the forecasts when they are most of the need.
            let forecasts = forecast_bytes(series, data);
            let advice = if forecasts.saturating_mul(2) > need {
                format!(
                    "; the forecasts alone ({} MiB: horizon {}, {} scenario(s), {} threshold(s)) \
                     are most of it: lower horizon or the scenarios, or raise the limit",
                    forecasts.div_ceil(MIB),
                    series.horizon,
                    series.scenarios.len(),
                    series.thresholds.len()
                )
            } else {
                "; lower chains, draws or warmup, or raise the limit".to_string()
            };
            Err(format!(
                "no fit attempt run: even the {label} would need an estimated {} MiB ({} chains \
                 x {} draws, {} warm-up, {} observations, {} sites), above \
                 sampler.max_memory_mib = {limit}{advice}",
                need.div_ceil(MIB),
                s.chains,
                s.draws,
                s.warmup,
                data.n_obs(),
                data.n_sites(),
            ))
        }
        _ => Ok((kept, notes)),
    }
}

/// Copies of the draws file alive at once while a version is published, beside the
/// posterior. Three can be read off the code (the Arrow arrays, the IPC writer's encoded
/// batch and the file; later the file and the store driver's and SQLite's copies of the
/// bound blob); the peak measured with many coefficients needs five, so five it is.
const PUBLISH_COPIES: u64 = 5;
/// The process itself before any fit: code, runtime, the SQLite page cache, the data.
const PROCESS_BASE_BYTES: u64 = 24 << 20;

/// Bytes per forecast row while a version is published: the row (its numbers, target,
/// site and scenario text), its exceedance list, and the statement text and bound values
/// of its INSERT, with room for the copies a publish holds at once.
const FORECAST_ROW_BYTES: u64 = 1 << 10;

/// The forecast rows a version publishes, in bytes: `(1 + scenarios)` sets of
/// `sites x (horizon + 1) + years + horizon` rows, each with its exceedance per threshold.
fn forecast_bytes(series: &SeriesConfig, data: &tidemark_model::Data) -> u64 {
    let horizon = u64::from(series.horizon.max(1));
    let per_set = (data.n_sites() as u64)
        .saturating_mul(horizon + 1)
        .saturating_add(data.n_years() as u64 + horizon);
    let rows = per_set.saturating_mul(1 + series.scenarios.len() as u64);
    rows.saturating_mul(FORECAST_ROW_BYTES + 16 * series.thresholds.len() as u64)
}

/// Estimated peak memory in bytes of one attempt from sampling to publishing: the larger
/// of the sampler's peak (while it summarises) and the publishing peak (the posterior
/// plus the copies of its draws file), above what the process holds anyway.
/// `tests/e2e_config.rs::the_memory_estimate_covers_the_measured_peak_of_a_refit` checks
/// it against the peak resident size the kernel measures.
fn memory_estimate(
    series: &SeriesConfig,
    data: &tidemark_model::Data,
    settings: &SamplerSettings,
) -> u64 {
    let sampling = tidemark_model::memory_estimate(data, settings);
    let file = draws::size_estimate(data, settings, BASIS_DRAWS_PER_CHAIN);
    let publishing = file
        .saturating_mul(1 + PUBLISH_COPIES)
        .saturating_add(forecast_bytes(series, data));
    sampling
        .max(publishing)
        .saturating_add(data.n_obs() as u64 * 64)
        .saturating_add(PROCESS_BASE_BYTES)
}

/// The attempt that ended the sequence: the first to pass the gate, else the last.
struct Fitted {
    post: Posterior,
    used: SamplerSettings,
    /// The fit a warm start came from.
    from: Option<i64>,
    /// Why earlier attempts did not pass.
    notes: Vec<String>,
}

enum Attempts {
    Fitted(Box<Fitted>),
    /// The sampler failed (not the gate); the message says which attempt and why.
    Failed(String),
}

/// Run the attempts until one passes the gate. A cancelled sampler is an error (nothing
/// is recorded); any other sampler error ends the sequence as a failed attempt.
async fn attempt_fits(
    series: &SeriesConfig,
    opts: &RefitOptions,
    data: Arc<tidemark_model::Data>,
    attempts: Vec<Attempt>,
    mut notes: Vec<String>,
) -> anyhow::Result<Attempts> {
    let priors = model_priors(series);
    let mut last: Option<(Posterior, SamplerSettings, Option<i64>)> = None;
    for (label, settings, warm) in attempts {
        let (from, warm_state) = match warm {
            Some((id, w)) => (Some(id), Some(w)),
            None => (None, None),
        };
        let post = match run_sampler(
            data.clone(),
            priors.clone(),
            settings.clone(),
            warm_state,
            opts.cancel.clone(),
            opts.progress
                .as_ref()
                .map(|p| p.chains(&series.name, label, settings.chains)),
        )
        .await
        {
            Ok(p) => p,
            Err(e) => {
                // Refused before any chain ran: straight on to the cold start, the
                // reason kept in the version's message.
                if let Some(tidemark_model::ModelError::WarmStartRefused { reason, .. }) =
                    e.downcast_ref::<tidemark_model::ModelError>()
                {
                    warn!(series = %series.name, attempt = label, "{reason}; starting cold");
                    notes.push(format!("{label} refused: {reason}; started cold"));
                    continue;
                }
                if matches!(
                    e.downcast_ref::<tidemark_model::ModelError>(),
                    Some(tidemark_model::ModelError::Cancelled)
                ) {
                    return Err(e.context(format!(
                        "refit of series {} was cancelled; nothing was recorded",
                        series.name
                    )));
                }
                return Ok(Attempts::Failed(format!(
                    "{label}: {}",
                    crate::reason::reason_of(&e)
                )));
            }
        };
        let ok = passes(&post.diagnostics, series);
        info!(
            attempt = label,
            passed = ok,
            "{}",
            gate_message(&post.diagnostics, series)
        );
        if !ok {
            notes.push(format!(
                "{label} failed the gate: {}",
                gate_message(&post.diagnostics, series)
            ));
        }
        last = Some((post, settings, from));
        if ok {
            break;
        }
    }
    let Some((post, used, from)) = last else {
        anyhow::bail!("no fit attempt was made for series {}", series.name);
    };
    Ok(Attempts::Fitted(Box::new(Fitted {
        post,
        used,
        from,
        notes,
    })))
}

/// The network trend as `posterior_summary` rows of kind `trend`: per year and per decade
/// of the year column on the model scale, and under `log` as percent change per year,
/// `100 (exp(beta) - 1)`. None without a trend.
fn trend_summaries(
    post: &Posterior,
    transform: tidemark_model::Transform,
) -> Vec<tidemark_model::Summary> {
    if post.trend_origin.is_none() {
        return Vec::new();
    }
    let j = post.coef_names.len() - 1;
    let trend = SummaryKind::Trend;
    let mut out = vec![
        post.coef_summary_by(j, (trend, "per_year", None), |b| b),
        post.coef_summary_by(j, (trend, "per_decade", None), |b| 10.0 * b),
    ];
    if transform == tidemark_model::Transform::Log {
        out.push(
            post.coef_summary_by(j, (trend, "percent_per_year", None), |b| 100.0 * b.exp_m1()),
        );
    }
    out
}

/// Record the attempt that ended the sequence: a published version with its summaries,
/// draws and forecasts, or a rejected attempt with its diagnostics.
async fn publish(
    to: Destination<'_>,
    series: &SeriesConfig,
    mut fit: NewFit,
    mut report: SeriesReport,
    fitted: Fitted,
    exclusions: &[NewExclusion],
    started: Instant,
) -> anyhow::Result<SeriesReport> {
    let Fitted {
        post,
        used,
        from,
        notes,
    } = fitted;
    let publishing = Instant::now();
    let published = passes(&post.diagnostics, series);
    let d = post.diagnostics.clone();
    fit.status = if published {
        FitStatus::Published
    } else {
        FitStatus::Rejected
    };
    fit.warm_start_from = from;
    fit.draws = Some(used.draws as i64);
    fit.warmup = Some(d.warmup as i64);
    fit.max_rhat = Some(d.max_rhat);
    fit.min_ess_bulk = Some(d.min_ess_bulk);
    fit.min_ess_tail = Some(d.min_ess_tail);
    fit.acceptance_rate = Some(d.acceptance_rate);
    fit.priors_json = serde_json::to_string(&post.priors).ok();
    let mut message: Vec<String> = post.warnings.clone();
    message.extend(notes);
    if !exclusions.is_empty() {
        message.push(format!(
            "{} visit(s) excluded (see fit_exclusions)",
            exclusions.len()
        ));
    }
    if !published {
        message.push("rejected by the convergence gate; the previous version keeps serving".into());
    }
    fit.message = (!message.is_empty()).then(|| message.join("; "));
    fit.diagnostics_json = serde_json::to_string(&serde_json::json!({
        "diagnostics": &d,
        "warnings": post.warnings,
        "excluded": exclusions.len(),
        "max_rhat_effects": d.max_rhat_effects,
    }))
    .ok();

    let transform = series.transform;
    let (summaries, blob, forecasts) = if published {
        let post = Arc::new(post);
        let p2 = post.clone();
        let series_config = series.clone();
        let (blob, forecasts) = tokio::task::spawn_blocking(move || {
            let basis = p2.forecast_basis(BASIS_DRAWS_PER_CHAIN);
            let forecasts = super::forecasts::baseline(&basis, transform, &series_config);
            (draws::encode(&p2, &basis), forecasts)
        })
        .await?;
        let blob = blob?;
        let forecasts = forecasts?;
        let mut summaries = post.summaries.clone();
        summaries.extend(trend_summaries(&post, transform));
        (summaries, Some(blob), forecasts)
    } else {
        // A rejected fit keeps its diagnostics, not its effects or draws.
        let kept = post
            .summaries
            .iter()
            .filter(|s| s.kind != SummaryKind::Effect)
            .cloned()
            .collect();
        (kept, None, super::forecasts::BaselineForecasts::default())
    };
    fit.wall_seconds = Some(started.elapsed().as_secs_f64());
    crate::test_hold::at("publishing", &series.name).await;
    let recorded = to
        .store
        .record_fit(
            &fit,
            &summaries,
            blob.as_deref().map(|b| (draws::FORMAT, b)),
            forecasts.set(),
            exclusions,
            to.guard,
        )
        .await;
    let recorded = match recorded {
        Ok(r) => r,
        // A newer version already serves: this series failed, the run goes on.
        Err(e @ StoreError::StaleSnapshot { .. }) => {
            warn!(series = %series.name, "{e}");
            report.outcome = SeriesOutcome::Failed;
            report.message = e.to_string();
            return Ok(report);
        }
        Err(e) => return Err(e.into()),
    };
    report.publish_seconds = publishing.elapsed().as_secs_f64();
    report.outcome = if published {
        SeriesOutcome::Published
    } else {
        SeriesOutcome::Rejected
    };
    report.fit_id = Some(recorded.fit_id);
    report.version = published.then_some(recorded.version);
    report.message = fit.message.clone().unwrap_or_default();
    report.sd_q50 = summaries
        .iter()
        .filter(|s| s.kind == SummaryKind::Sd)
        .map(|s| (s.term.clone(), s.q50))
        .collect();
    report.diagnostics = Some(d);
    report.warm_start_from = from;
    report.n_obs = fit.n_obs;
    report.n_censored = fit.n_censored;
    report.wall_seconds = fit.wall_seconds.unwrap_or_default();
    for target in [
        ForecastTarget::KnownSiteKnownYear,
        ForecastTarget::KnownSiteNewYear,
        ForecastTarget::NewSiteKnownYear,
        ForecastTarget::NewSiteNewYear,
    ] {
        let widths: Vec<f64> = forecasts
            .rows
            .iter()
            .filter(|f| f.target == target)
            .map(|f| f.q90 - f.q10)
            .collect();
        if !widths.is_empty() {
            report.width80.push((
                target.as_str().to_string(),
                widths.iter().sum::<f64>() / widths.len() as f64,
            ));
        }
    }
    info!(
        fit_id = recorded.fit_id,
        version = recorded.version,
        outcome = report.outcome.as_str(),
        "fit recorded"
    );
    Ok(report)
}
