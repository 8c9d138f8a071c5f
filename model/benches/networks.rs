//! Benchmarks of the model engine on generated networks B1–B3 (docs/architecture.md,
//! "Contracts with outside readers"; figures in docs/benchmarks.md).
//!
//! `cargo bench -p tidemark-model --bench networks -- [b1] [b2] [b3] [reml] [b1c] [b3c] [b1t]`
//! (the first four when none is named; `b1c` and `b3c` are B1 and B3 with 20% of the
//! values left-censored, `b1t` is B1 with a network trend). Figures are wall-clock on this machine; peak memory is the process's
//! high-water mark (run one benchmark per process for a clean figure).

use std::time::Instant;
use tidemark_model::simulate::{self, simulate, simulate_rows, site_label, NetworkSpec};
use tidemark_model::*;

mod common;
use common::peak_rss_mib;

fn fit(data: &Data, warm: Option<&WarmStart>) -> (Posterior, f64) {
    let t0 = Instant::now();
    let post = sample(
        data,
        &Priors::default(),
        &SamplerSettings::default(),
        warm,
        Controls::default(),
    )
    .unwrap();
    (post, t0.elapsed().as_secs_f64())
}

fn describe(label: &str, post: &Posterior, secs: f64) {
    let d = &post.diagnostics;
    let min_ess = d.min_ess_bulk.min(d.min_ess_tail);
    println!(
        "{label}: {:.3} s, max R-hat {:.4}, min bulk-ESS {:.0}, min tail-ESS {:.0}, ESS/draw {:.2}, ESS/s {:.0}, acceptance {:.2}, warm-up {}",
        secs,
        d.max_rhat,
        d.min_ess_bulk,
        d.min_ess_tail,
        min_ess / (post.chains * post.draws) as f64,
        min_ess / secs,
        d.acceptance_rate,
        d.warmup
    );
}

/// B1 is the default network: 200 sites x 20 years x 2 visits, 15% missing, 2 covariates.
fn b1_spec() -> NetworkSpec {
    NetworkSpec::default()
}

fn b1() {
    let (data, _) = simulate(&b1_spec());
    println!(
        "B1: {} sites x {} years, {} observations, 4 chains x 1000 saved draws",
        data.n_sites(),
        data.n_years(),
        data.n_obs()
    );
    let (post, best) = best_of_five(&data);
    describe("B1 cold fit (best of 5)", &post, best);
}

/// A warming fit, then the fastest of five cold fits (and the last posterior).
fn best_of_five(data: &Data) -> (Posterior, f64) {
    let (mut last, _) = fit(data, None); // warms the caches and thread pool
    let mut best = f64::INFINITY;
    for _ in 0..5 {
        let (post, secs) = fit(data, None);
        best = best.min(secs);
        last = post;
    }
    (last, best)
}

/// The share of values left-censored in `b1c` and `b3c`, below the empirical quantile.
const CENSORED: f64 = 0.2;

fn b1c() {
    let (data, _) = simulate(&b1_spec());
    let (data, limit) = simulate::censor_share(&data, Censoring::Below, CENSORED);
    println!(
        "B1 with {} of {} values left-censored at {limit:.3}, 4 chains x 1000 saved draws",
        data.n_censored(),
        data.n_obs()
    );
    let (post, best) = best_of_five(&data);
    describe("B1, 20% censored, cold fit (best of 5)", &post, best);
}

fn b3c() {
    let spec = NetworkSpec {
        sites: 20_000,
        years: 25,
        missing: 0.4,
        ..Default::default()
    };
    let (data, _) = simulate(&spec);
    let (data, limit) = simulate::censor_share(&data, Censoring::Below, CENSORED);
    println!(
        "B3 with {} of {} values left-censored at {limit:.3}",
        data.n_censored(),
        data.n_obs()
    );
    let (post, secs) = fit(&data, None);
    describe("B3, 20% censored, cold fit", &post, secs);
    println!("B3 censored peak memory: {:.0} MiB", peak_rss_mib());
}

