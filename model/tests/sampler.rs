//! Properties of the sampler that hold exactly: reproducibility whatever the thread
//! count, warm starts, cancellation, and forecast structure.

use std::sync::atomic::AtomicBool;
use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;

fn network() -> Data {
    simulate(&NetworkSpec {
        sites: 40,
        years: 10,
        seed: 5,
        ..Default::default()
    })
    .0
}

fn settings(threads: usize) -> SamplerSettings {
    SamplerSettings {
        draws: 300,
        warmup: 200,
        effect_draws: 30,
        threads,
        seed: 99,
        ..Default::default()
    }
}

fn fit(data: &Data, settings: &SamplerSettings, warm: Option<&WarmStart>) -> Posterior {
    sample(
        data,
        &Priors::default(),
        settings,
        warm,
        Controls::default(),
    )
    .unwrap()
}

#[test]
fn draws_are_identical_for_a_seed_whatever_the_thread_count() {
    let data = network();
    let one = fit(&data, &settings(1), None);
    let four = fit(&data, &settings(4), None);
    assert_eq!(one.sd_draws, four.sd_draws);
    assert_eq!(one.coef_draws, four.coef_draws);
    assert_eq!(one.effects.site, four.effects.site);
    let other_seed = fit(
        &data,
        &SamplerSettings {
            seed: 100,
            ..settings(1)
        },
        None,
    );
    assert_ne!(one.sd_draws, other_seed.sd_draws);
}

#[test]
fn a_warm_start_uses_the_short_warmup_and_agrees_with_a_cold_fit() {
    let data = network();
    let cold = fit(&data, &settings(0), None);
    let warm = fit(&data, &settings(0), Some(&cold.warm_start));
    assert!(!cold.diagnostics.warm_started && warm.diagnostics.warm_started);
    assert_eq!(warm.diagnostics.warmup, settings(0).warm_warmup);
    assert!(warm.diagnostics.max_rhat < 1.02, "{:?}", warm.diagnostics);
    for name in ["residual", "site", "year"] {
        let c = cold.summary(SummaryKind::Sd, name, None).unwrap();
        let w = warm.summary(SummaryKind::Sd, name, None).unwrap();
        let mcse = (c.sd / c.ess_bulk.sqrt()).hypot(w.sd / w.ess_bulk.sqrt());
        assert!(
            (c.mean - w.mean).abs() < 5.0 * mcse,
            "{name}: {} vs {}",
            c.mean,
            w.mean
        );
    }
    // A warm state for other components (a new grouping factor) is ignored, not misused.
    let mut foreign = cold.warm_start.clone();
    foreign.sd_names.push("crew".into());
    let fallback = fit(&data, &settings(0), Some(&foreign));
    assert!(!fallback.diagnostics.warm_started);
}

#[test]
fn a_raised_cancel_flag_stops_the_fit() {
    let data = network();
    let cancel = AtomicBool::new(true);
    let controls = Controls {
        cancel: Some(&cancel),
        progress: None,
    };
    let err = sample(&data, &Priors::default(), &settings(0), None, controls).unwrap_err();
    assert_eq!(err, ModelError::Cancelled);
}

