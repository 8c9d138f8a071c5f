//! Simulation-based calibration (Talts et al. 2018): the ranks of prior-drawn true values
//! among posterior draws are uniform when the sampler is exact. The default suite runs a
//! fast subset; the full study (>= 500 replicates) runs on request:
//! `cargo test -p tidemark-model --release --test sbc -- --ignored --nocapture`
//! and writes its rank histograms (text and an SVG chart) to `target/sbc/` (or
//! `$TIDEMARK_REPORT_DIR`).

use tidemark_model::sbc::{rank_uniformity, sbc_replicate, SbcSpec, SBC_QUANTITIES};
use tidemark_model::{Censoring, ModelError};

/// `f(0..n)` on one plain thread per core, in order. Not rayon: each replicate's `sample`
/// runs its chains on a pool of its own, and a rayon worker waiting for another pool
/// keeps taking replicates meanwhile, nesting them on its stack until it overflows.
fn parallel_map<T: Send>(n: usize, f: impl Fn(usize) -> T + Sync) -> Vec<T> {
    let next = std::sync::atomic::AtomicUsize::new(0);
    let workers = std::thread::available_parallelism().map_or(1, |w| w.get());
    let mut out: Vec<(usize, T)> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..workers)
            .map(|_| {
                scope.spawn(|| {
                    let mut mine = Vec::new();
                    loop {
                        let i = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        if i >= n {
                            return mine;
                        }
                        mine.push((i, f(i)));
                    }
                })
            })
            .collect();
        handles
            .into_iter()
            .flat_map(|h| h.join().expect("a replicate panicked"))
            .collect()
    });
    out.sort_by_key(|(i, _)| *i);
    out.into_iter().map(|(_, t)| t).collect()
}

fn study(replicates: usize, first_seed: u64) -> Vec<Vec<usize>> {
    let spec = SbcSpec::default();
    parallel_map(replicates, |r| {
        sbc_replicate(&spec, first_seed + r as u64)
            .expect("replicate fits")
            .ranks
    })
}

/// A study with values censored at a fixed limit: the ranks, and the share of values
/// censored over all replicates. A replicate whose data a guard refuses (every value
/// censored at the one limit is a constant response) is left out; that choice depends
/// on the data alone, so the ranks of the rest stay uniform.
///
/// `draws` per chain: the augmented chain mixes more slowly the more values are censored
/// (the residual sd and the censored values move together), and ranks among strongly
/// autocorrelated draws pile up at both ends even for an exact sampler (Talts et al.
/// 2018, section 5: thin to near-independent draws). At half the values censored, 500
/// draws thinned to 99 gave a U-shaped histogram of the residual sd over 500 replicates
/// (chi-square 68 on 19 df), 4000 thinned to 99 a uniform one (25.5, p = 0.14).
fn censored_study(
    (side, limit): (Censoring, f64),
    draws: usize,
    replicates: usize,
    first_seed: u64,
) -> (Vec<Vec<usize>>, f64) {
    let defaults = SbcSpec::default();
    let spec = SbcSpec {
        censor: Some((side, limit)),
        settings: tidemark_model::SamplerSettings {
            draws,
            ..defaults.settings.clone()
        },
        ..defaults
    };
    let fits: Vec<_> = parallel_map(replicates, |r| {
        match sbc_replicate(&spec, first_seed + r as u64) {
            Ok(rep) => Some(rep),
            Err(ModelError::ConstantResponse { .. }) => None,
            Err(e) => panic!("replicate {r}: {e}"),
        }
    })
    .into_iter()
    .flatten()
    .collect();
    assert!(
        fits.len() * 10 >= replicates * 9,
        "{} of {replicates} fitted",
        fits.len()
    );
    let censored: usize = fits.iter().map(|f| f.censored).sum();
    let observations: usize = fits.iter().map(|f| f.observations).sum();
    let ranks = fits.into_iter().map(|f| f.ranks).collect();
    (ranks, censored as f64 / observations as f64)
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

/// Limits for about 20% and 50% of values left-censored: the prior predictive of a value
/// has mean 1 and sd about 1.3 (intercept N(1, 1), three sds half-normal(0.5)).
const LIMIT_20: f64 = -0.1;
const LIMIT_50: f64 = 1.0;

#[test]
fn sbc_with_a_fifth_of_values_censored_ranks_are_uniform() {
    let (all, share) = censored_study((Censoring::Below, LIMIT_20), 500, 100, 501);
    assert!((0.12..0.3).contains(&share), "censored share {share}");
    let (text, min_p) = report(&all, SbcSpec::default().kept, 5);
    assert!(min_p > 0.001, "censored share {share:.2}\n{text}");
}

#[test]
fn sbc_with_half_of_values_censored_ranks_are_uniform() {
    let (all, share) = censored_study((Censoring::Below, LIMIT_50), 4000, 100, 701);
    assert!((0.4..0.6).contains(&share), "censored share {share}");
    let (text, min_p) = report(&all, SbcSpec::default().kept, 5);
    assert!(min_p > 0.001, "censored share {share:.2}\n{text}");
}

#[test]
#[ignore = "full SBC study with censored values: run on request"]
fn sbc_full_study_with_censored_values() {
    let replicates = std::env::var("TIDEMARK_SBC_REPLICATES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(500);
    for (censor, draws, name) in [
        ((Censoring::Below, LIMIT_20), 500, "below, about 20%"),
        ((Censoring::Below, LIMIT_50), 4000, "below, about 50%"),
        ((Censoring::Above, 2.2), 500, "above, about 20%"),
    ] {
        let (all, share) = censored_study(censor, draws, replicates, 20_000);
        let (text, min_p) = report(&all, SbcSpec::default().kept, 20);
        println!(
            "censored {name}: share {share:.3}, {} replicates\n{text}",
            all.len()
        );
        assert!(min_p > 0.001, "{name}\n{text}");
    }
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
