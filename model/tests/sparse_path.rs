//! The sparse reduced system (`NormalEquations::Sparse`) against the dense one on the
//! same data. The dense path is itself checked against a direct dense computation in
//! `exact_identities.rs` (which runs both storages too); here the designs are larger and
//! have an observer factor with many levels, laid out in moving blocks and at random
//! (the two layouts of benchmark B4).

use tidemark_model::simulate::{observer_data, NetworkSpec, ObserverAssignment, ObserverSpec};
use tidemark_model::*;

fn observer_design(levels: usize, assignment: ObserverAssignment, seed: u64) -> Data {
    let spec = NetworkSpec {
        sites: 150,
        years: 12,
        missing: 0.3,
        covariates: 1,
        seed,
        ..Default::default()
    };
    let observers = ObserverSpec {
        levels,
        period_years: 3,
        sd: 0.3,
        assignment,
    };
    observer_data(&spec, &observers).unwrap()
}

/// The default sampler on one storage with `(chains, draws, threads)`.
fn fit_with(
    data: &Data,
    normal: NormalEquations,
    (chains, draws, threads): (usize, usize, usize),
) -> Posterior {
    let settings = SamplerSettings {
        chains,
        draws,
        threads,
        normal_equations: normal,
        ..Default::default()
    };
    sample(
        data,
        &Priors::default(),
        &settings,
        None,
        Controls::default(),
    )
    .unwrap()
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs()).max(1.0)
}

#[test]
fn reml_and_ml_are_the_same_on_both_storages() {
    for (assignment, seed) in [
        (ObserverAssignment::Blocks, 1),
        (ObserverAssignment::Random, 2),
    ] {
        let data = observer_design(80, assignment, seed);
        for method in [Method::Reml, Method::Ml] {
            let dense = fit_point_using(&data, method, NormalEquations::Dense).unwrap();
            let sparse = fit_point_using(&data, method, NormalEquations::Sparse).unwrap();
            let at = format!("{assignment:?} {method:?}");
            assert!(
                close(dense.criterion, sparse.criterion, 1e-10),
                "{at}: {} vs {}",
                dense.criterion,
                sparse.criterion
            );
            for ((name, d), (_, s)) in dense.sd.iter().zip(&sparse.sd) {
                assert!(close(*d, *s, 1e-5), "{at} sd {name}: {d} vs {s}");
            }
            for (d, s) in dense.coef.iter().zip(&sparse.coef) {
                assert!(close(d.estimate, s.estimate, 1e-6), "{at} {}", d.name);
                assert!(close(d.se, s.se, 1e-5), "{at} se {}", d.name);
            }
        }
    }
}

