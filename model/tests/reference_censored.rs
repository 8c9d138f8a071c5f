//! The censored posterior (data augmentation, `src/censored.rs`) against a long
//! general-purpose NUTS run of the same censored likelihood and priors: BlackJAX's NUTS on
//! a log density written independently in JAX, 8 chains x 25,000 draws, computed offline
//! by `tests/reference/censored_nuts.py` and stored in `tests/data/censored_nuts.json`.
//! The design (20 sites x 6 years x 2 visits, 30% left-censored at one limit) is INVENTED
//! test data, stored in `tests/data/censored_design.csv`.

use serde_json::Value;
use tidemark_model::*;

fn reference() -> Value {
    let path = format!(
        "{}/tests/data/censored_nuts.json",
        env!("CARGO_MANIFEST_DIR")
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn design() -> Data {
    let path = format!(
        "{}/tests/data/censored_design.csv",
        env!("CARGO_MANIFEST_DIR")
    );
    let text = std::fs::read_to_string(path).unwrap();
    let mut b = DataBuilder::new(vec![], vec![]);
    for line in text.lines().filter(|l| !l.starts_with('#')).skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        let (site, year, value) = (f[0], f[1].parse().unwrap(), f[2].parse().unwrap());
        match f[3] {
            "below" => b
                .push_censored(site, year, &[], &[], Censoring::Below, value)
                .unwrap(),
            "" => b.push(site, year, &[], &[], value).unwrap(),
            other => panic!("unknown censoring flag {other:?}"),
        }
    }
    b.build().unwrap()
}

/// Sample quantile, linear interpolation (type 7, as numpy's default in the reference).
fn quantile(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

/// Quantile `p` of the draws and its Monte Carlo standard error, as ArviZ's
/// `mcse(method="quantile")` computes it (Vehtari, Gelman, Simpson, Carpenter & Bürkner
/// 2021): the ESS of the indicator `x <= q` on split chains gives the binomial error
/// `e = sqrt(p (1 - p) / ess)` of the draws' CDF at `q`, and the draws' quantiles at
/// `p -/+ e` are mapped back: `mcse = (x_(ceil((p + e) N)) - x_(floor((p - e) N))) / 2`.
/// (ArviZ takes `p -/+ e` from a beta distribution; at ESS of thousands it is this normal
/// approximation.) The indicator's ESS is [`diagnose`]'s bulk-ESS of it: rank-normalising
/// a two-valued quantity (ties share their average rank) is an affine map of it, and ESS
/// does not change under affine maps.
fn quantile_with_mcse(chains: &[Vec<f64>], p: f64) -> (f64, f64) {
    let mut sorted: Vec<f64> = chains.iter().flatten().copied().collect();
    sorted.sort_by(f64::total_cmp);
    let q = quantile(&sorted, p);
    let indicator: Vec<Vec<f64>> = chains
        .iter()
        .map(|c| c.iter().map(|&x| f64::from(u8::from(x <= q))).collect())
        .collect();
    let refs: Vec<&[f64]> = indicator.iter().map(|c| c.as_slice()).collect();
    let ess = diagnose(&refs).ess_bulk;
    let e = (p * (1.0 - p) / ess).sqrt();
    let n = sorted.len();
    let lo = (((p - e) * n as f64).floor().max(0.0) as usize).min(n - 1);
    let hi = (((p + e) * n as f64).ceil() as usize).min(n - 1);
    (q, (sorted[hi] - sorted[lo]) / 2.0)
}

#[test]
fn censored_posterior_quantiles_match_a_long_nuts_run() {
    let r = reference();
    let data = design();
    assert_eq!(
        data.n_censored() as u64,
        r["design"]["censored_below"].as_u64().unwrap()
    );
    let p = &r["priors"];
    let sd_prior = |name: &str| {
        assert_eq!(p[name]["family"], "half-normal");
        Some(SdPrior::HalfNormal {
            scale: p[name]["scale"].as_f64().unwrap(),
        })
    };
    let priors = Priors {
        residual_sd: sd_prior("sd_residual"),
        site_sd: sd_prior("sd_site"),
        year_sd: sd_prior("sd_year"),
        group_sd: None,
        intercept: Some(NormalPrior {
            mean: p["intercept"]["mean"].as_f64().unwrap(),
            sd: p["intercept"]["sd"].as_f64().unwrap(),
        }),
        coefficients: None,
    };
    // 4 x 50,000 draws take about 2 s (the model crate is optimised in the test profile
    // too); Tidemark's quantile MCSEs are then 1-2.5 times the reference's, so both sides
    // set the tolerance.
    let settings = SamplerSettings {
        chains: 4,
        draws: 50_000,
        effect_draws: 10,
        seed: 11,
        ..Default::default()
    };
    let post = sample(&data, &priors, &settings, None, Controls::default()).unwrap();
    assert!(post.diagnostics.max_rhat < 1.01, "{:?}", post.diagnostics);

    let chains_of = |name: &str| match name {
        "sd_residual" => post.sd_chains(0),
        "sd_site" => post.sd_chains(1),
        "sd_year" => post.sd_chains(2),
        _ => post.coef_chains(0),
    };
    let mut failures = Vec::new();
    for name in ["sd_residual", "sd_site", "sd_year", "intercept"] {
        let chains = chains_of(name);
        let expected = &r["posterior"][name];
        let mut worst: f64 = 0.0;
        for (p_str, q_ref) in expected["quantiles"].as_object().unwrap() {
            let q_ref = q_ref.as_f64().unwrap();
            let mcse_ref = expected["mcse_quantiles"][p_str].as_f64().unwrap();
            let (q, mcse) = quantile_with_mcse(&chains, p_str.parse().unwrap());
            // Both sides are Monte Carlo estimates: their errors add in quadrature.
            let tolerance = 4.0 * (mcse_ref.powi(2) + mcse.powi(2)).sqrt();
            worst = worst.max((q - q_ref).abs() / tolerance);
            println!("{name} q{p_str}: {q:.5} vs NUTS {q_ref:.5}, mcse {mcse:.5} vs {mcse_ref:.5}");
            if (q - q_ref).abs() >= tolerance {
                failures.push(format!(
                    "{name} q{p_str}: {q:.5} vs NUTS {q_ref:.5} (tolerance {tolerance:.5})"
                ));
            }
        }
        let mean_ref = expected["mean"].as_f64().unwrap();
        let mcse_mean_ref = expected["mcse_mean"].as_f64().unwrap();
        let flat: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
        let all: Vec<f64> = chains.iter().flatten().copied().collect();
        let n = all.len() as f64;
        let mean = all.iter().sum::<f64>() / n;
        let sd = (all.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        // ArviZ's mean MCSE divides by the ESS of the raw draws; the rank-normalised
        // bulk-ESS is within a few per cent of it for these near-normal marginals.
        let mcse_mean = sd / diagnose(&flat).ess_bulk.sqrt();
        let tolerance = 4.0 * (mcse_mean_ref.powi(2) + mcse_mean.powi(2)).sqrt();
        worst = worst.max((mean - mean_ref).abs() / tolerance);
        if (mean - mean_ref).abs() >= tolerance {
            failures.push(format!(
                "{name} mean: {mean:.5} vs NUTS {mean_ref:.5} (tolerance {tolerance:.5})"
            ));
        }
        println!("{name}: max |difference| / tolerance = {worst:.3}");
    }
    assert!(failures.is_empty(), "{failures:#?}");
}
