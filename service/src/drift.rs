//! The drift audit: how the variance components of a series move from one published
//! version to the next, with a screening flag for moves larger than the new version's
//! own uncertainty. Pure computation on rows the store read; `tidemark drift` prints it and
//! `tidemark report` charts it.
//!
//! The flag rule: a standard deviation or share of version *v* is flagged when its 90%
//! posterior interval `[q05, q95]` excludes the median `q50` of the same quantity in
//! version *v − 1* (the previous published version of the series). It is a screening
//! rule, not a test: successive versions share most of their data, so their posteriors
//! are far from independent, and with many quantities and versions some flags arise by
//! chance. A flag asks a person to look (new sites, a changed protocol, a corrected
//! delivery), it does not establish a change.

use serde::Serialize;

use crate::store::ComponentRow;

/// The rule as printed in `--help`, the text output and the JSON document.
pub const FLAG_RULE: &str =
    "flag: the new version's 90% interval [q05, q95] excludes the previous version's median \
     (a screening rule, not a statistical test)";

/// The `drift --json` document (fields documented in README.md).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DriftReport {
    pub rule: &'static str,
    pub series: Vec<SeriesDrift>,
}

/// The published versions of one series, oldest first.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SeriesDrift {
    pub series: String,
    /// How many (version, quantity) pairs carry the flag.
    pub flagged: usize,
    pub versions: Vec<VersionDrift>,
}

#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct VersionDrift {
    pub version: i64,
    pub fit_id: i64,
    pub data_through_year: Option<i64>,
    /// The response's unit the version was fitted with (`fits.unit`).
    pub unit: Option<String>,
    pub components: Vec<ComponentDrift>,
}

/// One standard deviation (`kind = "sd"`, model scale) or variance share
/// (`kind = "share"`) of one version, compared with the previous version.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ComponentDrift {
    pub kind: String,
    pub term: String,
    /// `model` for a standard deviation (after the transform); `None` for a share, a
    /// fraction without a scale.
    pub scale: Option<&'static str>,
    pub q05: Option<f64>,
    pub q50: Option<f64>,
    pub q95: Option<f64>,
    /// The median of the same quantity in the previous published version, if it had one.
    pub previous_q50: Option<f64>,
    /// `q50 - previous_q50`.
    pub change: Option<f64>,
    /// True when `[q05, q95]` excludes `previous_q50`.
    pub flag: bool,
}

impl ComponentDrift {
    /// A short name for tables and chart legends, e.g. `sd site`, `share residual`.
    pub fn label(&self) -> String {
        format!("{} {}", self.kind, self.term)
    }
}

/// True when the interval `[q05, q95]` excludes `previous_median`; false when any of
/// them is unknown.
pub fn excludes_previous_median(
    q05: Option<f64>,
    q95: Option<f64>,
    previous_median: Option<f64>,
) -> bool {
    match (q05, q95, previous_median) {
        (Some(lo), Some(hi), Some(m)) => m < lo || m > hi,
        _ => false,
    }
}

/// Display order of terms: site, year, further groups (by name), residual last.
fn term_rank(term: &str) -> (u8, &str) {
    match term {
        "site" => (0, ""),
        "year" => (1, ""),
        "residual" => (3, ""),
        other => (2, other),
    }
}

fn kind_rank(kind: &str) -> u8 {
    if kind == "sd" {
        0
    } else {
        1
    }
}

/// Build the drift table from store rows (any order; several series allowed).
pub fn build(rows: &[ComponentRow]) -> DriftReport {
    let mut rows: Vec<&ComponentRow> = rows.iter().collect();
    rows.sort_by(|a, b| {
        (
            a.series.as_str(),
            a.version,
            kind_rank(&a.kind),
            term_rank(&a.term),
        )
            .cmp(&(
                b.series.as_str(),
                b.version,
                kind_rank(&b.kind),
                term_rank(&b.term),
            ))
    });
    let mut series: Vec<SeriesDrift> = Vec::new();
    for row in rows {
        if series.last().is_none_or(|s| s.series != row.series) {
            series.push(SeriesDrift {
                series: row.series.clone(),
                flagged: 0,
                versions: Vec::new(),
            });
        }
        let Some(s) = series.last_mut() else {
            continue;
        };
        if s.versions.last().is_none_or(|v| v.version != row.version) {
            s.versions.push(VersionDrift {
                version: row.version,
                fit_id: row.fit_id,
                data_through_year: row.data_through_year,
                unit: row.unit.clone(),
                components: Vec::new(),
            });
        }
        // The previous version is the one just before in the list: published versions
        // count 1, 2, 3… without gaps, so it is version - 1.
        let n = s.versions.len();
        let previous_q50 = (n >= 2)
            .then(|| &s.versions[n - 2])
            .and_then(|prev| {
                prev.components
                    .iter()
                    .find(|c| c.kind == row.kind && c.term == row.term)
            })
            .and_then(|c| c.q50);
        let change = match (row.q50, previous_q50) {
            (Some(now), Some(before)) => Some(now - before),
            _ => None,
        };
        let flag = excludes_previous_median(row.q05, row.q95, previous_q50);
        s.flagged += usize::from(flag);
        s.versions[n - 1].components.push(ComponentDrift {
            kind: row.kind.clone(),
            term: row.term.clone(),
            scale: (row.kind == "sd").then(|| tidemark_model::Scale::Model.as_str()),
            q05: row.q05,
            q50: row.q50,
            q95: row.q95,
            previous_q50,
            change,
            flag,
        });
    }
    DriftReport {
        rule: FLAG_RULE,
        series,
    }
}

