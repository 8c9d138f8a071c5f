//! R-hat and ESS never panic, whatever the chain length and shape: every length from 1 to
//! 64, one to four chains, constant, alternating, random and mixed chains; and a fit whose
//! random effects keep only 8 draws per chain.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;

fn chains_of(kind: &str, n_chains: usize, len: usize, rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    (0..n_chains)
        .map(|c| {
            (0..len)
                .map(|t| match kind {
                    "constant" => 2.5,
                    "alternating" => (t % 2) as f64,
                    "alternating_shifted" => (t % 2) as f64 + c as f64,
                    "one_constant_chain" if c == 0 => 1.0,
                    _ => rng.gen::<f64>(),
                })
                .collect()
        })
        .collect()
}

/// Fewer than 4 draws per chain: every figure is NaN (not estimable). Otherwise: a
/// constant quantity has NaN figures (nothing to rank); any other has a finite R-hat and
/// ESS in `(0, N log10 N]` (`N` = all split draws; the floor of the autocorrelation time
/// caps the ESS there).
#[test]
fn rhat_and_ess_are_defined_for_every_chain_length_from_1_to_64() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    for kind in [
        "constant",
        "alternating",
        "alternating_shifted",
        "random",
        "one_constant_chain",
    ] {
        for n_chains in 1..=4 {
            for len in 1..=64 {
                let chains = chains_of(kind, n_chains, len, &mut rng);
                let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
                let d = diagnose(&refs);
                let at = format!("{kind}, {n_chains} chains x {len}: {d:?}");
                let all_equal = chains.iter().flatten().all(|&v| v == chains[0][0]);
                if len < 4 || all_equal {
                    assert!(
                        d.rhat.is_nan() && d.ess_bulk.is_nan() && d.ess_tail.is_nan(),
                        "{at}"
                    );
                    continue;
                }
                let total = (2 * (len / 2) * n_chains) as f64;
                let cap = total * total.log10() * (1.0 + 1e-12);
                assert!(d.rhat.is_finite() && d.rhat > 0.0, "{at}");
                for ess in [d.ess_bulk, d.ess_tail] {
                    assert!(ess > 0.0 && ess <= cap, "{at}: cap {cap}");
                }
            }
        }
    }
    // Unequal lengths or no chains at all: NaN, not a panic.
    let d = diagnose(&[&[1.0, 2.0, 3.0, 4.0, 5.0][..], &[1.0, 2.0][..]]);
    assert!(d.rhat.is_nan() && d.ess_bulk.is_nan());
    assert!(diagnose(&[]).rhat.is_nan());
}

/// `effect_draws = 8`: the effects' summaries diagnose chains of 8 draws, where Geyer's
/// sequence has no pair of lags to add. The fit completes, and each effect's figures are
/// those of `diagnose` on its own draws.
#[test]
fn a_fit_with_eight_effect_draws_per_chain_summarises_its_effects() {
    let data = simulate(&NetworkSpec {
        sites: 10,
        years: 5,
        seed: 4,
        ..Default::default()
    })
    .0;
    let settings = SamplerSettings {
        chains: 2,
        draws: 16,
        warmup: 40,
        effect_draws: 8,
        threads: 1,
        seed: 3,
        ..Default::default()
    };
    let post = sample(
        &data,
        &Priors::default(),
        &settings,
        None,
        Controls::default(),
    )
    .unwrap();
    assert_eq!(post.effects.per_chain, 8);
    let n = post.effects.n;
    for (s, label) in post.site_labels.iter().enumerate() {
        let row = post
            .summary(SummaryKind::Effect, "site", Some(label))
            .unwrap();
        let draws = &post.effects.site[s * n..(s + 1) * n];
        let d = diagnose(&[&draws[..8], &draws[8..]]);
        assert_eq!((row.rhat, row.ess_bulk), (d.rhat, d.ess_bulk), "{label}");
        assert!(
            row.ess_bulk.is_finite() && row.ess_tail.is_finite(),
            "{row:?}"
        );
    }
}
