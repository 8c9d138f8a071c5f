//! The report page: HTML text around the charts. Every piece of text that came from a
//! feed file, the config or the database goes through [`esc`] (site codes may hold
//! quotes, `<`, `&`, SQL-looking text or control characters; they are shown verbatim or
//! as visible escapes, never interpreted).

use std::fmt::Write as _;

use super::{
    charts, collapse_runs, sites_to_show, Report, ReportError, SeriesSection, EXTREME_SITES_SHOWN,
    MAX_SITES_SHOWN,
};
use crate::store::FitSummary;
use crate::visible::visible;

/// The cautions every report carries (README.md § Cautions says the same).
pub const CAUTION: &str = "Forecasts are statistical estimates from the data given to Tidemark. \
Where they feed decisions that touch people — for example recreational-water or drinking-water \
advisories after algal blooms — those decisions follow the responsible agency's own sampling, \
testing and notification rules and are made by qualified staff.";

const STYLE: &str = "
body { font-family: sans-serif; margin: 1.5em auto; max-width: 1000px; color: #222; padding: 0 1em; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.3em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; margin-top: 2em; }
h3 { font-size: 1.05em; margin-bottom: 0.3em; }
p.meta { color: #555; margin-top: 0; }
.caution { border-left: 5px solid #d55e00; background: #fff4ec; padding: 0.6em 1em; }
.warning { border-left: 5px solid #c80000; background: #fdecec; padding: 0.4em 1em; }
figure { margin: 0.8em 0; }
figcaption { color: #444; font-size: 0.9em; margin-top: 0.2em; }
svg { max-width: 100%; height: auto; display: block; }
body { overflow-wrap: anywhere; }
.scroll { overflow-x: auto; max-width: 100%; }
.panels { display: grid; grid-template-columns: repeat(auto-fill, minmax(240px, 1fr)); gap: 0.6em; }
.panels figure { margin: 0; min-width: 0; }
td.count { white-space: nowrap; }
table { overflow-wrap: normal; }
td.num { white-space: nowrap; }
table { border-collapse: collapse; font-size: 0.85em; margin: 0.5em 0; }
th, td { border: 1px solid #ddd; padding: 0.25em 0.5em; text-align: left; vertical-align: top; }
th { background: #f3f3f3; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.published, .succeeded { color: #006b3c; }
.rejected, .failed, .partial, .abandoned { color: #b00000; font-weight: bold; }
";

/// HTML-escape text for element content and quoted attribute values; control characters
/// (invalid in HTML and in the inline SVG) are shown as visible escapes first.
pub fn esc(text: &str) -> String {
    html_escape::encode_safe(&visible(text)).into_owned()
}

fn num(x: Option<f64>, digits: usize) -> String {
    x.map_or_else(|| "–".to_string(), |v| format!("{v:.digits$}"))
}

fn fit_line(f: &FitSummary) -> String {
    format!(
        "version {} (fit {}), data through {}, {} observations at {} sites in {} years; \
         max R-hat {}, min bulk ESS {}, min tail ESS {}; published {}",
        f.version,
        f.fit_id,
        f.data_through_year
            .map_or_else(|| "–".to_string(), |y| y.to_string()),
        f.n_obs.map_or_else(|| "–".to_string(), |n| n.to_string()),
        f.n_sites.map_or_else(|| "–".to_string(), |n| n.to_string()),
        f.n_years.map_or_else(|| "–".to_string(), |n| n.to_string()),
        num(f.max_rhat, 3),
        num(f.min_ess_bulk, 0),
        num(f.min_ess_tail, 0),
        f.created_at
    )
}

fn section(out: &mut String, s: &SeriesSection) -> Result<(), ReportError> {
    let _ = writeln!(out, "<section>\n<h2>Series {}</h2>", esc(&s.name));
    if let Some(a) = &s.unserved_attempt {
        let _ = writeln!(
            out,
            "<p class=\"warning\">The newest attempt, version {} (fit {}), was <b>{}</b>: {}. \
             The version below keeps serving.</p>",
            a.version,
            a.fit_id,
            esc(a.status.as_str()),
            esc(a.message.as_deref().unwrap_or("no message"))
        );
    }
    let Some(latest) = &s.latest else {
        let _ = writeln!(
            out,
            "<p>No published version yet: there is nothing to chart.</p>\n</section>"
        );
        return Ok(());
    };
    let _ = writeln!(
        out,
        "<p class=\"meta\">Response <code>{}</code> (transform {}{}). Serving {}.</p>",
        esc(&s.response),
        esc(&s.transform),
        s.unit
            .as_deref()
            .map(|u| format!(", unit {}", esc(u)))
            .unwrap_or_default(),
        esc(&fit_line(latest))
    );

    let log = s.transform == "log";
    // Axes name the unit when the series has one, else the response column.
    let units = match &s.unit {
        Some(u) => u.clone(),
        None => format!("{} units", s.response),
    };
    let sd_axis = if log {
        let of = match &s.unit {
            Some(u) => format!("{} in {u}", s.response),
            None => s.response.clone(),
        };
        format!("sd (model scale: natural log of {of}; log axis)")
    } else {
        format!("sd (model scale = response scale, {units}; log axis)")
    };
    // (a) Variance components across versions.
    if let Some(drift) = &s.drift {
        let _ = writeln!(
            out,
            "<h3>Variance components across versions</h3>\n<figure>\n{}\n<figcaption>Median and \
             90% interval of each standard deviation on the model scale, one point per published \
             version, on a log axis so that the wide intervals of early versions do not squash \
             later ones. A red ring marks a flagged version: its 90% interval excludes the previous \
             version's median. This is a screening rule, not a statistical test; a flag asks a \
             person to look.</figcaption>\n</figure>",
            charts::variance_components(drift, &sd_axis)?
        );
        let flagged: Vec<_> = drift
            .versions
            .iter()
            .flat_map(|v| v.components.iter().filter(|c| c.flag).map(move |c| (v, c)))
            .collect();
        if flagged.is_empty() {
            let _ = writeln!(out, "<p>No flagged change between versions.</p>");
        } else {
            let _ = writeln!(
                out,
                "<div class=\"scroll\"><table>\n<caption>Flagged changes ({})</caption>\n<tr><th>version</th>\
                 <th>data through</th><th>quantity</th><th>previous median</th><th>q05</th>\
                 <th>q50</th><th>q95</th><th>change</th></tr>",
                flagged.len()
            );
            for (v, c) in flagged {
                let _ = writeln!(
                    out,
                    "<tr><td class=\"num\">{}</td><td class=\"num\">{}</td><td>{}</td>\
                     <td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td>\
                     <td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
                    v.version,
                    v.data_through_year
                        .map_or_else(|| "–".to_string(), |y| y.to_string()),
                    esc(&c.label()),
                    num(c.previous_q50, 4),
                    num(c.q05, 4),
                    num(c.q50, 4),
                    num(c.q95, 4),
                    c.change
                        .map_or_else(|| "–".to_string(), |d| format!("{d:+.4}"))
                );
            }
            let _ = writeln!(out, "</table></div>");
        }
    }

    // (b) Interval widths by target.
    let width_units = if log {
        format!("response scale, {units}, back-transformed")
    } else {
        format!("response scale, {units}")
    };
    if s.widths.is_empty() {
        let _ = writeln!(out, "<p>The latest version has no forecasts.</p>");
    } else {
        let _ = writeln!(
            out,
            "<h3>Forecast interval widths by target</h3>\n<figure>\n{}\n<figcaption>Width \
             (upper minus lower bound) of the 80% forecast interval of every row of the latest \
             version's forecasts, per target: dot = median, box = middle half, line = range. \
             A monitored site next year is narrow when years vary little; an unmonitored site \
             is wide when sites differ a lot.</figcaption>\n</figure>",
            charts::interval_widths(&s.widths, &width_units)?
        );
    }
    if !s.prior_only.is_empty() {
        let items: Vec<String> = s
            .prior_only
            .iter()
            .map(|(target, parts)| {
                format!(
                    "<code>{}</code>: {}",
                    html_escape::encode_text(target),
                    html_escape::encode_text(parts)
                )
            })
            .collect();
        let _ = writeln!(
            out,
            "<p class=\"caution\"><b>Assumed, not estimated.</b> Part of these forecasts' \
             uncertainty comes from a variance the data cannot estimate yet, because its factor \
             was observed at a single level (one year, one site or one group level): its \
             posterior is its prior, so that part of the interval width is an assumption \
             (column <code>prior_only</code>). {}.</p>",
            items.join("; ")
        );
    }

    // (c) Site effects, ranked.
    if !s.site_effects.is_empty() {
        let (shown, gap) = sites_to_show(&s.site_effects);
        let note = match gap {
            Some(_) => format!(
                " Only the {} lowest and {} highest of {} sites are drawn (dashed rule); the \
                 others are in <code>posterior_summary</code> (kind 'effect', term 'site').",
                MAX_SITES_SHOWN / 2,
                MAX_SITES_SHOWN / 2,
                s.site_effects.len()
            ),
            None => String::new(),
        };
        let (scale, reading) = if log {
            (
                charts::EffectScale::Factor,
                " The series is fitted on the log scale, so each effect is drawn as exp(effect): \
                 the factor by which the site's typical value differs from the network median \
                 (2 = twice the median, 0.5 = half), on a log axis.",
            )
        } else {
            (
                charts::EffectScale::Additive,
                " Effects are in the response's own units: the difference from the network mean.",
            )
        };
        let _ = writeln!(
            out,
            "<h3>Site effects</h3>\n<figure>\n{}\n<figcaption>Each site's effect in the latest \
             version, ranked by its median, with its 90% interval.{reading}{note}</figcaption>\n\
             </figure>",
            charts::site_effects(&shown, gap, scale, &format!("response scale, {units}"))?
        );
    }

    // (d) Small multiples: observed values and next year's band at chosen sites.
    if !s.panels.is_empty() || !s.unknown_sites.is_empty() {
        let which = if s.panels_named {
            "the sites named in <code>report_sites</code>".to_string()
        } else {
            format!(
                "the {} sites with the largest site effects (either direction; name others \
                 with <code>report_sites</code> in the config)",
                EXTREME_SITES_SHOWN.min(s.panels.len())
            )
        };
        let _ = writeln!(
            out,
            "<h3>Observed values and next year's forecast at chosen sites</h3>\n\
             <p>For {which}: every stored value by year (blue dots, response scale, {}{}) and \
             the forecast for next year at that site (target <code>known_site_new_year</code>): \
             the 80% interval q10–q90 as the shaded bar, the median as its line.</p>\n\
             <div class=\"panels\">",
            esc(&units),
            if log { ", log axis" } else { "" }
        );
        for p in &s.panels {
            let panel = charts::SitePanel {
                site: &p.site,
                observed: &p.observed,
                band: p.band,
            };
            let _ = writeln!(
                out,
                "<figure>\n{}\n<figcaption>{}{}</figcaption>\n</figure>",
                charts::site_panel(&panel, log, &units)?,
                esc(&p.site),
                if p.band.is_none() {
                    " — no next-year forecast in the latest version"
                } else {
                    ""
                }
            );
        }
        let _ = writeln!(out, "</div>");
        if !s.unknown_sites.is_empty() {
            let names: Vec<String> = s.unknown_sites.iter().map(|n| esc(n)).collect();
            let _ = writeln!(
                out,
                "<p class=\"warning\">No stored value or forecast for these sites named in \
                 <code>report_sites</code>: {}.</p>",
                names.join(", ")
            );
        }
    }
    if let Some(table) = &s.exceedance {
        exceedance_section(out, table, &units);
    }
    let _ = writeln!(out, "</section>");
    Ok(())
}

/// A probability for the table: three decimals, the extremes as bounds (a model's 0 or 1
/// is never a certainty).
fn probability(p: Option<f64>) -> String {
    match p {
        None => "–".to_string(),
        Some(p) if p < 0.0005 => "&lt;0.001".to_string(),
        Some(p) if p > 0.9995 => "&gt;0.999".to_string(),
        Some(p) => format!("{p:.3}"),
    }
}

/// (e) Next year's exceedance probabilities at monitored sites, with the caution.
fn exceedance_section(out: &mut String, t: &super::ExceedanceTable, units: &str) {
    let shown = if t.rows.len() < t.sites {
        format!(
            "the {} of {} monitored sites most likely to exceed {} (all of them are in the \
             <code>latest_exceedance</code> view)",
            t.rows.len(),
            t.sites,
            esc(&format!("{} {units}", t.thresholds[0]))
        )
    } else {
        format!("every monitored site ({})", t.sites)
    };
    let _ = writeln!(
        out,
        "<h3>Probability of exceeding the thresholds next year</h3>\n<p>For {shown}: the \
         posterior predictive probability that next year's value at the site (target \
         <code>known_site_new_year</code>) exceeds each of the series' thresholds ({}, \
         response scale). It is the probability of the true value, computed from the \
         model whatever detection limit a laboratory would report it against.</p>\n\
         <div class=\"scroll\"><table>\n<tr><th>site</th><th>year</th>{}</tr>",
        esc(units),
        t.thresholds
            .iter()
            .map(|th| format!("<th>P(&gt; {})</th>", esc(&th.to_string())))
            .collect::<String>()
    );
    for (site, year, probs) in &t.rows {
        let _ = writeln!(
            out,
            "<tr><td>{}</td><td class=\"num\">{year}</td>{}</tr>",
            esc(site),
            probs
                .iter()
                .map(|&p| format!("<td class=\"num\">{}</td>", probability(p)))
                .collect::<String>()
        );
    }
    let _ = writeln!(
        out,
        "</table></div>\n<p class=\"caution\"><b>Caution.</b> {} A probability here is \
         an estimate for one future value at the site, not a measurement.</p>",
        esc(CAUTION)
    );
}

fn run_history(out: &mut String, r: &Report) {
    let _ = writeln!(out, "<section>\n<h2>Run history</h2>");
    if r.runs.is_empty() {
        let _ = writeln!(out, "<p>No run recorded yet.</p>\n</section>");
        return;
    }
    let _ = writeln!(
        out,
        "<p>Consecutive runs that ended the same way (same trigger, status, message and \
         outcome per series) are shown as one line with their count.</p>\n\
         <div class=\"scroll\"><table>\n<tr><th>run</th><th>runs</th><th>trigger</th>\
         <th>started</th><th>finished</th><th>status</th><th>outcome per series</th>\
         <th>message</th></tr>"
    );
    for (newest, oldest, count) in collapse_runs(&r.runs) {
        let (entry, first) = (&r.runs[newest], &r.runs[oldest].run);
        let run = &entry.run;
        let mut outcomes = String::new();
        for s in &entry.series {
            let _ = write!(
                outcomes,
                "{}: <span class=\"{}\">{}</span>{}{}<br>",
                esc(&s.series),
                esc(&s.outcome),
                esc(&s.outcome),
                s.fit_id.map(|f| format!(" (fit {f})")).unwrap_or_default(),
                s.message
                    .as_deref()
                    .map(|m| format!(" — {}", esc(m)))
                    .unwrap_or_default()
            );
        }
        let (ids, started) = if count == 1 {
            (run.run_id.to_string(), esc(&run.started_at))
        } else {
            (
                format!("{}–{}", first.run_id, run.run_id),
                format!("{} … {}", esc(&first.started_at), esc(&run.started_at)),
            )
        };
        let _ = writeln!(
            out,
            "<tr><td class=\"num\">{}</td><td class=\"num count\">×{}</td><td>{}</td>\
             <td>{}</td><td>{}</td><td class=\"{}\">{}</td><td>{}</td><td>{}</td></tr>",
            ids,
            count,
            esc(run.trigger.as_str()),
            started,
            esc(run.finished_at.as_deref().unwrap_or("–")),
            esc(run.status.as_str()),
            esc(run.status.as_str()),
            outcomes,
            esc(run.message.as_deref().unwrap_or(""))
        );
    }
    let _ = writeln!(out, "</table></div>\n</section>");
}

/// The whole page.
pub fn render(r: &Report) -> Result<String, ReportError> {
    let mut out = String::with_capacity(256 * 1024);
    let _ = writeln!(
        out,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>Tidemark report</title>\n<style>{STYLE}</style>\n</head>\n<body>\n\
         <h1>Tidemark report</h1>\n<p class=\"meta\">Generated {} from {}.</p>\n\
         <p class=\"caution\"><b>Caution.</b> {}</p>",
        esc(&r.generated_at),
        esc(&r.database),
        esc(CAUTION)
    );
    for s in &r.series {
        section(&mut out, s)?;
    }
    run_history(&mut out, r);
    let _ = writeln!(
        out,
        "<section>\n<h2>Cautions</h2>\n<p class=\"caution\">{}</p>\n<p>Standard deviations \
         are on the model scale of each series (after its transform); site effects of a log \
         series are shown as factors (exp of the effect), forecast widths and the site charts \
         on the response's own scale. The drift flag is a screening rule, not a \
         statistical test.</p>\n</section>\n</body>\n</html>",
        esc(CAUTION)
    );
    Ok(out)
}