/// Which versions `drift` shows. Flags and changes are computed on every version first,
/// so a filter never changes what is compared with what.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Filter {
    /// Keep only versions with at least one flagged quantity.
    pub flagged_only: bool,
    /// Keep only the newest `last` versions of each series.
    pub last: Option<usize>,
}

impl DriftReport {
    /// Apply `filter`; a series left without versions is dropped. `flagged` counts the
    /// flags of the versions kept.
    pub fn filtered(mut self, filter: Filter) -> DriftReport {
        for s in &mut self.series {
            if let Some(n) = filter.last {
                let skip = s.versions.len().saturating_sub(n);
                s.versions.drain(..skip);
            }
            if filter.flagged_only {
                s.versions.retain(|v| v.components.iter().any(|c| c.flag));
            }
            s.flagged = s
                .versions
                .iter()
                .flat_map(|v| &v.components)
                .filter(|c| c.flag)
                .count();
        }
        self.series.retain(|s| !s.versions.is_empty());
        self
    }
}

/// The text form: per series, one compact block per quantity with a line per version.
pub fn render_text(report: &DriftReport) -> String {
    use std::fmt::Write as _;
    let num = |x: Option<f64>| x.map_or_else(|| "-".to_string(), |v| format!("{v:.4}"));
    let mut out = String::new();
    let _ = writeln!(out, "{}", report.rule);
    for s in &report.series {
        let _ = writeln!(
            out,
            "\nseries {}: {} published version(s) shown, {} flag(s)",
            s.series,
            s.versions.len(),
            s.flagged
        );
        // The quantities in display order, as they first appear.
        let mut quantities: Vec<(&str, &str)> = Vec::new();
        for v in &s.versions {
            for c in &v.components {
                if !quantities.contains(&(c.kind.as_str(), c.term.as_str())) {
                    quantities.push((c.kind.as_str(), c.term.as_str()));
                }
            }
        }
        quantities.sort_by_key(|(k, t)| (kind_rank(k), term_rank(t)));
        // The unit of the newest version shown that recorded one.
        let unit = s
            .versions
            .iter()
            .rev()
            .find_map(|v| v.unit.as_deref())
            .map(|u| format!("; response in {}", crate::visible::visible(u)))
            .unwrap_or_default();
        for (kind, term) in quantities {
            let scale = if kind == "sd" {
                format!("standard deviation, model scale{unit}")
            } else {
                "share of the variance, 0 to 1".to_string()
            };
            let _ = writeln!(out, "  {kind} {term} ({scale})");
            let _ = writeln!(
                out,
                "    {:>7} {:>7} {:>10} {:>10} {:>10} {:>10}  flag",
                "version", "through", "q05", "q50", "q95", "change"
            );
            for v in &s.versions {
                let Some(c) = v
                    .components
                    .iter()
                    .find(|c| c.kind == kind && c.term == term)
                else {
                    continue;
                };
                let change = c
                    .change
                    .map_or_else(|| "-".to_string(), |d| format!("{d:+.4}"));
                let _ = writeln!(
                    out,
                    "    {:>7} {:>7} {:>10} {:>10} {:>10} {:>10}  {}",
                    v.version,
                    v.data_through_year
                        .map_or_else(|| "-".to_string(), |y| y.to_string()),
                    num(c.q05),
                    num(c.q50),
                    num(c.q95),
                    change,
                    if c.flag { "*" } else { "" }
                );
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(version: i64, kind: &str, term: &str, q: (f64, f64, f64)) -> ComponentRow {
        ComponentRow {
            series: "chlorophyll".into(),
            version,
            fit_id: 10 + version,
            data_through_year: Some(2010 + version),
            kind: kind.into(),
            term: term.into(),
            q05: Some(q.0),
            q50: Some(q.1),
            q95: Some(q.2),
            unit: None,
        }
    }

    #[test]
    fn the_flag_fires_exactly_when_the_interval_excludes_the_previous_median() {
        let rows = vec![
            row(1, "sd", "site", (0.4, 0.5, 0.6)),
            // Previous median 0.5 inside [0.45, 0.65]: no flag.
            row(2, "sd", "site", (0.45, 0.55, 0.65)),
            // Previous median 0.55 below 0.56: flag.
            row(3, "sd", "site", (0.56, 0.7, 0.9)),
            // Previous median 0.7 above 0.69: flag.
            row(4, "sd", "site", (0.3, 0.5, 0.69)),
            // On the boundary counts as inside.
            row(5, "sd", "site", (0.5, 0.6, 0.7)),
            row(1, "share", "site", (0.2, 0.3, 0.4)),
        ];
        let report = build(&rows);
        let s = &report.series[0];
        let flags: Vec<bool> = s.versions.iter().map(|v| v.components[0].flag).collect();
        assert_eq!(flags, [false, false, true, true, false]);
        assert_eq!(s.flagged, 2);
        let change = s.versions[1].components[0].change.unwrap();
        assert!((change - 0.05).abs() < 1e-12);
        assert_eq!(s.versions[0].components[0].previous_q50, None);
        // The share of version 1 comes after the sd of version 1.
        assert_eq!(s.versions[0].components[1].label(), "share site");
    }

    #[test]
    fn a_term_missing_from_the_previous_version_is_not_compared() {
        let rows = vec![
            row(1, "sd", "site", (0.4, 0.5, 0.6)),
            row(2, "sd", "site", (0.4, 0.5, 0.6)),
            row(2, "sd", "crew", (0.1, 0.2, 0.3)),
        ];
        let report = build(&rows);
        let v2 = &report.series[0].versions[1];
        let crew = v2.components.iter().find(|c| c.term == "crew").unwrap();
        assert_eq!(
            (crew.previous_q50, crew.change, crew.flag),
            (None, None, false)
        );
        // Display order: site, year, groups, residual.
        assert_eq!(v2.components[0].term, "site");
    }
}
