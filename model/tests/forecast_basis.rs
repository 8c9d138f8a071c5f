//! The forecast basis a published version keeps: for the `draws` settings whose thinned
//! effect draws do not divide evenly into the kept count (the service keeps 25 per
//! chain), every kept column lies inside its own chain.

use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;

/// `draws = 110` and `220` with the service's 25 kept draws per chain: before the column
/// index was computed in integers, the last kept draw of each chain was one past its end
/// (the next chain's first draw, or out of bounds for the last chain).
#[test]
fn the_forecast_basis_stays_inside_each_chain_for_uneven_draw_counts() {
    let data = simulate(&NetworkSpec {
        sites: 12,
        years: 5,
        seed: 3,
        ..Default::default()
    })
    .0;
    for draws in [110, 220] {
        let settings = SamplerSettings {
            chains: 2,
            draws,
            warmup: 60,
            effect_draws: 100,
            threads: 1,
            seed: 7,
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
        let per_chain = post.effects.per_chain;
        let basis = post.forecast_basis(25);
        assert_eq!(basis.n, 2 * 25, "draws {draws}");
        for (i, &index) in basis.draw_index.iter().enumerate() {
            let chain = i / 25;
            assert_eq!(
                index / draws,
                chain,
                "draws {draws}: kept draw {i} comes from chain {} (per chain {per_chain})",
                index / draws
            );
        }
        // The last kept draw of each chain is that chain's last effect draw.
        let last_effect = *post.effects.draw_index[..per_chain].last().unwrap();
        assert_eq!(basis.draw_index[24], last_effect, "draws {draws}");
        assert!(!forecast_baseline(&basis, Transform::None).is_empty());
    }
}