#[test]
fn forecasts_cover_the_four_targets_with_ordered_intervals_and_shares_summing_to_one() {
    let data = network();
    let post = fit(&data, &settings(0), None);
    for transform in [Transform::None, Transform::Log] {
        let rows = forecast_baseline(&post.forecast_basis(usize::MAX), transform);
        let count = |t: ForecastTarget| rows.iter().filter(|r| r.target == t).count();
        assert_eq!(count(ForecastTarget::KnownSiteNewYear), data.n_sites());
        assert_eq!(count(ForecastTarget::KnownSiteKnownYear), data.n_sites());
        assert_eq!(count(ForecastTarget::NewSiteKnownYear), data.n_years());
        assert_eq!(count(ForecastTarget::NewSiteNewYear), 1);
        for r in &rows {
            let ordered = [r.q025, r.q10, r.q25, r.q50, r.q75, r.q90, r.q975];
            assert!(ordered.windows(2).all(|w| w[0] <= w[1]), "{r:?}");
            let total = r.share_site
                + r.share_year
                + r.share_groups
                + r.share_residual
                + r.share_estimation;
            assert!((total - 1.0).abs() < 1e-12, "{r:?}");
            assert_eq!(
                r.site.is_none(),
                matches!(
                    r.target,
                    ForecastTarget::NewSiteKnownYear | ForecastTarget::NewSiteNewYear
                )
            );
            if transform == Transform::Log {
                assert!(r.q025 > 0.0);
            }
        }
        // A new site next year is the least certain target.
        let width = |t: ForecastTarget| {
            let v: Vec<f64> = rows
                .iter()
                .filter(|r| r.target == t)
                .map(|r| r.q90 - r.q10)
                .collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        if transform == Transform::None {
            assert!(
                width(ForecastTarget::NewSiteNewYear) > width(ForecastTarget::KnownSiteNewYear)
            );
            assert!(
                width(ForecastTarget::NewSiteNewYear) > width(ForecastTarget::NewSiteKnownYear)
            );
            assert!(
                width(ForecastTarget::KnownSiteKnownYear) < width(ForecastTarget::KnownSiteNewYear)
            );
        }
    }
}

/// The first season of a network: one year. REML cannot estimate the year variance and
/// refuses; the Bayesian fit proceeds, with the year sd informed by its prior alone.
#[test]
fn a_single_year_is_refused_by_reml_and_fitted_from_the_prior_by_the_sampler() {
    let data = simulate(&NetworkSpec {
        sites: 30,
        years: 1,
        seed: 8,
        ..Default::default()
    })
    .0;
    assert!(
        matches!(fit_point(&data, Method::Reml), Err(ModelError::TooFewLevels { ref factor, levels: 1 }) if factor == "year")
    );
    assert!(data.warnings().iter().any(|w| w.contains("single level")));
    let priors = Priors {
        year_sd: Some(SdPrior::HalfNormal { scale: 0.5 }),
        ..Default::default()
    };
    let post = sample(&data, &priors, &settings(0), None, Controls::default()).unwrap();
    // Half-normal(0.5): median 0.5 * 0.6745 = 0.337 (closed form); the data add almost nothing.
    let year = post.summary(SummaryKind::Sd, "year", None).unwrap();
    assert!((year.q50 - 0.337).abs() < 0.08, "{year:?}");
}

/// Each summary row is computed from the draws it names (standard deviations, variance
/// shares, coefficients, effects), and the gate's figures are the worst of the gated rows.
#[test]
fn summaries_and_gate_figures_come_from_the_stored_draws() {
    let data = network();
    let post = fit(&data, &settings(0), None);
    let m = post.sd_names.len();
    let p = post.coef_names.len();
    let n = (post.chains * post.draws) as f64;
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * a.abs().max(1.0);
    for (k, name) in post.sd_names.iter().enumerate() {
        let rows = post.sd_draws.chunks(m);
        let sd_mean = rows.clone().map(|r| r[k]).sum::<f64>() / n;
        let share_mean = rows
            .map(|r| r[k] * r[k] / r.iter().map(|s| s * s).sum::<f64>())
            .sum::<f64>()
            / n;
        let sd = post.summary(SummaryKind::Sd, name, None).unwrap();
        let share = post.summary(SummaryKind::Share, name, None).unwrap();
        assert!(close(sd.mean, sd_mean), "{name}: {} vs {sd_mean}", sd.mean);
        assert!(
            close(share.mean, share_mean),
            "{name}: {} vs {share_mean}",
            share.mean
        );
    }
    for (j, name) in post.coef_names.iter().enumerate() {
        let mean = post.coef_draws.chunks(p).map(|r| r[j]).sum::<f64>() / n;
        let coef = post.summary(SummaryKind::Coef, name, None).unwrap();
        assert!(close(coef.mean, mean), "{name}: {} vs {mean}", coef.mean);
    }
    let eff = &post.effects;
    for (s, label) in post.site_labels.iter().enumerate() {
        let mean = eff.site[s * eff.n..(s + 1) * eff.n].iter().sum::<f64>() / eff.n as f64;
        let row = post
            .summary(SummaryKind::Effect, "site", Some(label))
            .unwrap();
        assert!(
            close(row.mean, mean),
            "site {label}: {} vs {mean}",
            row.mean
        );
    }
    for (t, year) in post.year_labels.iter().enumerate() {
        let mean = eff.year[t * eff.n..(t + 1) * eff.n].iter().sum::<f64>() / eff.n as f64;
        let row = post
            .summary(SummaryKind::Effect, "year", Some(&year.to_string()))
            .unwrap();
        assert!(close(row.mean, mean), "year {year}: {} vs {mean}", row.mean);
    }
    let gated = || {
        post.summaries
            .iter()
            .filter(|s| s.kind != SummaryKind::Effect)
    };
    let d = &post.diagnostics;
    assert_eq!(d.max_rhat, gated().map(|s| s.rhat).fold(f64::MIN, f64::max));
    assert_eq!(
        d.min_ess_bulk,
        gated().map(|s| s.ess_bulk).fold(f64::MAX, f64::min)
    );
    assert_eq!(
        d.min_ess_tail,
        gated().map(|s| s.ess_tail).fold(f64::MAX, f64::min)
    );
    let effect_rhat = post
        .summaries
        .iter()
        .filter(|s| s.kind == SummaryKind::Effect)
        .map(|s| s.rhat)
        .fold(1.0, f64::max);
    assert_eq!(d.max_rhat_effects, effect_rhat);
}
