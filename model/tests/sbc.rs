//! Simulation-based calibration (Talts et al. 2018): the ranks of prior-drawn true values
//! among posterior draws are uniform when the sampler is exact. The default suite runs a
//! fast subset; the full study (>= 500 replicates) runs on request:
//! `cargo test -p tidemark-model --release --test sbc -- --ignored --nocapture`
//! and writes its rank histograms (text and an SVG chart) to `target/sbc/` (or
//! `$TIDEMARK_REPORT_DIR`).

use rayon::prelude::*;
use tidemark_model::sbc::{rank_uniformity, sbc_replicate, SbcSpec, SBC_QUANTITIES};

fn study(replicates: usize, first_seed: u64) -> Vec<Vec<usize>> {
    let spec = SbcSpec::default();
    (0..replicates as u64)
        .into_par_iter()
        .map(|r| sbc_replicate(&spec, first_seed + r).expect("replicate fits"))
        .collect()
}

/// Rank histograms as one SVG file: a panel per quantity, the expected count as a line.
fn histogram_svg(all: &[Vec<usize>], kept: usize, bins: usize, path: &str) {
    use plotters::prelude::*;
    let root = SVGBackend::new(path, (1000, 260 * SBC_QUANTITIES.len() as u32)).into_drawing_area();
    root.fill(&WHITE).unwrap();
    let panels = root.split_evenly((SBC_QUANTITIES.len(), 1));
    let expected = all.len() as f64 / bins as f64;
    for (q, (name, panel)) in SBC_QUANTITIES.iter().zip(panels.iter()).enumerate() {
        let ranks: Vec<usize> = all.iter().map(|r| r[q]).collect();
        let (counts, stat, p) = rank_uniformity(&ranks, kept, bins);
        let top = counts.iter().copied().max().unwrap_or(1) as f64 * 1.25;
        let mut chart = ChartBuilder::on(panel)
            .caption(
                format!(
                    "{name}: chi-square {stat:.1} on {} df, p = {p:.3}",
                    bins - 1
                ),
                ("sans-serif", 18),
            )
            .margin(10)
            .x_label_area_size(30)
            .y_label_area_size(50)
            .build_cartesian_2d(0.0..bins as f64, 0.0..top)
            .unwrap();
        chart
            .configure_mesh()
            .x_desc("rank bin")
            .y_desc("replicates")
            .draw()
            .unwrap();
        chart
            .draw_series(counts.iter().enumerate().map(|(b, &c)| {
                Rectangle::new(
                    [(b as f64 + 0.05, 0.0), (b as f64 + 0.95, c as f64)],
                    RGBColor(0, 114, 178).filled(),
                )
            }))
            .unwrap();
        chart
            .draw_series(LineSeries::new(
                [(0.0, expected), (bins as f64, expected)],
                RGBColor(213, 94, 0).stroke_width(2),
            ))
            .unwrap();
    }
    root.present().unwrap();
}

fn report(all: &[Vec<usize>], kept: usize, bins: usize) -> (String, f64) {
    let mut text = String::new();
    let mut min_p = 1.0f64;
    for (q, name) in SBC_QUANTITIES.iter().enumerate() {
        let ranks: Vec<usize> = all.iter().map(|r| r[q]).collect();
        let (counts, stat, p) = rank_uniformity(&ranks, kept, bins);
        min_p = min_p.min(p);
        text.push_str(&format!(
            "{name:<12} chi2 = {stat:7.2} (df {}), p = {p:.4}\n",
            bins - 1
        ));
        let max = *counts.iter().max().unwrap_or(&1) as f64;
        for (b, c) in counts.iter().enumerate() {
            let bar = "#".repeat((40.0 * *c as f64 / max).round() as usize);
            text.push_str(&format!("  bin {b:2} {c:5} {bar}\n"));
        }
    }
    (text, min_p)
}

#[test]
fn sbc_fast_subset_ranks_are_uniform() {
    let all = study(100, 1);
    let (text, min_p) = report(&all, SbcSpec::default().kept, 5);
    // Five tests on fixed seeds: a p-value below 0.001 would flag a miscalibrated sampler.
    assert!(min_p > 0.001, "{text}");
}

#[test]
#[ignore = "full SBC study: run on request"]
fn sbc_full_study() {
    let replicates = std::env::var("TIDEMARK_SBC_REPLICATES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(500);
    let all = study(replicates, 10_000);
    let (text, min_p) = report(&all, SbcSpec::default().kept, 20);
    let dir = std::env::var("TIDEMARK_REPORT_DIR")
        .unwrap_or_else(|_| format!("{}/../target/sbc", env!("CARGO_MANIFEST_DIR")));
    std::fs::create_dir_all(&dir).unwrap();
    let path = format!("{dir}/sbc_ranks.txt");
    std::fs::write(
        &path,
        format!("SBC, {replicates} replicates, 20 bins\n{text}"),
    )
    .unwrap();
    let svg = format!("{dir}/sbc_ranks.svg");
    histogram_svg(&all, SbcSpec::default().kept, 20, &svg);
    println!("{text}\nwritten to {path} and {svg}");
    assert!(min_p > 0.001, "{text}");
}
