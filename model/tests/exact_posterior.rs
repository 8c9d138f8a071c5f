//! The sampler against the exact posterior of a small crossed design (30 sites x 8
//! years), computed offline by 3-D grid quadrature of the collapsed marginal posterior
//! (`tests/reference/quadrature_posterior.py`, numpy/scipy; no sampling involved). The
//! design is invented test data, stored in `tests/data/quadrature_design.csv`.

use serde_json::Value;
use tidemark_model::*;

fn reference() -> Value {
    let path = format!(
        "{}/tests/data/quadrature_posterior.json",
        env!("CARGO_MANIFEST_DIR")
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn design() -> Data {
    let path = format!(
        "{}/tests/data/quadrature_design.csv",
        env!("CARGO_MANIFEST_DIR")
    );
    let text = std::fs::read_to_string(path).unwrap();
    let mut b = DataBuilder::new(vec!["x".into()], vec![]);
    for line in text.lines().skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        b.push(
            f[0],
            f[1].parse().unwrap(),
            &[],
            &[f[2].parse().unwrap()],
            f[3].parse().unwrap(),
        )
        .unwrap();
    }
    b.build().unwrap()
}

#[test]
fn posterior_quantiles_match_grid_quadrature() {
    let r = reference();
    let data = design();
    let n = data.n_obs() as f64;
    // The reference standardises x with the ddof=1 sd, Tidemark with the population sd: the
    // same prior on the slope per population sd has its sd scaled by sqrt((n-1)/n).
    let priors = Priors {
        residual_sd: Some(SdPrior::HalfNormal { scale: 1.0 }),
        site_sd: Some(SdPrior::HalfNormal { scale: 1.0 }),
        year_sd: Some(SdPrior::HalfNormal { scale: 1.0 }),
        group_sd: None,
        intercept: Some(NormalPrior {
            mean: 0.0,
            sd: 10.0,
        }),
        coefficients: Some(NormalPrior {
            mean: 0.0,
            sd: 2.5 * ((n - 1.0) / n).sqrt(),
        }),
    };
    let settings = SamplerSettings {
        draws: 5000,
        effect_draws: 10,
        seed: 2024,
        ..Default::default()
    };
    let post = sample(&data, &priors, &settings, None, Controls::default()).unwrap();
    assert!(post.diagnostics.max_rhat < 1.01, "{:?}", post.diagnostics);

    let exact = &r["posterior"];
    for (k, name) in ["residual", "site", "year"].iter().enumerate() {
        let key = format!("sd_{name}");
        let draws: Vec<f64> = post.sd_chains(k).into_iter().flatten().collect();
        let summary = post.summary(SummaryKind::Sd, name, None).unwrap();
        let ess = summary.ess_bulk.min(summary.ess_tail);
        for (p_str, q) in exact[&key]["quantiles"].as_object().unwrap() {
            let p: f64 = p_str.parse().unwrap();
            let q = q.as_f64().unwrap();
            // Empirical CDF at the exact quantile: binomial Monte Carlo error.
            let f = draws.iter().filter(|&&d| d <= q).count() as f64 / draws.len() as f64;
            let mcse = (p * (1.0 - p) / ess).sqrt();
            assert!(
                (f - p).abs() < 4.0 * mcse,
                "sd {name}: F({q}) = {f}, expected {p} (mcse {mcse:.4})"
            );
        }
        let mean = exact[&key]["mean"].as_f64().unwrap();
        let sd = exact[&key]["sd"].as_f64().unwrap();
        let mcse = sd / summary.ess_bulk.sqrt();
        assert!(
            (summary.mean - mean).abs() < 4.0 * mcse,
            "sd {name}: mean {} vs {mean}",
            summary.mean
        );
    }
    for (term, key) in [("intercept", "intercept"), ("x", "coef_x")] {
        let s = post.summary(SummaryKind::Coef, term, None).unwrap();
        let mean = exact[key]["mean"].as_f64().unwrap();
        let sd = exact[key]["sd"].as_f64().unwrap();
        assert!(
            (s.mean - mean).abs() < 4.0 * sd / s.ess_bulk.sqrt(),
            "{term}: mean {} vs {mean}",
            s.mean
        );
        assert!(
            (s.sd / sd - 1.0).abs() < 0.05,
            "{term}: sd {} vs {sd}",
            s.sd
        );
    }
}