/// The marginal chain of the standard deviations depends on the data only through the
/// log marginal likelihood, and both storages draw the same random numbers, so with one
/// seed they must produce the same chain (to round-off, which the adaptation carries
/// along: 1e-6 relative); the location draws differ in how
/// the noise is transformed (another factor order), so they agree in distribution only.
#[test]
fn the_sampler_gives_the_same_chain_on_both_storages() {
    let data = observer_design(90, ObserverAssignment::Blocks, 3);
    let dense = fit_with(&data, NormalEquations::Dense, (2, 400, 1));
    let sparse = fit_with(&data, NormalEquations::Sparse, (2, 400, 1));
    assert_eq!(dense.sd_draws.len(), sparse.sd_draws.len());
    for (i, (d, s)) in dense.sd_draws.iter().zip(&sparse.sd_draws).enumerate() {
        assert!(close(*d, *s, 1e-6), "sd draw {i}: {d} vs {s}");
    }
    for name in &dense.coef_names {
        let d = dense.summary(SummaryKind::Coef, name, None).unwrap();
        let s = sparse.summary(SummaryKind::Coef, name, None).unwrap();
        // Two independent estimates of one posterior mean: within 5 Monte Carlo errors.
        let mcse = (d.sd * d.sd / d.ess_bulk + s.sd * s.sd / s.ess_bulk).sqrt();
        assert!(
            (d.mean - s.mean).abs() < 5.0 * mcse,
            "{name}: {} vs {} (MCSE {mcse})",
            d.mean,
            s.mean
        );
        // And one posterior sd: a relative Monte Carlo error of about 1 / sqrt(2 ESS) each.
        let rel = (0.5 / d.ess_bulk + 0.5 / s.ess_bulk).sqrt();
        assert!(
            (d.sd / s.sd - 1.0).abs() < 5.0 * rel,
            "{name} sd: {} vs {} (relative MC error {rel})",
            d.sd,
            s.sd
        );
    }
    // The effects of every year, observer and site: each mean within 6 Monte Carlo
    // errors, and per factor the average ratio of posterior sds within 5%.
    for term in ["site", "year", "observer"] {
        let (mut ratio, mut n) = (0.0, 0.0);
        for d in dense
            .summaries
            .iter()
            .filter(|x| x.kind == SummaryKind::Effect && x.term == term)
        {
            let s = sparse
                .summary(SummaryKind::Effect, term, d.level.as_deref())
                .unwrap();
            let mcse = (d.sd * d.sd / d.ess_bulk + s.sd * s.sd / s.ess_bulk).sqrt();
            assert!(
                (d.mean - s.mean).abs() < 6.0 * mcse,
                "{term} {:?}: {} vs {} (MCSE {mcse})",
                d.level,
                d.mean,
                s.mean
            );
            ratio += d.sd / s.sd;
            n += 1.0;
        }
        assert!(n > 0.0, "no {term} effects summarised");
        assert!(
            (ratio / n - 1.0).abs() < 0.05,
            "{term}: sd ratio {}",
            ratio / n
        );
    }
}

/// `Auto` goes sparse above `SPARSE_FROM_LEVELS` levels: the memory estimate, which
/// counts the storage in use, equals the forced storage's on each side.
#[test]
fn auto_chooses_the_storage_by_the_number_of_levels() {
    let estimate = |data: &Data, normal| {
        memory_estimate(
            data,
            &SamplerSettings {
                normal_equations: normal,
                ..Default::default()
            },
        )
    };
    let few = observer_design(SPARSE_FROM_LEVELS, ObserverAssignment::Blocks, 4);
    let many = observer_design(SPARSE_FROM_LEVELS + 40, ObserverAssignment::Blocks, 4);
    assert_eq!(
        estimate(&few, NormalEquations::Auto),
        estimate(&few, NormalEquations::Dense)
    );
    assert_ne!(
        estimate(&few, NormalEquations::Auto),
        estimate(&few, NormalEquations::Sparse)
    );
    assert_eq!(
        estimate(&many, NormalEquations::Auto),
        estimate(&many, NormalEquations::Sparse)
    );
    assert_ne!(
        estimate(&many, NormalEquations::Auto),
        estimate(&many, NormalEquations::Dense)
    );
}

/// With a quarter of the values censored the augmented chains of the two storages draw
/// different location noise, so their draws differ; their posteriors must not: every sd
/// and coefficient mean within 5 Monte Carlo errors.
#[test]
fn censored_values_give_the_same_posterior_on_both_storages() {
    let data = observer_design(90, ObserverAssignment::Blocks, 5);
    let (data, _) = simulate::censor_share(&data, Censoring::Below, 0.25);
    assert!(data.n_censored() > 0);
    let dense = fit_with(&data, NormalEquations::Dense, (4, 1000, 2));
    let sparse = fit_with(&data, NormalEquations::Sparse, (4, 1000, 2));
    let sds = dense.sd_names.clone();
    for (kind, names) in [
        (SummaryKind::Sd, sds),
        (SummaryKind::Coef, dense.coef_names.clone()),
    ] {
        for name in &names {
            let d = dense.summary(kind, name, None).unwrap();
            let s = sparse.summary(kind, name, None).unwrap();
            let mcse = (d.sd * d.sd / d.ess_bulk + s.sd * s.sd / s.ess_bulk).sqrt();
            assert!(
                (d.mean - s.mean).abs() < 5.0 * mcse,
                "{kind:?} {name}: {} vs {} (MCSE {mcse})",
                d.mean,
                s.mean
            );
        }
    }
}
