//! The report's charts, drawn with plotters into SVG text (the SVG backend writes labels
//! as `<text>` elements and escapes them, so no font files are involved and any site
//! code is safe to draw).
//!
//! Each function returns one `<svg>` element ready to be inlined into HTML.

use plotters::prelude::*;

use super::{ReportError, TargetWidths};
use crate::drift::SeriesDrift;
use crate::store::SiteEffect;

/// Width of every chart in pixels (the page scales them down on narrow screens).
const WIDTH: u32 = 960;

/// Colour-blind-safe qualitative palette (Okabe & Ito 2008, "Color Universal Design").
const PALETTE: [RGBColor; 7] = [
    RGBColor(0, 114, 178),   // blue
    RGBColor(213, 94, 0),    // vermillion
    RGBColor(0, 158, 115),   // bluish green
    RGBColor(204, 121, 167), // reddish purple
    RGBColor(230, 159, 0),   // orange
    RGBColor(86, 180, 233),  // sky blue
    RGBColor(0, 0, 0),       // black
];

const FLAG: RGBColor = RGBColor(200, 0, 0);

fn chart_error(chart: &'static str) -> impl Fn(String) -> ReportError {
    move |message| ReportError::Chart { chart, message }
}

/// Inline SVG needs no namespace declaration: the HTML parser puts `<svg>` in the SVG
/// namespace. Dropping it keeps the page free of any URL, which makes "no external
/// reference" a simple property to check.
fn inline(svg: String) -> String {
    svg.replacen(" xmlns=\"http://www.w3.org/2000/svg\"", "", 1)
}

/// A y range that shows every value with a little room, never degenerate.
fn padded(lo: f64, hi: f64) -> std::ops::Range<f64> {
    let (lo, hi) = if lo.is_finite() && hi.is_finite() && hi > lo {
        (lo, hi)
    } else if lo.is_finite() {
        (lo - 1.0, lo + 1.0)
    } else {
        (0.0, 1.0)
    };
    let pad = 0.06 * (hi - lo);
    (lo - pad)..(hi + pad)
}

