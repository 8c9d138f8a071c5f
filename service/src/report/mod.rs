//! `tidemark report`: one self-contained HTML page about the published versions — what it
//! contains (`Report`, read from the store), how it is drawn (`charts`, plotters SVG),
//! how the page is put together and escaped (`page`), and how it reaches the disk
//! (atomically: a temporary file in the target directory, then a rename).
//!
//! Invariant: the page loads nothing from outside (no URL, no script) and every piece of
//! user text in it (series names, site codes, messages) is escaped —
//! `tests/e2e_report.rs::the_report_is_one_self_contained_page_with_escaped_codes`.

mod charts;
mod page;

use std::io::Write as _;
use std::path::{Path, PathBuf};

use crate::drift::{self, SeriesDrift};
use crate::store::{FitSummary, RunHistoryEntry, SiteEffect, Store, StoreError};

pub use page::CAUTION;

/// At most this many site effects are drawn; beyond it the lowest and highest halves are.
pub const MAX_SITES_SHOWN: usize = 60;

/// Without `report_sites`, this many sites get a small chart: the most extreme by the
/// median of their site effect.
pub const EXTREME_SITES_SHOWN: usize = 12;

/// At most this many sites are listed in the exceedance table: those most likely to
/// exceed the lowest threshold.
pub const EXCEEDANCE_SITES_SHOWN: usize = 20;

/// How many recent runs the history table lists.
pub const RUNS_SHOWN: u32 = 50;

/// The four forecast targets, in the order the page shows them.
pub const TARGETS: [&str; 4] = [
    "known_site_known_year",
    "known_site_new_year",
    "new_site_known_year",
    "new_site_new_year",
];

#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("drawing the {chart} chart failed: {message}")]
    Chart {
        chart: &'static str,
        message: String,
    },
    #[error(
        "cannot write the report {path}: {source}; check that the folder exists and is writable"
    )]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
}

/// Summary of the 80% interval widths (`q90 - q10`, response scale) of one target.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetWidths {
    pub target: String,
    pub n: usize,
    pub min: f64,
    pub q25: f64,
    pub median: f64,
    pub q75: f64,
    pub max: f64,
}

/// What the page shows about one series.
#[derive(Debug, Clone)]
pub struct SeriesSection {
    pub name: String,
    /// `none` or `log`: the scale of forecast widths is the response's own.
    pub transform: String,
    pub response: String,
    /// The response's unit: the served version's, else the config's.
    pub unit: Option<String>,
    pub latest: Option<FitSummary>,
    /// The newest attempt when it is not the version served (rejected or failed).
    pub unserved_attempt: Option<FitSummary>,
    pub drift: Option<SeriesDrift>,
    pub widths: Vec<TargetWidths>,
    /// `(target, components)` of the latest version's rows whose width partly rests on a
    /// prior alone (`forecasts.prior_only`), one entry per distinct pair.
    pub prior_only: Vec<(String, String)>,
    /// Every site effect of the latest version, lowest median first.
    pub site_effects: Vec<SiteEffect>,
    /// The sites drawn one chart each, in the order drawn.
    pub panels: Vec<SitePanelData>,
    /// Whether the panels' sites were named in the config (else: the most extreme).
    pub panels_named: bool,
    /// Sites named in the config with neither observations nor a forecast.
    pub unknown_sites: Vec<String>,
    /// Next year's exceedance probabilities at monitored sites, when the latest version
    /// has thresholds.
    pub exceedance: Option<ExceedanceTable>,
}

/// The probabilities that next year's value at a monitored site exceeds each threshold
/// (target `known_site_new_year`), for the sites most likely to exceed the lowest one.
#[derive(Debug, Clone, PartialEq)]
pub struct ExceedanceTable {
    /// Ascending, response scale.
    pub thresholds: Vec<f64>,
    /// `(site, year, probability per threshold)`, most likely to exceed the lowest
    /// threshold first; at most [`EXCEEDANCE_SITES_SHOWN`].
    pub rows: Vec<(String, i64, Vec<Option<f64>>)>,
    /// How many monitored sites have such a row.
    pub sites: usize,
}

