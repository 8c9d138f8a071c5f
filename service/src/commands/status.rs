//! `vigil status [--json]`: what the store holds now and what happens next.

use serde::Serialize;

use super::Context;
use crate::ingest;
use crate::store::{BatchSummary, FitSummary, RunSummary};

/// How many recent runs and batches are shown.
const RECENT: u32 = 10;

/// The `status --json` document (fields documented in README.md).
#[derive(Debug, Serialize)]
pub struct StatusReport {
    pub config: String,
    pub database: String,
    pub schema_version: i64,
    pub schedule: ScheduleStatus,
    pub inbox_waiting: Option<usize>,
    pub series: Vec<SeriesStatus>,
    pub series_without_fit: Vec<String>,
    pub runs: Vec<RunSummary>,
    pub batches: Vec<BatchSummary>,
}

#[derive(Debug, Serialize)]
pub struct ScheduleStatus {
    pub cron: String,
    pub timezone: String,
    pub next_run: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct SeriesStatus {
    pub name: String,
    pub data_watermark: i64,
    /// The newest fit attempt, whatever its status.
    pub latest_fit: Option<FitSummary>,
    /// The version being served.
    pub latest_published: Option<FitSummary>,
    /// True when values arrived after the latest attempt (or there is none).
    pub data_changed: bool,
}

pub async fn run(ctx: &Context, json: bool) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let config = &ctx.config;
    let mut series = Vec::new();
    for s in &config.series {
        let data_watermark = store.series_watermark(&s.columns()).await?;
        let latest_fit = store.latest_fit_attempt(&s.name).await?;
        let latest_published = store.latest_published_fit(&s.name).await?;
        let data_changed = latest_fit
            .as_ref()
            .is_none_or(|f| data_watermark > f.watermark);
        series.push(SeriesStatus {
            name: s.name.clone(),
            data_watermark,
            latest_fit,
            latest_published,
            data_changed,
        });
    }
    let report = StatusReport {
        config: config.path.display().to_string(),
        database: config.database.display().to_string(),
        schema_version: store.schema_version().await?,
        schedule: ScheduleStatus {
            cron: config.schedule.cron.clone(),
            timezone: config.schedule.timezone.name().to_string(),
            next_run: config
                .schedule
                .next_after(chrono::Utc::now())
                .map(|t| t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)),
        },
        inbox_waiting: ingest::inbox_files(&config.feed.inbox)
            .ok()
            .map(|f| f.len()),
        series_without_fit: series
            .iter()
            .filter(|s| s.latest_fit.is_none())
            .map(|s| s.name.clone())
            .collect(),
        series,
        runs: store.recent_runs(RECENT).await?,
        batches: store.recent_batches(RECENT).await?,
    };
    store.close().await;
    if json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", render_text(&report));
    }
    Ok(())
}

fn fit_line(f: &FitSummary) -> String {
    let num =
        |x: Option<f64>, digits: usize| x.map_or("-".to_string(), |v| format!("{v:.digits$}"));
    format!(
        "version {} {} {} (fit {}, data through {}, {} obs): max R-hat {}, min ESS bulk {} / tail {}",
        f.version,
        f.status,
        f.created_at,
        f.fit_id,
        f.data_through_year.map_or("-".into(), |y| y.to_string()),
        f.n_obs.map_or("-".into(), |n| n.to_string()),
        num(f.max_rhat, 3),
        num(f.min_ess_bulk, 0),
        num(f.min_ess_tail, 0),
    )
}

fn render_text(r: &StatusReport) -> String {
    use std::fmt::Write as _;
    let mut out = String::new();
    let _ = writeln!(
        out,
        "database   {} (schema version {})",
        r.database, r.schema_version
    );
    let _ = writeln!(
        out,
        "schedule   \"{}\" {}; next run {}",
        r.schedule.cron,
        r.schedule.timezone,
        r.schedule.next_run.as_deref().unwrap_or("never")
    );
    if let Some(n) = r.inbox_waiting {
        let _ = writeln!(out, "inbox      {n} file(s) waiting");
    }
    let _ = writeln!(out, "\nseries");
    for s in &r.series {
        match (&s.latest_published, &s.latest_fit) {
            (_, None) => {
                let _ = writeln!(out, "  {}: no fit yet", s.name);
            }
            (published, Some(latest)) => {
                let _ = writeln!(out, "  {}: latest attempt {}", s.name, fit_line(latest));
                match published {
                    Some(p) if p.fit_id != latest.fit_id => {
                        let _ = writeln!(out, "  {}: serving {}", s.name, fit_line(p));
                    }
                    Some(_) => {}
                    None => {
                        let _ = writeln!(out, "  {}: no published version yet", s.name);
                    }
                }
            }
        }
        if s.data_changed && s.latest_fit.is_some() {
            let _ = writeln!(out, "  {}: new data since the latest attempt", s.name);
        }
    }
    let _ = writeln!(out, "\nrecent runs");
    if r.runs.is_empty() {
        let _ = writeln!(out, "  none");
    }
    for run in &r.runs {
        let _ = writeln!(
            out,
            "  run {} ({}) {} -> {} {}{}",
            run.run_id,
            run.trigger,
            run.started_at,
            run.finished_at.as_deref().unwrap_or("…"),
            run.status,
            run.message
                .as_deref()
                .map(|m| format!(": {m}"))
                .unwrap_or_default()
        );
    }
    let _ = writeln!(out, "\nrecent batches");
    if r.batches.is_empty() {
        let _ = writeln!(out, "  none");
    }
    for b in &r.batches {
        let _ = writeln!(
            out,
            "  batch {} {} {} {}: {} rows, {} accepted, {} rejected{}",
            b.batch_id,
            b.received_at,
            b.source,
            b.status,
            b.rows_read,
            b.values_accepted,
            b.values_rejected,
            b.message
                .as_deref()
                .map(|m| format!(" ({m})"))
                .unwrap_or_default()
        );
    }
    out
}
