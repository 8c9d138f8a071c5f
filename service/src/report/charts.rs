//! The report's charts, drawn with plotters into SVG text (the SVG backend writes labels
//! as `<text>` elements and escapes them, so no font files are involved and any site
//! code is safe to draw).
//!
//! Each function returns one `<svg>` element ready to be inlined into HTML.

use plotters::prelude::*;

use super::{ReportError, TargetWidths};
use crate::drift::SeriesDrift;
use crate::store::SiteEffect;
use crate::visible::visible;

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

/// A tick label: at most four significant digits, no trailing zeros, no exponent for
/// the magnitudes a monitoring series has (so never `0.30000000000000004`).
pub fn tick(v: f64) -> String {
    if !v.is_finite() {
        return String::new();
    }
    if v == 0.0 {
        return "0".into();
    }
    let magnitude = v.abs().log10().floor() as i32;
    if !(-4..6).contains(&magnitude) {
        return format!("{v:.2e}");
    }
    let decimals = (3 - magnitude).max(0) as usize;
    let text = format!("{v:.decimals$}");
    let text = if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    };
    if text == "-0" {
        "0".into()
    } else {
        text
    }
}

/// A positive range for a log axis around `lo..hi` (both > 0), never degenerate.
fn log_padded(lo: f64, hi: f64) -> std::ops::Range<f64> {
    let (lo, hi) = if lo.is_finite() && hi.is_finite() && lo > 0.0 && hi > lo {
        (lo, hi)
    } else if lo.is_finite() && lo > 0.0 {
        (lo / 2.0, lo * 2.0)
    } else {
        (0.1, 1.0)
    };
    // Room of 8% of the span in log terms on each side.
    let pad = (hi / lo).powf(0.08).max(1.05);
    (lo / pad)..(hi * pad)
}

/// Tick positions for a log axis over `range`: 1-2-5 steps per decade, thinned to powers
/// of ten when that would give more than eight, and with 1-1.5-2-3-5-7 when fewer than
/// three would show.
fn log_ticks(range: &std::ops::Range<f64>) -> Vec<f64> {
    let pick = |mantissas: &[f64]| -> Vec<f64> {
        let (lo, hi) = (range.start.max(f64::MIN_POSITIVE), range.end);
        let first = lo.log10().floor() as i32 - 1;
        let last = hi.log10().ceil() as i32 + 1;
        (first..=last)
            .flat_map(|k| mantissas.iter().map(move |m| m * 10f64.powi(k)))
            .filter(|v| *v >= lo && *v <= hi)
            .collect()
    };
    let ticks = pick(&[1.0, 2.0, 5.0]);
    if ticks.len() > 8 {
        pick(&[1.0])
    } else if ticks.len() < 3 {
        pick(&[1.0, 1.5, 2.0, 3.0, 5.0, 7.0])
    } else {
        ticks
    }
}

/// How many category labels fit across `width` pixels at about `chars` characters each
/// (plotters' naive metrics: ~7 px per character at 12–14 px text).
fn labels_that_fit(width: u32, chars: usize) -> usize {
    ((width as usize).saturating_sub(100) / (chars * 7 + 16).max(1)).max(2)
}