/// The exceedance table from one target's rows (any order): one row per site, the sites
/// most likely to exceed the lowest threshold first (ties by code); `None` without rows.
pub fn exceedance_table(rows: &[crate::store::SiteExceedance]) -> Option<ExceedanceTable> {
    let mut thresholds: Vec<f64> = rows.iter().map(|r| r.threshold).collect();
    thresholds.sort_by(f64::total_cmp);
    thresholds.dedup();
    let mut cells: std::collections::BTreeMap<(&str, i64), Vec<Option<f64>>> =
        std::collections::BTreeMap::new();
    for r in rows {
        let k = thresholds.iter().position(|&t| t == r.threshold)?;
        cells
            .entry((r.site.as_str(), r.year))
            .or_insert_with(|| vec![None; thresholds.len()])[k] = r.probability;
    }
    let mut by_site: Vec<(String, i64, Vec<Option<f64>>)> = cells
        .into_iter()
        .map(|((site, year), p)| (site.to_string(), year, p))
        .collect();
    if by_site.is_empty() {
        return None;
    }
    let first = |p: &[Option<f64>]| p.first().copied().flatten().unwrap_or(f64::NEG_INFINITY);
    by_site.sort_by(|a, b| {
        first(&b.2)
            .total_cmp(&first(&a.2))
            .then_with(|| a.0.cmp(&b.0))
    });
    let sites = by_site.len();
    by_site.truncate(EXCEEDANCE_SITES_SHOWN);
    Some(ExceedanceTable {
        thresholds,
        rows: by_site,
        sites,
    })
}

/// One site's observed values and next year's 80% forecast band.
#[derive(Debug, Clone, PartialEq)]
pub struct SitePanelData {
    pub site: String,
    /// `(year, value)` of every stored visit, response scale.
    pub observed: Vec<(i64, f64)>,
    /// `(year, q10, q50, q90)` from target `known_site_new_year`.
    pub band: Option<(i64, f64, f64, f64)>,
}

/// What the report is asked to show about one configured series.
#[derive(Debug, Clone)]
pub struct ReportSeries {
    pub name: String,
    pub response: String,
    pub transform: String,
    /// `series.unit` from the config (the served version's own unit comes first).
    pub unit: Option<String>,
    /// `report_sites` from the config; empty: pick the most extreme sites.
    pub sites: Vec<String>,
}

/// Everything the page shows.
#[derive(Debug, Clone)]
pub struct Report {
    pub generated_at: String,
    pub database: String,
    pub series: Vec<SeriesSection>,
    pub runs: Vec<RunHistoryEntry>,
}

/// Quantile of sorted finite values by linear interpolation between order statistics
/// (Hyndman & Fan 1996, definition 7).
fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let h = (sorted.len() - 1) as f64 * p;
    let below = h.floor() as usize;
    let above = h.ceil() as usize;
    sorted[below] + (h - below as f64) * (sorted[above] - sorted[below])
}

/// Width summaries per target from `(target, q10, q90)` rows; targets without a row
/// with both bounds are left out.
pub fn target_widths(rows: &[(String, Option<f64>, Option<f64>)]) -> Vec<TargetWidths> {
    TARGETS
        .iter()
        .filter_map(|target| {
            let mut widths: Vec<f64> = rows
                .iter()
                .filter(|(t, _, _)| t == target)
                .filter_map(|(_, lo, hi)| Some(hi.as_ref()? - lo.as_ref()?))
                .filter(|w| w.is_finite())
                .collect();
            if widths.is_empty() {
                return None;
            }
            widths.sort_by(f64::total_cmp);
            Some(TargetWidths {
                target: target.to_string(),
                n: widths.len(),
                min: widths[0],
                q25: quantile_sorted(&widths, 0.25),
                median: quantile_sorted(&widths, 0.5),
                q75: quantile_sorted(&widths, 0.75),
                max: widths[widths.len() - 1],
            })
        })
        .collect()
}

