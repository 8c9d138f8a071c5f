use std::time::Instant;
use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;
fn main() {
    let sites: usize = std::env::args()
        .nth(1)
        .map(|s| s.parse().unwrap())
        .unwrap_or(200);
    let years: usize = std::env::args()
        .nth(2)
        .map(|s| s.parse().unwrap())
        .unwrap_or(20);
    let missing: f64 = std::env::args()
        .nth(3)
        .map(|s| s.parse().unwrap())
        .unwrap_or(0.15);
    let spec = NetworkSpec {
        sites,
        years,
        missing,
        ..Default::default()
    };
    let t0 = Instant::now();
    let (data, _) = simulate(&spec);
    println!("n_obs {} sim {:?}", data.n_obs(), t0.elapsed());
    let t0 = Instant::now();
    let r = fit_point(&data, Method::Reml).unwrap();
    println!("reml {:?} {:?}", t0.elapsed(), r.sd);
    let t0 = Instant::now();
    let post = sample(
        &data,
        &Priors::default(),
        &SamplerSettings::default(),
        None,
        Controls::default(),
    )
    .unwrap();
    let el = t0.elapsed();
    println!("sample {:?} {:?}", el, post.diagnostics);
    for s in post
        .summaries
        .iter()
        .filter(|s| s.kind != SummaryKind::Effect)
    {
        println!(
            "{:?} {} mean {:.4} q05 {:.4} q95 {:.4} rhat {:.4} bulk {:.0} tail {:.0}",
            s.kind, s.term, s.mean, s.q05, s.q95, s.rhat, s.ess_bulk, s.ess_tail
        );
    }
    println!(
        "min ess/s {:.0}",
        post.diagnostics
            .min_ess_bulk
            .min(post.diagnostics.min_ess_tail)
            / el.as_secs_f64()
    );
    let t0 = Instant::now();
    let post2 = sample(
        &data,
        &Priors::default(),
        &SamplerSettings::default(),
        Some(&post.warm_start),
        Controls::default(),
    )
    .unwrap();
    println!("warm {:?} {:?}", t0.elapsed(), post2.diagnostics);
}