/// (a) The standard deviations of every published version with their 90% intervals.
/// Flagged versions (the interval excludes the previous median) get a red ring.
/// `sd_axis` names the axis: the model scale, and what that scale is for the series.
pub fn variance_components(drift: &SeriesDrift, sd_axis: &str) -> Result<String, ReportError> {
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
    // A log axis: early versions with few years have wide intervals that would squash
    // later ones on a linear axis, and a ratio reads the same anywhere on it.
    let (y_lo, y_hi) = drift
        .versions
        .iter()
        .flat_map(|v| v.components.iter().filter(|c| c.kind == "sd"))
        .flat_map(|c| [c.q05, c.q50, c.q95])
        .flatten()
        .filter(|v| v.is_finite() && *v > 0.0)
        .fold((f64::INFINITY, 0.0_f64), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        });
    let y_range = log_padded(y_lo, y_hi);
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
            .build_cartesian_2d(
                (first - 0.6)..(last + 0.6),
                y_range
                    .clone()
                    .log_scale()
                    .with_key_points(log_ticks(&y_range)),
            )
            .map_err(|e| err(e.to_string()))?;
        let year_of = |x: &f64| {
            // Only whole versions get a label: plotters may ask for fractional positions.
            if (x - x.round()).abs() > 1e-6 {
                return String::new();
            }
            let version = x.round() as i64;
            years
                .iter()
                .find(|(v, _)| *v == version)
                .map_or_else(String::new, |(v, y)| match y {
                    Some(y) => format!("v{v}·{y}"),
                    None => format!("v{v}"),
                })
        };
        let n_labels = ((last - first + 1.0) as usize).clamp(1, labels_that_fit(WIDTH, 10));
        chart
            .configure_mesh()
            .x_labels(n_labels)
            .x_label_formatter(&year_of)
            // The 1-2-5 key points above, and no minor lines: plotters' own log ticks
            // crowd near each power of ten.
            .max_light_lines(0)
            .y_label_formatter(&|v| tick(*v))
            .x_desc("published version · data through year")
            .y_desc(sd_axis)
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
            .y_label_formatter(&|v| tick(*v))
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

/// How the site-effect axis reads: additive in response units, or (log series) as the
/// multiplicative factor `exp(effect)` relative to the network median.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EffectScale {
    Additive,
    Factor,
}

/// (c) Site effects ranked by their median, with 90% intervals. `shown` are the effects
/// to draw, lowest median first; `gap_after` marks where sites were left out (drawn as a
/// dashed rule). On a log series the effects are drawn as `exp(effect)` on a log axis.
pub fn site_effects(
    shown: &[SiteEffect],
    gap_after: Option<usize>,
    scale: EffectScale,
    units: &str,
) -> Result<String, ReportError> {
    let err = chart_error("site effects");
    let n = shown.len().max(1);
    let factor = scale == EffectScale::Factor;
    let on_axis = |v: f64| if factor { v.exp() } else { v };
    let neutral = on_axis(0.0);
    let (lo, hi) = shown
        .iter()
        .flat_map(|e| [e.q05, e.q50, e.q95])
        .flatten()
        .map(on_axis)
        .filter(|v| v.is_finite())
        .fold((neutral, neutral), |(lo, hi), v| (lo.min(v), hi.max(v)));
    let height = (90 + 15 * n as u32).max(220);
    // Control characters are invalid in SVG text: codes are drawn with visible escapes.
    let codes: Vec<String> = shown
        .iter()
        .map(|e| visible(&e.site).into_owned())
        .collect();
    let longest = codes.iter().map(|c| c.chars().count()).max().unwrap_or(4);
    // The naive text metrics of plotters: about 0.55 em per character at 12 px.
    let label_area = (longest as u32 * 7 + 16).clamp(60, 260);
    let x_desc = if factor {
        "site factor: exp(site effect) = multiple of the network median (response scale, log axis)"
            .to_string()
    } else {
        format!("site effect ({units}; 0 = network mean)")
    };
    let y_range = -0.6..(n as f64 - 0.4);
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
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (WIDTH, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(e.to_string()))?;
        let caption = (
            "Site effects, latest version: median and 90% interval, ranked",
            ("sans-serif", 18),
        );
        // The two axis kinds are different types in plotters, so the drawing is generic.
        macro_rules! draw {
            ($x_range:expr, $x0:expr, $x1:expr) => {{
                let mut chart = ChartBuilder::on(&root)
                    .caption(caption.0, caption.1)
                    .margin(12)
                    .x_label_area_size(44)
                    .y_label_area_size(label_area)
                    .build_cartesian_2d($x_range, y_range.clone())
                    .map_err(|e| err(e.to_string()))?;
                chart
                    .configure_mesh()
                    .disable_y_mesh()
                    .y_labels(n * 2 + 1)
                    .y_label_formatter(&code_of)
                    .y_label_style(("sans-serif", 12))
                    .x_labels(10)
                    .x_label_formatter(&|v| tick(*v))
                    .x_desc(x_desc.as_str())
                    .light_line_style(RGBColor(235, 235, 235))
                    .draw()
                    .map_err(|e| err(e.to_string()))?;
                chart
                    .draw_series(std::iter::once(PathElement::new(
                        vec![(neutral, y_range.start), (neutral, y_range.end)],
                        RGBColor(120, 120, 120).stroke_width(1),
                    )))
                    .map_err(|e| err(e.to_string()))?;
                if let Some(g) = gap_after {
                    let y = g as f64 + 0.5;
                    let (x0, x1): (f64, f64) = ($x0, $x1);
                    let dashes = 60;
                    chart
                        .draw_series((0..dashes).step_by(2).map(|k| {
                            let t = |k: usize| k as f64 / dashes as f64;
                            let (a, b) = if factor {
                                (x0 * (x1 / x0).powf(t(k)), x0 * (x1 / x0).powf(t(k + 1)))
                            } else {
                                (x0 + (x1 - x0) * t(k), x0 + (x1 - x0) * t(k + 1))
                            };
                            PathElement::new(
                                vec![(a, y), (b, y)],
                                RGBColor(90, 90, 90).stroke_width(1),
                            )
                        }))
                        .map_err(|e| err(e.to_string()))?;
                }
                let colour = PALETTE[0];
                for (i, e) in shown.iter().enumerate() {
                    let Some(m) = e.q50 else { continue };
                    let y = i as f64;
                    chart
                        .draw_series(std::iter::once(PathElement::new(
                            vec![
                                (on_axis(e.q05.unwrap_or(m)), y),
                                (on_axis(e.q95.unwrap_or(m)), y),
                            ],
                            colour.stroke_width(2),
                        )))
                        .map_err(|e| err(e.to_string()))?;
                    chart
                        .draw_series(std::iter::once(Circle::new(
                            (on_axis(m), y),
                            3,
                            colour.filled(),
                        )))
                        .map_err(|e| err(e.to_string()))?;
                }
            }};
        }
        if factor {
            let r = log_padded(lo, hi);
            let (x0, x1) = (r.start, r.end);
            let ticks = log_ticks(&r);
            draw!(r.log_scale().with_key_points(ticks), x0, x1);
        } else {
            let r = padded(lo, hi);
            let (x0, x1) = (r.start, r.end);
            draw!(r, x0, x1);
        }
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(inline(svg))
}