/// The site effects to draw: all of them up to [`MAX_SITES_SHOWN`], else the lowest and
/// highest halves, with the index after which sites were left out.
pub fn sites_to_show(effects: &[SiteEffect]) -> (Vec<SiteEffect>, Option<usize>) {
    if effects.len() <= MAX_SITES_SHOWN {
        return (effects.to_vec(), None);
    }
    let half = MAX_SITES_SHOWN / 2;
    let mut shown = effects[..half].to_vec();
    shown.extend_from_slice(&effects[effects.len() - half..]);
    (shown, Some(half - 1))
}

/// The sites that get a small chart: the named ones, else the [`EXTREME_SITES_SHOWN`]
/// with the largest absolute median effect (ties by code), lowest median first.
pub fn panel_sites(effects: &[SiteEffect], named: &[String]) -> Vec<String> {
    if !named.is_empty() {
        return named.to_vec();
    }
    let mut ranked: Vec<&SiteEffect> = effects.iter().filter(|e| e.q50.is_some()).collect();
    ranked.sort_by(|a, b| {
        let size = |e: &SiteEffect| e.q50.map_or(0.0, f64::abs);
        size(b)
            .total_cmp(&size(a))
            .then_with(|| a.site.cmp(&b.site))
    });
    ranked.truncate(EXTREME_SITES_SHOWN);
    ranked.sort_by(|a, b| {
        a.q50
            .unwrap_or(0.0)
            .total_cmp(&b.q50.unwrap_or(0.0))
            .then_with(|| a.site.cmp(&b.site))
    });
    ranked.into_iter().map(|e| e.site.clone()).collect()
}

/// Consecutive runs that tell the same thing (trigger, status, message and every
/// series' outcome, fit and message), as `(newest, oldest, count)` indices into `runs`
/// (newest first).
pub fn collapse_runs(runs: &[RunHistoryEntry]) -> Vec<(usize, usize, usize)> {
    let same = |a: &RunHistoryEntry, b: &RunHistoryEntry| {
        a.run.trigger == b.run.trigger
            && a.run.status == b.run.status
            && a.run.message == b.run.message
            && a.series == b.series
    };
    let mut out: Vec<(usize, usize, usize)> = Vec::new();
    for (i, r) in runs.iter().enumerate() {
        match out.last_mut() {
            Some((first, last, count)) if same(&runs[*first], r) => {
                *last = i;
                *count += 1;
            }
            _ => out.push((i, i, 1)),
        }
    }
    out
}

impl Report {
    /// Read what the page shows for `series`, in that order.
    pub async fn collect(store: &Store, series: &[ReportSeries]) -> Result<Report, ReportError> {
        let mut out = Vec::new();
        for ReportSeries {
            name,
            response,
            transform,
            unit,
            sites,
        } in series
        {
            let latest = store.serving_fit_summary(name).await?;
            let attempt = store.newest_attempt_summary(name).await?;
            let unserved_attempt = attempt.filter(|a| {
                a.status != crate::vocabulary::FitStatus::Published
                    && latest.as_ref().is_none_or(|l| a.version > l.version)
            });
            let rows = store.variance_components(Some(name)).await?;
            let drift = drift::build(&rows).series.into_iter().next();
            let (widths, prior_only, site_effects) = match &latest {
                Some(fit) => {
                    let intervals = store.forecast_intervals(fit.fit_id).await?;
                    let mut prior_only: Vec<(String, String)> = intervals
                        .iter()
                        .filter_map(|f| Some((f.target.clone(), f.prior_only.clone()?)))
                        .collect();
                    prior_only.sort();
                    prior_only.dedup();
                    let rows: Vec<_> = intervals
                        .into_iter()
                        .map(|f| (f.target, f.q10, f.q90))
                        .collect();
                    (
                        target_widths(&rows),
                        prior_only,
                        store.site_effects(fit.fit_id).await?,
                    )
                }
                None => (Vec::new(), Vec::new(), Vec::new()),
            };
            let exceedance = match &latest {
                Some(fit) => exceedance_table(
                    &store
                        .site_exceedance(fit.fit_id, "known_site_new_year")
                        .await?,
                ),
                None => None,
            };
            let mut panels = Vec::new();
            let mut unknown_sites = Vec::new();
            if let Some(fit) = &latest {
                let chosen = panel_sites(&site_effects, sites);
                let bands = store
                    .forecast_bands(fit.fit_id, "known_site_new_year")
                    .await?;
                let rows = store.load_series_rows(response, &[], &[], None).await?;
                for site in chosen {
                    let observed: Vec<(i64, f64)> = rows
                        .iter()
                        .filter(|r| r.site == site)
                        .filter_map(|r| Some((r.year, r.response.as_ref()?.number()?)))
                        .collect();
                    let band = bands
                        .iter()
                        .find(|b| b.site == site)
                        .and_then(|b| Some((b.year, b.q10?, b.q50?, b.q90?)));
                    if observed.is_empty() && band.is_none() {
                        unknown_sites.push(site);
                    } else {
                        panels.push(SitePanelData {
                            site,
                            observed,
                            band,
                        });
                    }
                }
            }
            out.push(SeriesSection {
                name: name.clone(),
                transform: transform.clone(),
                response: response.clone(),
                unit: latest
                    .as_ref()
                    .and_then(|l| l.unit.clone())
                    .or_else(|| unit.clone()),
                latest,
                unserved_attempt,
                drift,
                widths,
                prior_only,
                site_effects,
                panels,
                panels_named: !sites.is_empty(),
                unknown_sites,
                exceedance,
            });
        }
        Ok(Report {
            generated_at: crate::store::now_utc(),
            database: store.path().display().to_string(),
            series: out,
            runs: store.run_history(RUNS_SHOWN).await?,
        })
    }

