//! The warm-start matrix (issue 10; figures in docs/benchmarks.md): models with 3, 4, 5
//! and 6 variance components, refitted after (a) one typical new year, (b) a new year 4
//! sds out, (c) 10% new sites, (d) 5% of values corrected, 8 seeds each. Per cell: how
//! often the warm start passes the service's default gate on its first attempt, and the
//! warm/cold cost ratio (wall-clock of the warm fit over a cold fit of the same data).
//! Then a x1000 unit change per model, which must be refused before any chain runs.
//!
//! `cargo bench -p tidemark-model --bench warm_starts -- [components...] [--seeds N]`
//! (all of 3 4 5 6 and 8 seeds when none is given). The network is B1's shape (200 sites x
//! 20 years x 2 visits, 15% missing, 2 covariates) with 0–3 further factors
//! (`refits::groups_for`); the model's default sampler (4 chains x 1000 draws, warm-up 500
//! cold, 150 warm).

use std::time::Instant;
use tidemark_model::refits::{refit, Change};
use tidemark_model::simulate::NetworkSpec;
use tidemark_model::*;

const MAX_RHAT: f64 = 1.01;
const MIN_ESS: f64 = 400.0;

fn settings(seed: u64) -> SamplerSettings {
    SamplerSettings {
        seed,
        ..Default::default()
    }
}

fn timed(data: &Data, seed: u64, warm: Option<&WarmStart>) -> (Result<Posterior, ModelError>, f64) {
    let t0 = Instant::now();
    let post = sample(
        data,
        &Priors::default(),
        &settings(seed),
        warm,
        Controls::default(),
    );
    (post, t0.elapsed().as_secs_f64())
}

fn passes(d: &FitDiagnostics) -> bool {
    d.max_rhat <= MAX_RHAT && d.min_ess_bulk >= MIN_ESS && d.min_ess_tail >= MIN_ESS
}

/// One cell of the matrix.
#[derive(Default)]
struct Cell {
    passed: usize,
    runs: usize,
    cold_passed: usize,
    warm_secs: f64,
    cold_secs: f64,
    worst_rhat: f64,
    worst_ess: f64,
    max_distance: f64,
    notes: Vec<String>,
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let seeds: u64 = args
        .iter()
        .position(|a| a == "--seeds")
        .and_then(|i| args.get(i + 1))
        .and_then(|v| v.parse().ok())
        .unwrap_or(8);
    let mut components: Vec<usize> = args
        .iter()
        .filter_map(|a| a.parse().ok())
        .filter(|c| (3..=6).contains(c))
        .collect();
    if components.is_empty() {
        components = vec![3, 4, 5, 6];
    }
    println!(
        "Warm-start matrix: 200 sites x 20 years (+1 year / +10% sites), {seeds} seeds, gate max R-hat {MAX_RHAT}, min ESS {MIN_ESS}"
    );
    println!("| components | change | first-attempt passes | cold passes | warm/cold time | worst warm R-hat | worst warm ESS | max distance |");
    println!("|---|---|---|---|---|---|---|---|");
    let (mut total_pass, mut total_runs, mut worst_cell) = (0, 0, usize::MAX);
    let mut all_notes = Vec::new();
    for &m in &components {
        let mut cells: Vec<Cell> = Change::MATRIX.iter().map(|_| Cell::default()).collect();
        for seed in 1..=seeds {
            let spec = NetworkSpec {
                seed,
                ..Default::default()
            };
            let base = refit(&spec, m, Change::Identical).expect("generated data are valid");
            let (previous, _) = timed(&base.before, seed, None);
            let previous = previous.expect("the previous version fits");
            for (cell, &change) in cells.iter_mut().zip(Change::MATRIX.iter()) {
                let data = refit(&spec, m, change)
                    .expect("generated data are valid")
                    .after;
                let check = check_warm_start(
                    &data,
                    &Priors::default(),
                    &settings(seed + 100),
                    &previous.warm_start,
                );
                let (warm, warm_secs) = timed(&data, seed + 100, Some(&previous.warm_start));
                let (cold, cold_secs) = timed(&data, seed + 100, None);
                cell.runs += 1;
                cell.cold_passed += cold.as_ref().is_ok_and(|c| passes(&c.diagnostics)) as usize;
                cell.cold_secs += cold_secs;
                cell.warm_secs += warm_secs;
                if let Ok(plan) = &check {
                    cell.max_distance = cell.max_distance.max(plan.distance);
                }
                match warm {
                    Ok(w) => {
                        let d = &w.diagnostics;
                        cell.worst_rhat = cell.worst_rhat.max(d.max_rhat);
                        let ess = d.min_ess_bulk.min(d.min_ess_tail);
                        cell.worst_ess = if cell.runs == 1 {
                            ess
                        } else {
                            cell.worst_ess.min(ess)
                        };
                        if passes(d) {
                            cell.passed += 1;
                        } else {
                            cell.notes.push(format!(
                                "{m} components, {}, seed {seed}: max R-hat {:.4}, min bulk-ESS {:.0}, min tail-ESS {:.0}",
                                change.label(),
                                d.max_rhat,
                                d.min_ess_bulk,
                                d.min_ess_tail
                            ));
                        }
                    }
                    Err(e) => cell.notes.push(format!(
                        "{m} components, {}, seed {seed}: {e}",
                        change.label()
                    )),
                }
            }
        }
        for (cell, change) in cells.iter().zip(Change::MATRIX.iter()) {
            println!(
                "| {m} | {} | {}/{} | {}/{} | {:.0}% | {:.4} | {:.0} | {:.2} |",
                change.label(),
                cell.passed,
                cell.runs,
                cell.cold_passed,
                cell.runs,
                100.0 * cell.warm_secs / cell.cold_secs,
                cell.worst_rhat,
                cell.worst_ess,
                cell.max_distance
            );
            total_pass += cell.passed;
            total_runs += cell.runs;
            worst_cell = worst_cell.min(cell.passed);
            all_notes.extend(cell.notes.iter().cloned());
        }
    }
    println!(
        "overall: {total_pass}/{total_runs} warm starts passed on their first attempt ({:.1}%), worst cell {worst_cell}/{seeds}",
        100.0 * total_pass as f64 / total_runs.max(1) as f64
    );
    for note in &all_notes {
        println!("  failed: {note}");
    }
    // A x1000 unit change must be refused before sampling.
    for &m in &components {
        let spec = NetworkSpec::default();
        let unit = refit(&spec, m, Change::UnitChange).expect("generated data are valid");
        let (previous, _) = timed(&unit.before, 1, None);
        let previous = previous.expect("the previous version fits");
        let t0 = Instant::now();
        let outcome = sample(
            &unit.after,
            &Priors::default(),
            &settings(101),
            Some(&previous.warm_start),
            Controls::default(),
        );
        let secs = t0.elapsed().as_secs_f64();
        match outcome {
            Err(ModelError::WarmStartRefused { distance, .. }) => println!(
                "x1000 unit change, {m} components: refused in {:.3} s, distance {distance:.0} (threshold {:.1})",
                secs,
                conflict_threshold(m)
            ),
            Err(e) => println!("x1000 unit change, {m} components: error {e}"),
            Ok(p) => println!(
                "x1000 unit change, {m} components: NOT refused (warm fit, max R-hat {:.4})",
                p.diagnostics.max_rhat
            ),
        }
    }
}
