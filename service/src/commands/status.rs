//! `tidemark status [--json]`: what the store holds now and what happens next.

use serde::Serialize;

use super::Context;
use crate::ingest;
use crate::lease::{own_claim, stale_reason};
use crate::store::{BatchSummary, FitSummary, LeaseHolder, RunSummary};
use crate::visible::{visible, visible_lines};
use crate::vocabulary::{FitStatus, RunStatus};

/// How many recent runs and batches are shown.
const RECENT: u32 = 10;

/// The `status --json` document (fields documented in README.md).
#[derive(Debug, Serialize)]
pub struct StatusReport {
    /// What needs a person: rejected or failed latest fit attempts, a last run that did
    /// not succeed, a stale lease. Empty when all is well.
    pub attention: Vec<Attention>,
    pub config: String,
    pub database: String,
    pub schema_version: i64,
    pub schedule: ScheduleStatus,
    pub inbox_waiting: Option<usize>,
    /// Files in claim folders: being ingested now, or left by a process that stopped
    /// (the next ingest or run takes them over).
    pub inbox_claimed: usize,
    /// Inbox entries that are not regular files (never read): name and kind.
    pub inbox_skipped: Vec<ingest::Skipped>,
    pub series: Vec<SeriesStatus>,
    pub series_without_fit: Vec<String>,
    pub runs: Vec<RunSummary>,
    pub batches: Vec<BatchSummary>,
    /// The process holding the single-instance lease, or null.
    pub lease: Option<LeaseStatus>,
}

/// One thing that needs a person.
#[derive(Debug, Serialize)]
pub struct Attention {
    /// `fit` (the latest attempt of a series was rejected or failed), `run` (the last run
    /// did not succeed) or `lease` (the holder looks stale).
    pub kind: &'static str,
    pub series: Option<String>,
    pub fit_id: Option<i64>,
    pub run_id: Option<i64>,
    /// The fit's or run's status (`rejected`, `failed`, `partial`, `abandoned`), or `stale`.
    pub status: String,
    pub at: String,
    pub message: String,
}

#[derive(Debug, Serialize)]
pub struct LeaseStatus {
    #[serde(flatten)]
    pub holder: LeaseHolder,
    /// Why the holder counts as stale (the next start takes the lease over), or null.
    pub stale: Option<String>,
}

#[derive(Debug, Serialize)]
pub struct ScheduleStatus {
    pub cron: String,
    pub timezone: String,
    /// UTC.
    pub next_run: Option<String>,
    /// The same instant in the schedule's time zone, with its offset.
    pub next_run_local: Option<String>,
    pub catch_up: bool,
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
    /// How the config's model definition differs from the one the served version was
    /// made under (null when it is the same, or nothing is served).
    pub definition_changed: Option<String>,
}

pub async fn run(ctx: &Context, json: bool) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let config = &ctx.config;
    let mut series = Vec::new();
    for s in &config.series {
        let data_watermark = store.series_watermark(&s.columns()).await?;
        let latest_fit = store.newest_attempt_summary(&s.name).await?;
        let latest_published = store.serving_fit_summary(&s.name).await?;
        let data_changed = latest_fit
            .as_ref()
            .is_none_or(|f| data_watermark > f.watermark);
        let definition_changed = latest_published.as_ref().and_then(|p| {
            crate::pipeline::refit::definition_change(
                s,
                p.definition_sha256.as_deref(),
                p.definition_text.as_deref(),
            )
        });
        series.push(SeriesStatus {
            name: s.name.clone(),
            data_watermark,
            latest_fit,
            latest_published,
            data_changed,
            definition_changed,
        });
    }
    let runs = store.recent_runs(RECENT).await?;
    let lease = store.lease_holder().await?.map(|holder| {
        let stale = stale_reason(
            &holder,
            &own_claim("status"),
            chrono::Utc::now(),
            config.lease_stale_after,
        );
        LeaseStatus { holder, stale }
    });
    let next_run = config.schedule.next_after(chrono::Utc::now());
    let listing = ingest::list_inbox(&config.feed.inbox).ok();
    let report = StatusReport {
        attention: attention(&series, &runs, lease.as_ref()),
        config: config.path.display().to_string(),
        database: config.database.display().to_string(),
        schema_version: store.schema_version().await?,
        schedule: ScheduleStatus {
            cron: config.schedule.cron.clone(),
            timezone: config.schedule.timezone.name().to_string(),
            next_run: next_run.map(|t| t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)),
            next_run_local: next_run.map(|t| config.schedule.local(t)),
            catch_up: config.schedule.catch_up,
        },
        inbox_waiting: listing.as_ref().map(|l| l.files.len()),
        inbox_claimed: ingest::claimed_files(&config.feed.inbox),
        inbox_skipped: listing.map(|l| l.skipped).unwrap_or_default(),
        series_without_fit: series
            .iter()
            .filter(|s| s.latest_fit.is_none())
            .map(|s| s.name.clone())
            .collect(),
        series,
        runs,
        batches: store.recent_batches(RECENT).await?,
        lease,
    };
    store.close().await;
    if json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        // Fields from files and the database are escaped one by one in `render_text`;
        // this pass keeps any other control character off the terminal.
        print!("{}", visible_lines(&render_text(&report)));
    }
    Ok(())
}