/// One site's small chart: its observed values by year (every visit, a dot each) and
/// the forecast for next year as the 80% band (q10–q90) with the median.
pub struct SitePanel<'a> {
    pub site: &'a str,
    pub observed: &'a [(i64, f64)],
    /// `(year, q10, q50, q90)` of the known-site next-year forecast.
    pub band: Option<(i64, f64, f64, f64)>,
}

/// Width and height of a site's small chart.
pub const PANEL_SIZE: (u32, u32) = (320, 220);

/// (d) A small multiple: one site, response scale (log axis for a log series).
pub fn site_panel(p: &SitePanel<'_>, log_axis: bool, units: &str) -> Result<String, ReportError> {
    let err = chart_error("site panel");
    let mut years: Vec<i64> = p.observed.iter().map(|(y, _)| *y).collect();
    let mut values: Vec<f64> = p.observed.iter().map(|(_, v)| *v).collect();
    if let Some((y, lo, m, hi)) = p.band {
        years.push(y);
        values.extend([lo, m, hi]);
    }
    let values: Vec<f64> = values
        .into_iter()
        .filter(|v| v.is_finite() && (!log_axis || *v > 0.0))
        .collect();
    let (lo, hi) = values
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    let first = years.iter().min().copied().unwrap_or(0) as f64;
    let last = years.iter().max().copied().unwrap_or(1) as f64;
    let x_range = (first - 0.7)..(last + 0.7);
    let span = (last - first) as usize + 1;
    // Years as whole numbers only, at most five labels across a small chart.
    let step = span.div_ceil(5).max(1);
    let year_label = move |x: &f64| {
        let r = x.round();
        if (x - r).abs() > 1e-6 || (r as i64 - first as i64) % step as i64 != 0 {
            String::new()
        } else {
            format!("{r:.0}")
        }
    };
    let y_desc = if log_axis {
        format!("{units}, log axis")
    } else {
        units.to_string()
    };
    let site = visible(p.site);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, PANEL_SIZE).into_drawing_area();
        root.fill(&WHITE).map_err(|e| err(e.to_string()))?;
        macro_rules! draw {
            ($y_range:expr) => {{
                let mut chart = ChartBuilder::on(&root)
                    .caption(site.as_ref(), ("sans-serif", 14))
                    .margin(8)
                    .x_label_area_size(26)
                    .y_label_area_size(58)
                    .build_cartesian_2d(x_range.clone(), $y_range)
                    .map_err(|e| err(e.to_string()))?;
                chart
                    .configure_mesh()
                    .x_labels(span.min(12) * 2 + 1)
                    .x_label_formatter(&year_label)
                    .y_labels(5)
                    .y_label_formatter(&|v| tick(*v))
                    .y_desc(y_desc.as_str())
                    .label_style(("sans-serif", 11))
                    .axis_desc_style(("sans-serif", 11))
                    .light_line_style(RGBColor(240, 240, 240))
                    .draw()
                    .map_err(|e| err(e.to_string()))?;
                if let Some((y, q10, q50, q90)) = p.band {
                    let x = y as f64;
                    chart
                        .draw_series(std::iter::once(Rectangle::new(
                            [(x - 0.3, q10), (x + 0.3, q90)],
                            PALETTE[1].mix(0.3).filled(),
                        )))
                        .map_err(|e| err(e.to_string()))?;
                    chart
                        .draw_series(std::iter::once(PathElement::new(
                            vec![(x - 0.3, q50), (x + 0.3, q50)],
                            PALETTE[1].stroke_width(2),
                        )))
                        .map_err(|e| err(e.to_string()))?;
                }
                chart
                    .draw_series(
                        p.observed
                            .iter()
                            .filter(|(_, v)| v.is_finite() && (!log_axis || *v > 0.0))
                            .map(|&(y, v)| Circle::new((y as f64, v), 2, PALETTE[0].filled())),
                    )
                    .map_err(|e| err(e.to_string()))?;
            }};
        }
        if log_axis {
            let r = log_padded(lo, hi);
            let ticks = log_ticks(&r);
            draw!(r.log_scale().with_key_points(ticks));
        } else {
            draw!(padded(lo, hi));
        }
        root.present().map_err(|e| err(e.to_string()))?;
    }
    Ok(inline(svg))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_ticks_step_one_two_five_and_stay_few() {
        assert_eq!(log_ticks(&(0.15..6.0)), [0.2, 0.5, 1.0, 2.0, 5.0]);
        assert_eq!(log_ticks(&(0.05..2000.0)), [0.1, 1.0, 10.0, 100.0, 1000.0]);
        assert_eq!(log_ticks(&(1.1..2.6)), [1.5, 2.0]);
        assert!(log_ticks(&(0.8..1.3)).contains(&1.0));
    }

    #[test]
    fn ticks_are_short_and_exact_enough() {
        assert_eq!(tick(0.1 + 0.2), "0.3");
        assert_eq!(tick(2.0), "2");
        assert_eq!(tick(1234.5678), "1235");
        assert_eq!(tick(0.012345), "0.01235");
        assert_eq!(tick(-0.5), "-0.5");
        assert_eq!(tick(-1e-20), "-1.00e-20");
        assert_eq!(tick(0.0), "0");
        assert!(tick(123456.0).len() <= 8);
    }

    fn effects() -> Vec<SiteEffect> {
        [(-0.7, -0.5, -0.3), (0.1, 0.2, 0.3), (0.5, 0.69, 0.9)]
            .iter()
            .enumerate()
            .map(|(i, &(a, b, c))| SiteEffect {
                site: format!("L{i}"),
                q05: Some(a),
                q50: Some(b),
                q95: Some(c),
            })
            .collect()
    }

    #[test]
    fn log_series_effects_read_as_factors_of_the_median() {
        let svg = site_effects(&effects(), None, EffectScale::Factor, "mg/l").unwrap();
        assert!(svg.contains("multiple of the network median"), "{svg}");
        // exp(0.69) is about 2: the axis is in factors, not in log units.
        assert!(svg.contains(">\n2\n<"), "{svg}");
        let additive = site_effects(&effects(), Some(0), EffectScale::Additive, "tp").unwrap();
        assert!(additive.contains("0 = network mean") && additive.contains("tp"));
        assert!(!additive.contains("multiple of"));
    }
}
