//! Benchmark B4: B3 (20,000 sites x 25 years x 2 visits, 60% of site-years observed) plus
//! an observer factor (`simulate::observer_data`), fitted with the default
//! sampler; the reduced system goes sparse by itself (`NormalEquations::Auto`).
//! Figures in docs/benchmarks.md.
//!
//! `cargo bench -p tidemark-model --bench observers -- [LEVELS] [random] [dense]`: 3,000
//! observer levels in moving blocks by default; `random` assigns each (block, period) an
//! observer at random; `dense` or `sparse` forces that reduced system (for comparison;
//! dense only for small level counts); `short` runs 2 chains x 100 draws for a
//! per-evaluation figure only. Run one per process for a clean peak-memory figure.

use std::time::Instant;
use tidemark_model::simulate::{observer_data, NetworkSpec, ObserverAssignment, ObserverSpec};
use tidemark_model::*;

mod common;
use common::peak_rss_mib;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let levels = args
        .iter()
        .find_map(|a| a.parse::<usize>().ok())
        .unwrap_or(3000);
    let random = args.iter().any(|a| a == "random");
    let dense = args.iter().any(|a| a == "dense");
    let sparse = args.iter().any(|a| a == "sparse");
    let short = args.iter().any(|a| a == "short");
    let spec = NetworkSpec {
        sites: 20_000,
        years: 25,
        missing: 0.4,
        ..Default::default()
    };
    let observers = ObserverSpec {
        levels,
        period_years: 5,
        sd: 0.3,
        assignment: if random {
            ObserverAssignment::Random
        } else {
            ObserverAssignment::Blocks
        },
    };
    let t0 = Instant::now();
    let data = observer_data(&spec, &observers).unwrap();
    println!(
        "B4: {} sites x {} years, {} observations, {} observers ({}), data set built in {:.2} s",
        data.n_sites(),
        data.n_years(),
        data.n_obs(),
        data.group_labels()[0].len(),
        if random {
            "random blocks"
        } else {
            "moving blocks"
        },
        t0.elapsed().as_secs_f64()
    );
    let settings = SamplerSettings {
        normal_equations: if dense {
            NormalEquations::Dense
        } else if sparse {
            NormalEquations::Sparse
        } else {
            NormalEquations::Auto
        },
        // `short`: 2 chains x 100 draws after 100 warm-up iterations, for a per-evaluation
        // figure where a full fit would take hours (random observers at 3,000 levels).
        chains: if short { 2 } else { 4 },
        draws: if short { 100 } else { 1000 },
        warmup: if short { 100 } else { 500 },
        ..Default::default()
    };
    // The estimate plans the sparse pattern (order and symbolic factorisation) once more
    // than the fit does: its time is part of every refit's start.
    let t0 = Instant::now();
    let estimate = memory_estimate(&data, &settings);
    println!(
        "memory estimate: {:.0} MiB (computed in {:.2} s)",
        estimate as f64 / (1 << 20) as f64,
        t0.elapsed().as_secs_f64()
    );
    let t0 = Instant::now();
    let post = sample(
        &data,
        &Priors::default(),
        &settings,
        None,
        Controls::default(),
    )
    .unwrap();
    let secs = t0.elapsed().as_secs_f64();
    let d = &post.diagnostics;
    let evaluations = settings.chains * (d.warmup + settings.draws * settings.steps_per_draw);
    let workers = std::thread::available_parallelism().map_or(1, |n| n.get());
    println!(
        "B4 cold fit: {secs:.2} s, max R-hat {:.4}, min bulk-ESS {:.0}, min tail-ESS {:.0}, warm-up {}, {:.2} ms per evaluation per core ({evaluations} evaluations on {workers} cores)",
        d.max_rhat,
        d.min_ess_bulk,
        d.min_ess_tail,
        d.warmup,
        1e3 * secs * workers.min(settings.chains) as f64 / evaluations as f64
    );
    for name in &post.sd_names {
        if let Some(s) = post.summary(SummaryKind::Sd, name, None) {
            println!(
                "  sd {name}: median {:.4} (90% {:.4} to {:.4})",
                s.q50, s.q05, s.q95
            );
        }
    }
    println!("B4 peak memory: {:.0} MiB", peak_rss_mib());
    if !short {
        assert!(d.max_rhat < 1.01, "the fit must pass the gate");
    }
}