fn attention(
    series: &[SeriesStatus],
    runs: &[RunSummary],
    lease: Option<&LeaseStatus>,
) -> Vec<Attention> {
    let mut out = Vec::new();
    for s in series {
        let Some(f) = &s.latest_fit else { continue };
        if f.status == FitStatus::Published {
            continue;
        }
        let serving = s
            .latest_published
            .as_ref()
            .map_or("no version is published yet".to_string(), |p| {
                format!("version {} (fit {}) keeps serving", p.version, p.fit_id)
            });
        out.push(Attention {
            kind: "fit",
            series: Some(s.name.clone()),
            fit_id: Some(f.fit_id),
            run_id: None,
            status: f.status.to_string(),
            at: f.created_at.clone(),
            message: format!(
                "{}; {serving}",
                f.message.as_deref().unwrap_or("no message recorded")
            ),
        });
    }
    // Skipped ticks did no work; the newest run that did decides.
    if let Some(r) = runs.iter().find(|r| r.status != RunStatus::Skipped) {
        if matches!(
            r.status,
            RunStatus::Failed | RunStatus::Partial | RunStatus::Abandoned
        ) {
            out.push(Attention {
                kind: "run",
                series: None,
                fit_id: None,
                run_id: Some(r.run_id),
                status: r.status.to_string(),
                at: r
                    .finished_at
                    .clone()
                    .unwrap_or_else(|| r.started_at.clone()),
                message: r.message.clone().unwrap_or_default(),
            });
        }
    }
    if let Some(LeaseStatus {
        holder,
        stale: Some(why),
    }) = lease
    {
        out.push(Attention {
            kind: "lease",
            series: None,
            fit_id: None,
            run_id: None,
            status: "stale".into(),
            at: holder.heartbeat_at.clone(),
            message: format!(
                "pid {} on {} holds the lease but {why}; the next serve, run-once or refit takes it over",
                holder.pid, holder.host
            ),
        });
    }
    out
}

fn fit_line(f: &FitSummary) -> String {
    let mut known = vec![format!("fit {}", f.fit_id)];
    if let Some(y) = f.data_through_year {
        known.push(format!("data through {y}"));
    }
    if let Some(n) = f.n_obs {
        known.push(format!("{n} obs"));
    }
    if let Some(u) = &f.unit {
        known.push(format!("unit {}", visible(u)));
    }
    let mut diag = Vec::new();
    if let Some(r) = f.max_rhat {
        diag.push(format!("max R-hat {r:.3}"));
    }
    if let (Some(b), Some(t)) = (f.min_ess_bulk, f.min_ess_tail) {
        diag.push(format!("min ESS bulk {b:.0} / tail {t:.0}"));
    }
    let diag = if diag.is_empty() {
        String::new()
    } else {
        format!(": {}", diag.join(", "))
    };
    // An attempt that published nothing is not a version: say what it tried to become.
    let head = if f.status == FitStatus::Published {
        format!("version {} published {}", f.version, f.created_at)
    } else {
        format!(
            "attempt {} {} (would have been version {})",
            f.status.as_str().to_uppercase(),
            f.created_at,
            f.version
        )
    };
    format!("{head} ({}){diag}", known.join(", "))
}