/// (a) The standard deviations of every published version with their 90% intervals.
/// Flagged versions (the interval excludes the previous median) get a red ring.
pub fn variance_components(drift: &SeriesDrift) -> Result<String, ReportError> {
    let err = chart_error("variance components");
    let mut terms: Vec<String> = Vec::new();
    for v in &drift.versions {
        for c in v.components.iter().filter(|c| c.kind == "sd") {
            if !terms.contains(&c.term) {
                terms.push(c.term.clone());
            }
        }
    }
    let first = drift.versions.first().map_or(1, |v| v.version) as f64;
    let last = drift.versions.last().map_or(1, |v| v.version) as f64;
    let y_max = drift
        .versions
        .iter()
        .flat_map(|v| v.components.iter().filter(|c| c.kind == "sd"))
        .filter_map(|c| c.q95.or(c.q50))
        .fold(0.0_f64, f64::max);
    let y_max = if y_max > 0.0 { y_max * 1.08 } else { 1.0 };
    // Spread the terms a little sideways so their intervals do not hide each other.
    let spread = 0.3_f64.min(0.08 * terms.len() as f64);
    let offset = |i: usize| {
        if terms.len() < 2 {
            0.0
        } else {
            -spread / 2.0 + spread * i as f64 / (terms.len() - 1) as f64
        }
    };
    let years: Vec<(i64, Option<i64>)> = drift
        .versions
        .iter()
        .map(|v| (v.version, v.data_through_year))
        .collect();

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, 420)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(e.to_string()))?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                "Standard deviations by published version: median and 90% interval",
                ("sans-serif", 18),
            )
            .margin(12)
            .x_label_area_size(52)
            .y_label_area_size(64)
            .build_cartesian_2d((first - 0.6)..(last + 0.6), 0.0..y_max)
            .map_err(|e| err(e.to_string()))?;
        let year_of = |x: &f64| {
            let version = x.round() as i64;
            years
                .iter()
                .find(|(v, _)| *v == version)
                .map_or_else(String::new, |(v, y)| match y {
                    Some(y) => format!("v{v}·{y}"),
                    None => format!("v{v}"),
                })
        };
        let n_labels = (last - first + 1.0).clamp(1.0, 16.0) as usize;
        chart
            .configure_mesh()
            .x_labels(n_labels)
            .x_label_formatter(&year_of)
            .x_desc("published version · data through year")
            .y_desc("standard deviation (model scale)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(|e| err(e.to_string()))?;
        for (i, term) in terms.iter().enumerate() {
            let colour = PALETTE[i % PALETTE.len()];
            let dx = offset(i);
            let points: Vec<(f64, f64, f64, f64, bool)> = drift
                .versions
                .iter()
                .filter_map(|v| {
                    let c = v
                        .components
                        .iter()
                        .find(|c| c.kind == "sd" && &c.term == term)?;
                    let q50 = c.q50?;
                    Some((
                        v.version as f64 + dx,
                        c.q05.unwrap_or(q50),
                        q50,
                        c.q95.unwrap_or(q50),
                        c.flag,
                    ))
                })
                .collect();
            chart
                .draw_series(points.iter().map(|&(x, lo, _, hi, _)| {
                    PathElement::new(vec![(x, lo), (x, hi)], colour.stroke_width(2))
                }))
                .map_err(|e| err(e.to_string()))?;
            chart
                .draw_series(LineSeries::new(
                    points.iter().map(|&(x, _, m, _, _)| (x, m)),
                    colour.mix(0.5).stroke_width(1),
                ))
                .map_err(|e| err(e.to_string()))?
                .label(format!("sd {term}"))
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(3))
                });
            chart
                .draw_series(
                    points
                        .iter()
                        .map(|&(x, _, m, _, _)| Circle::new((x, m), 3, colour.filled())),
                )
                .map_err(|e| err(e.to_string()))?;
            chart
                .draw_series(
                    points
                        .iter()
                        .filter(|p| p.4)
                        .map(|&(x, _, m, _, _)| Circle::new((x, m), 7, FLAG.stroke_width(2))),
                )
                .map_err(|e| err(e.to_string()))?;
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(160, 160, 160))
            .label_font(("sans-serif", 14))
            .draw()
            .map_err(|e| err(e.to_string()))?;
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(inline(svg))
}

/// (b) The widths of the latest version's 80% forecast intervals by target: the range
/// over rows (thin line), the middle half (box) and the median (dot).
pub fn interval_widths(targets: &[TargetWidths], units: &str) -> Result<String, ReportError> {
    let err = chart_error("interval widths");
    let y_max = targets
        .iter()
        .map(|t| t.max)
        .filter(|m| m.is_finite())
        .fold(0.0_f64, f64::max);
    let y_max = if y_max > 0.0 { y_max * 1.1 } else { 1.0 };
    let labels: Vec<String> = targets
        .iter()
        .map(|t| format!("{} (n={})", t.target.replace('_', " "), t.n))
        .collect();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, 360)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(e.to_string()))?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                "Width of the 80% forecast interval by target (latest version)",
                ("sans-serif", 18),
            )
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(64)
            .build_cartesian_2d(-0.5..(targets.len() as f64 - 0.5), 0.0..y_max)
            .map_err(|e| err(e.to_string()))?;
        let label_of = |x: &f64| {
            let i = x.round();
            if (x - i).abs() > 1e-6 || i < 0.0 {
                return String::new();
            }
            labels.get(i as usize).cloned().unwrap_or_default()
        };
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(targets.len().max(1) * 2 + 1)
            .x_label_formatter(&label_of)
            .y_desc(format!("width of the 80% interval ({units})"))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(|e| err(e.to_string()))?;
        for (i, t) in targets.iter().enumerate() {
            let colour = PALETTE[i % PALETTE.len()];
            let x = i as f64;
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(x, t.min), (x, t.max)],
                    colour.stroke_width(2),
                )))
                .map_err(|e| err(e.to_string()))?;
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(x - 0.18, t.q25), (x + 0.18, t.q75)],
                    colour.mix(0.35).filled(),
                )))
                .map_err(|e| err(e.to_string()))?;
            chart
                .draw_series(std::iter::once(Circle::new(
                    (x, t.median),
                    5,
                    colour.filled(),
                )))
                .map_err(|e| err(e.to_string()))?;
        }
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(inline(svg))
}