    /// The whole page as HTML text.
    pub fn render(&self) -> Result<String, ReportError> {
        page::render(self)
    }
}

/// Write `contents` to `path` atomically: a reader sees the old file or the new one,
/// never a part (see [`write_bytes_atomically`]).
pub fn write_atomically(path: &Path, contents: &str) -> Result<(), ReportError> {
    write_bytes_atomically(path, contents.as_bytes()).map_err(|source| ReportError::Write {
        path: path.to_path_buf(),
        source,
    })
}

/// Write `contents` to `path` atomically. The temporary file lives in the same directory,
/// so the rename does not cross file systems; it is synced before the rename, so a crash
/// leaves the old file or the whole new one.
pub fn write_bytes_atomically(path: &Path, contents: &[u8]) -> std::io::Result<()> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let mut builder = tempfile::Builder::new();
    builder.prefix(".tidemark-").suffix(".tmp");
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        // A report or an export is meant to be read by others; the default of a
        // temporary file is owner-only.
        builder.permissions(std::fs::Permissions::from_mode(0o644));
    }
    let mut tmp = builder.tempfile_in(dir)?;
    tmp.write_all(contents)?;
    tmp.as_file().sync_all()?;
    tmp.persist(path).map_err(|e| e.error)?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn widths_summarise_each_target_with_interpolated_quartiles() {
        let rows: Vec<(String, Option<f64>, Option<f64>)> = [1.0, 2.0, 3.0, 4.0, 5.0]
            .iter()
            .map(|w| {
                (
                    "known_site_new_year".to_string(),
                    Some(10.0),
                    Some(10.0 + w),
                )
            })
            .chain(std::iter::once((
                "new_site_new_year".to_string(),
                Some(1.0),
                None,
            )))
            .collect();
        let w = target_widths(&rows);
        assert_eq!(w.len(), 1, "a target without complete rows is left out");
        let t = &w[0];
        assert_eq!((t.n, t.min, t.max), (5, 1.0, 5.0));
        assert!((t.q25 - 2.0).abs() < 1e-12 && (t.median - 3.0).abs() < 1e-12);
        assert!((quantile_sorted(&[0.0, 1.0], 0.25) - 0.25).abs() < 1e-12);
    }

    #[test]
    fn panels_go_to_named_sites_or_the_most_extreme() {
        let effects: Vec<SiteEffect> = [-3.0, -0.1, 0.2, 2.0, 0.0]
            .iter()
            .enumerate()
            .map(|(i, &m)| SiteEffect {
                site: format!("L{i}"),
                q05: None,
                q50: Some(m),
                q95: None,
            })
            .collect();
        let named = vec!["L2".to_string(), "Z".to_string()];
        assert_eq!(panel_sites(&effects, &named), named);
        let many: Vec<SiteEffect> = (0..20)
            .map(|i| SiteEffect {
                site: format!("S{i:02}"),
                q05: None,
                q50: Some(f64::from(i) - 9.5),
                q95: None,
            })
            .collect();
        let picked = panel_sites(&many, &[]);
        assert_eq!(picked.len(), EXTREME_SITES_SHOWN);
        // The four closest to zero (S08..S11) are left out; lowest median first.
        assert_eq!(picked.first().map(String::as_str), Some("S00"));
        assert_eq!(picked.last().map(String::as_str), Some("S19"));
        assert!(!picked
            .iter()
            .any(|s| ["S08", "S09", "S10", "S11"].contains(&s.as_str())));
        assert_eq!(panel_sites(&effects, &[])[0], "L0");
    }

    #[test]
    fn consecutive_identical_runs_collapse_into_one_line() {
        use crate::store::{RunSeriesOutcome, RunSummary};
        use crate::vocabulary::{RunStatus, RunTrigger};
        let run = |id: i64, status: &str, outcome: &str| RunHistoryEntry {
            run: RunSummary {
                run_id: id,
                trigger: RunTrigger::Schedule,
                command: Some("serve".into()),
                started_at: format!("t{id}"),
                finished_at: None,
                status: if status == "skipped" {
                    RunStatus::Skipped
                } else {
                    RunStatus::Succeeded
                },
                message: None,
            },
            series: vec![RunSeriesOutcome {
                series: "p".into(),
                outcome: outcome.into(),
                fit_id: None,
                message: Some("no new data".into()),
            }],
        };
        let runs = vec![
            run(9, "succeeded", "unchanged"),
            run(8, "succeeded", "unchanged"),
            run(7, "succeeded", "unchanged"),
            run(6, "skipped", "unchanged"),
            run(5, "succeeded", "unchanged"),
            run(4, "succeeded", "published"),
        ];
        assert_eq!(
            collapse_runs(&runs),
            vec![(0, 2, 3), (3, 3, 1), (4, 4, 1), (5, 5, 1)]
        );
        assert!(collapse_runs(&[]).is_empty());
    }

    #[test]
    fn the_exceedance_table_lists_the_sites_most_likely_to_exceed_first() {
        use crate::store::SiteExceedance;
        let row = |site: &str, t: f64, p: f64| SiteExceedance {
            site: site.into(),
            year: 2027,
            threshold: t,
            probability: Some(p),
        };
        let mut rows = vec![
            row("B", 25.0, 0.1),
            row("A", 10.0, 0.4),
            row("B", 10.0, 0.7),
            row("A", 25.0, 0.05),
            row("C", 10.0, 0.4),
            row("C", 25.0, 0.2),
        ];
        for i in 0..30 {
            rows.push(row(&format!("Z{i:02}"), 10.0, 0.01));
            rows.push(row(&format!("Z{i:02}"), 25.0, 0.001));
        }
        let t = exceedance_table(&rows).unwrap();
        assert_eq!(t.thresholds, [10.0, 25.0]);
        assert_eq!((t.sites, t.rows.len()), (33, EXCEEDANCE_SITES_SHOWN));
        let head: Vec<&str> = t.rows.iter().take(3).map(|r| r.0.as_str()).collect();
        assert_eq!(
            head,
            ["B", "A", "C"],
            "by the lowest threshold, ties by code"
        );
        assert_eq!(t.rows[0].2, [Some(0.7), Some(0.1)]);
        assert_eq!(exceedance_table(&[]), None);
    }

    #[test]
    fn many_sites_show_the_lowest_and_highest_halves() {
        let effects: Vec<SiteEffect> = (0..75)
            .map(|i| SiteEffect {
                site: format!("L{i}"),
                q05: None,
                q50: Some(i as f64),
                q95: None,
            })
            .collect();
        let (shown, gap) = sites_to_show(&effects);
        assert_eq!(shown.len(), MAX_SITES_SHOWN);
        assert_eq!(gap, Some(29));
        assert_eq!(shown[29].site, "L29");
        assert_eq!(shown[30].site, "L45");
        let (all, none) = sites_to_show(&effects[..10]);
        assert_eq!((all.len(), none), (10, None));
    }
}