fn render_text(r: &StatusReport) -> String {
    use std::fmt::Write as _;
    let mut out = String::new();
    if !r.attention.is_empty() {
        let _ = writeln!(out, "ATTENTION");
        for a in &r.attention {
            let what = match (a.kind, &a.series, a.fit_id, a.run_id) {
                ("fit", Some(s), Some(f), _) => {
                    format!(
                        "{s}: latest fit attempt {} (fit {f})",
                        a.status.to_uppercase()
                    )
                }
                ("run", _, _, Some(id)) => format!("run {id}: {}", a.status.to_uppercase()),
                _ => format!("lease: {}", a.status.to_uppercase()),
            };
            let _ = writeln!(out, "  {what} at {}: {}", a.at, visible(&a.message));
        }
        let _ = writeln!(out);
    }
    let _ = writeln!(
        out,
        "database   {} (schema version {})",
        r.database, r.schema_version
    );
    let _ = writeln!(
        out,
        "schedule   \"{}\" {}: next tick {}{} (the config's schedule; `serve` runs on it, a timer or CronJob has its own)",
        r.schedule.cron,
        r.schedule.timezone,
        r.schedule.next_run_local.as_deref().unwrap_or("never"),
        if r.schedule.catch_up {
            ""
        } else {
            ", no catch-up after downtime"
        }
    );
    match &r.lease {
        Some(l) => {
            let _ = writeln!(
                out,
                "lease      held by {} pid {} on {} (holder {}, since {}, last heartbeat {}){}",
                l.holder
                    .command
                    .as_deref()
                    .map_or("a process,".to_string(), |c| format!("`{c}`,")),
                l.holder.pid,
                l.holder.host,
                l.holder.holder,
                l.holder.acquired_at,
                l.holder.heartbeat_at,
                l.stale
                    .as_deref()
                    .map(|w| format!("; STALE: {w}"))
                    .unwrap_or_default()
            );
        }
        None => {
            let _ = writeln!(
                out,
                "lease      free: no serve, run-once, refit or forecast is running now (under a timer or CronJob that is normal between runs)"
            );
        }
    }
    if let Some(n) = r.inbox_waiting {
        let claimed = if r.inbox_claimed > 0 {
            format!(
                ", {} being ingested (or left by a process that stopped: the next ingest or run takes them over)",
                r.inbox_claimed
            )
        } else {
            String::new()
        };
        let _ = writeln!(out, "inbox      {n} file(s) waiting{claimed}");
        if !r.inbox_skipped.is_empty() {
            let _ = writeln!(out, "           {}", ingest::SkippedLine(&r.inbox_skipped));
        }
    }
    let _ = writeln!(out, "\nseries");
    for s in &r.series {
        match (&s.latest_published, &s.latest_fit) {
            (_, None) => {
                let _ = writeln!(out, "  {}: no fit yet", s.name);
            }
            (published, Some(latest)) => {
                let _ = writeln!(out, "  {}: latest {}", s.name, fit_line(latest));
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
        if let (Some(why), Some(p)) = (&s.definition_changed, &s.latest_published) {
            let _ = writeln!(
                out,
                "  {}: the served version {} was made under another model definition: {why} since",
                s.name, p.version
            );
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
            match &run.command {
                Some(c) if c != run.trigger.as_str() => format!("{} {c}", run.trigger),
                _ => run.trigger.to_string(),
            },
            run.started_at,
            run.finished_at.as_deref().unwrap_or("…"),
            run.status,
            run.message
                .as_deref()
                .map(|m| format!(": {}", visible(m)))
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
            visible(&b.source),
            b.status,
            b.rows_read,
            b.values_accepted,
            b.values_rejected,
            b.message
                .as_deref()
                .map(|m| format!(" ({})", visible(m)))
                .unwrap_or_default()
        );
    }
    out
}