fn b1t() {
    let (rows, _) = simulate_rows(&b1_spec());
    let mut b = DataBuilder::new(vec!["x1".into(), "x2".into()], vec![]).with_trend(2000);
    for r in &rows {
        b.push(&site_label(r.site), r.year, &[], &r.covariates, r.y)
            .unwrap();
    }
    let data = b.build().unwrap();
    println!(
        "B1 with a network trend: {} observations, {} coefficients",
        data.n_obs(),
        1 + data.covariate_names().len()
    );
    let (post, best) = best_of_five(&data);
    describe("B1 with a trend, cold fit (best of 5)", &post, best);
}

fn reml() {
    let (data, _) = simulate(&b1_spec());
    let mut best = f64::INFINITY;
    for _ in 0..20 {
        let t0 = Instant::now();
        let f = fit_point(&data, Method::Reml).unwrap();
        best = best.min(t0.elapsed().as_secs_f64());
        assert!(f.converged);
    }
    println!("REML on B1: {:.1} ms (best of 20)", best * 1e3);
}

fn b2() {
    println!("B2: 25 years, 2 visits, 15% missing; sites doubling");
    let mut previous: Option<f64> = None;
    let max_sites: usize = std::env::var("TIDEMARK_B2_MAX_SITES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(64_000);
    let mut sites = 1000;
    while sites <= max_sites {
        let (data, _) = simulate(&NetworkSpec {
            sites,
            years: 25,
            ..Default::default()
        });
        let (post, secs) = fit(&data, None);
        let growth = previous.map_or(String::from("-"), |p| format!("{:.2}x", secs / p));
        println!(
            "  {sites:6} sites, {:8} obs: {secs:7.3} s (growth {growth}), max R-hat {:.4}, min ESS {:.0}",
            data.n_obs(),
            post.diagnostics.max_rhat,
            post.diagnostics.min_ess_bulk.min(post.diagnostics.min_ess_tail)
        );
        previous = Some(secs);
        sites *= 2;
    }
}

fn build(rows: &[tidemark_model::simulate::Row], through: i32) -> Data {
    let mut b = DataBuilder::new(vec!["x1".into(), "x2".into()], vec![]);
    for r in rows.iter().filter(|r| r.year <= through) {
        b.push(&site_label(r.site), r.year, &[], &r.covariates, r.y)
            .unwrap();
    }
    b.build().unwrap()
}

fn b3() {
    let spec = NetworkSpec {
        sites: 20_000,
        years: 26,
        missing: 0.4,
        ..Default::default()
    };
    let (rows, _) = simulate_rows(&spec);
    let last = spec.first_year + 25;
    let t0 = Instant::now();
    let before = build(&rows, last - 1);
    let build_secs = t0.elapsed().as_secs_f64();
    println!(
        "B3: {} sites x {} years, {} observations (data set built in {build_secs:.2} s)",
        before.n_sites(),
        before.n_years(),
        before.n_obs()
    );
    let (cold, secs) = fit(&before, None);
    describe("B3 cold fit, 25 years", &cold, secs);
    let after = build(&rows, last);
    let (warm, warm_secs) = fit(&after, Some(&cold.warm_start));
    describe("B3 warm refit after one more year", &warm, warm_secs);
    let (cold_after, cold_after_secs) = fit(&after, None);
    describe(
        "B3 cold fit of the same 26 years",
        &cold_after,
        cold_after_secs,
    );
    println!(
        "B3 warm / cold: {:.0}%",
        100.0 * warm_secs / cold_after_secs
    );
    println!("B3 peak memory: {:.0} MiB", peak_rss_mib());
}

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let all = args.is_empty();
    let wants = |name: &str| all || args.iter().any(|a| a == name);
    let named = |name: &str| args.iter().any(|a| a == name);
    if named("b1c") {
        b1c();
    }
    if named("b3c") {
        b3c();
    }
    if named("b1t") {
        b1t();
    }
    if wants("reml") {
        reml();
    }
    if wants("b1") {
        b1();
    }
    if wants("b3") {
        b3();
    }
    if wants("b2") {
        b2();
    }
}