/// (c) Site effects ranked by their median, with 90% intervals. `shown` are the effects
/// to draw, lowest median first; `gap_after` marks where sites were left out (drawn as a
/// dashed rule).
pub fn site_effects(shown: &[SiteEffect], gap_after: Option<usize>) -> Result<String, ReportError> {
    let err = chart_error("site effects");
    let n = shown.len().max(1);
    let (lo, hi) = shown
        .iter()
        .flat_map(|e| [e.q05, e.q50, e.q95])
        .flatten()
        .fold((0.0_f64, 0.0_f64), |(lo, hi), v| (lo.min(v), hi.max(v)));
    let x_range = padded(lo, hi);
    let height = (90 + 15 * n as u32).max(220);
    let codes: Vec<&str> = shown.iter().map(|e| e.site.as_str()).collect();
    let longest = codes.iter().map(|c| c.chars().count()).max().unwrap_or(4);
    // The naive text metrics of plotters: about 0.55 em per character at 12 px.
    let label_area = (longest as u32 * 7 + 16).clamp(60, 260);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(e.to_string()))?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                "Site effects, latest version: median and 90% interval, ranked",
                ("sans-serif", 18),
            )
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(label_area)
            .build_cartesian_2d(x_range.clone(), -0.6..(n as f64 - 0.4))
            .map_err(|e| err(e.to_string()))?;
        let code_of = |y: &f64| {
            let i = y.round();
            if (y - i).abs() > 1e-6 || i < 0.0 {
                return String::new();
            }
            codes
                .get(i as usize)
                .map(|c| c.to_string())
                .unwrap_or_default()
        };
        chart
            .configure_mesh()
            .disable_y_mesh()
            .y_labels(n * 2 + 1)
            .y_label_formatter(&code_of)
            .y_label_style(("sans-serif", 12))
            .x_desc("site effect (model scale; 0 = network mean)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(|e| err(e.to_string()))?;
        chart
            .draw_series(std::iter::once(PathElement::new(
                vec![(0.0, -0.6), (0.0, n as f64 - 0.4)],
                RGBColor(120, 120, 120).stroke_width(1),
            )))
            .map_err(|e| err(e.to_string()))?;
        if let Some(g) = gap_after {
            let y = g as f64 + 0.5;
            let (x0, x1) = (x_range.start, x_range.end);
            let dashes = 60;
            chart
                .draw_series((0..dashes).step_by(2).map(|k| {
                    let a = x0 + (x1 - x0) * k as f64 / dashes as f64;
                    let b = x0 + (x1 - x0) * (k + 1) as f64 / dashes as f64;
                    PathElement::new(vec![(a, y), (b, y)], RGBColor(90, 90, 90).stroke_width(1))
                }))
                .map_err(|e| err(e.to_string()))?;
        }
        let colour = PALETTE[0];
        for (i, e) in shown.iter().enumerate() {
            let Some(m) = e.q50 else { continue };
            let y = i as f64;
            chart
                .draw_series(std::iter::once(PathElement::new(
                    vec![(e.q05.unwrap_or(m), y), (e.q95.unwrap_or(m), y)],
                    colour.stroke_width(2),
                )))
                .map_err(|e| err(e.to_string()))?;
            chart
                .draw_series(std::iter::once(Circle::new((m, y), 3, colour.filled())))
                .map_err(|e| err(e.to_string()))?;
        }
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(inline(svg))
}
