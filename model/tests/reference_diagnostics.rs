//! Convergence diagnostics against ArviZ 0.23.4 (reference library, run offline by
//! `tests/reference/arviz_diagnostics.py` on the stored draws in
//! `tests/data/diagnostics_draws.csv`): rank-normalised split R-hat, bulk-ESS and
//! tail-ESS of Vehtari et al. (2021), on well-mixed, autocorrelated, shifted, heavy-tailed
//! and stuck chains.

use serde_json::Value;
use std::collections::BTreeMap;
use tidemark_model::diagnose;

#[test]
fn diagnostics_equal_arviz_on_stored_draws() {
    let dir = format!("{}/tests/data", env!("CARGO_MANIFEST_DIR"));
    let reference: Value = serde_json::from_str(
        &std::fs::read_to_string(format!("{dir}/arviz_diagnostics.json")).unwrap(),
    )
    .unwrap();
    let text = std::fs::read_to_string(format!("{dir}/diagnostics_draws.csv")).unwrap();
    let mut draws: BTreeMap<String, Vec<Vec<f64>>> = BTreeMap::new();
    for line in text.lines().skip(1) {
        let f: Vec<&str> = line.split(',').collect();
        let chains = draws.entry(f[0].to_string()).or_default();
        let chain: usize = f[1].parse().unwrap();
        if chains.len() <= chain {
            chains.resize(chain + 1, Vec::new());
        }
        chains[chain].push(f[3].parse().unwrap());
    }
    let quantities = reference["quantities"].as_object().unwrap();
    assert!(quantities.len() >= 6);
    for (name, expected) in quantities {
        let chains = &draws[name];
        let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
        let got = diagnose(&refs);
        for (label, value, want) in [
            ("rhat", got.rhat, expected["rhat_rank"].as_f64().unwrap()),
            (
                "ess_bulk",
                got.ess_bulk,
                expected["ess_bulk"].as_f64().unwrap(),
            ),
            (
                "ess_tail",
                got.ess_tail,
                expected["ess_tail"].as_f64().unwrap(),
            ),
        ] {
            assert!(
                ((value - want) / want).abs() < 1e-8,
                "{name} {label}: {value} vs ArviZ {want}"
            );
        }
    }
}
