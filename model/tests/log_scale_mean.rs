//! The response-scale mean under `transform = "log"`: the posterior median of each draw's
//! predictive mean `exp(m + v/2)`. The mixture's own mean `E[exp(m + v/2)]` is infinite when
//! the posterior of a standard deviation has half-t or exponential tails (its prior's,
//! when the data say little), so it cannot be published; the median always exists.
//!
//! Checks: (1) exact values under the quantiles of a half-Cauchy (half-t, 1 df) and an
//! exponential distribution of the year sd, where the median per-draw mean has a closed
//! form and the mixture mean overflows; (2) the published mean is stable across seeds
//! with 1, 3 and 10 years of data.

use tidemark_model::simulate::{simulate, NetworkSpec};
use tidemark_model::*;

/// A basis of `n` draws of a one-site, one-year network: the intercept `c`, residual and
/// site sds fixed, the year sd taking the values `year_sd` (one per draw).
fn basis(c: f64, residual: f64, site: f64, year_sd: &[f64]) -> ForecastBasis {
    let n = year_sd.len();
    let mut sd = Vec::with_capacity(3 * n);
    for &y in year_sd {
        sd.extend([residual, site, y]);
    }
    ForecastBasis {
        sd_names: vec!["residual".into(), "site".into(), "year".into()],
        coef_names: vec!["intercept".into()],
        site_labels: vec!["s1".into()],
        year_labels: vec![2020],
        group_names: vec![],
        group_labels: vec![],
        covariate_means: vec![],
        site_covariates: vec![],
        site_last_year: vec![2020],
        trend_origin: None,
        n,
        draw_index: (0..n).collect(),
        site: vec![0.0; n],
        year: vec![0.0; n],
        groups: vec![],
        sd,
        coef: vec![c; n],
    }
}

fn new_site_new_year(b: &ForecastBasis) -> ForecastRow {
    forecast_baseline(b, Transform::Log)
        .into_iter()
        .find(|r| r.target == ForecastTarget::NewSiteNewYear && r.year == 2021)
        .expect("a new-site row next year")
}

/// Mid-point quantiles `F^-1((i + 1/2) / n)` of a distribution given by its quantile
/// function; `n` odd, so the middle one is the median `F^-1(1/2)` exactly.
fn grid(n: usize, quantile: impl Fn(f64) -> f64) -> Vec<f64> {
    (0..n)
        .map(|i| quantile((i as f64 + 0.5) / n as f64))
        .collect()
}

#[test]
fn the_log_scale_mean_is_finite_and_exact_under_heavy_tailed_sd_posteriors() {
    let (c, residual, site) = (1.0, 0.1, 0.2);
    // Half-Cauchy with scale 1: quantile tan(pi u / 2), median 1. Exponential with rate 2:
    // quantile -ln(1 - u) / 2, median ln(2) / 2. Both from their closed forms.
    type Quantile = fn(f64) -> f64;
    let cases: [(&str, Quantile, f64); 2] = [
        (
            "half-Cauchy",
            |u| (std::f64::consts::FRAC_PI_2 * u).tan(),
            1.0,
        ),
        (
            "exponential",
            |u| -(1.0 - u).ln() / 2.0,
            std::f64::consts::LN_2 / 2.0,
        ),
    ];
    for (name, quantile, median_sd) in cases {
        // exp(c + v/2) increases with the year sd, so its median is at the median sd.
        let exact = (c + (residual * residual + site * site + median_sd * median_sd) / 2.0).exp();
        let mut mixture_means = Vec::new();
        for n in [2001, 200_001] {
            let year_sd = grid(n, quantile);
            let row = new_site_new_year(&basis(c, residual, site, &year_sd));
            assert!(
                (row.mean - exact).abs() <= 1e-9 * exact,
                "{name}, {n} draws: mean {} vs exact {exact}",
                row.mean
            );
            assert_eq!(row.sd, None, "{name}");
            for q in [
                row.q025, row.q10, row.q25, row.q50, row.q75, row.q90, row.q975,
            ] {
                assert!(q.is_finite() && q > 0.0, "{name}: quantile {q}");
            }
            mixture_means.push(
                year_sd
                    .iter()
                    .map(|y| (c + (residual * residual + site * site + y * y) / 2.0).exp())
                    .sum::<f64>()
                    / n as f64,
            );
        }
        // The mixture mean the same draws would estimate is infinite: its Monte Carlo
        // value does not settle as the draws reach further into the tail (it overflows
        // or grows by orders of magnitude), while the median above is exact at both sizes.
        assert!(
            mixture_means[1].is_infinite() || mixture_means[1] > 100.0 * mixture_means[0],
            "{name}: mixture means {mixture_means:?} should not settle"
        );
    }
}

/// The published mean with few years leans on the year sd's prior: it must still repeat
/// across seeds about as well as the median does.
#[test]
fn the_log_scale_mean_is_stable_across_seeds_with_1_3_and_10_years() {
    for years in [1usize, 3, 10] {
        let (data, _) = simulate(&NetworkSpec {
            sites: 15,
            years,
            missing: 0.0,
            covariates: 0,
            seed: 3,
            ..Default::default()
        });
        let mut means = Vec::new();
        let mut medians = Vec::new();
        for seed in 1..=4u64 {
            let s = SamplerSettings {
                chains: 2,
                draws: 1000,
                warmup: 300,
                seed,
                threads: 1,
                ..SamplerSettings::default()
            };
            let post =
                sample(&data, &Priors::default(), &s, None, Controls::default()).expect("a fit");
            let row = forecast_baseline(&post.forecast_basis(250), Transform::Log)
                .into_iter()
                .find(|r| {
                    r.target == ForecastTarget::NewSiteNewYear
                        && r.site.is_none()
                        && r.year > *data.year_labels().last().unwrap()
                })
                .expect("a new-site row next year");
            assert!(row.mean.is_finite() && row.sd.is_none());
            means.push(row.mean);
            medians.push(row.q50);
        }
        let spread = |v: &[f64]| {
            let max = v.iter().cloned().fold(f64::MIN, f64::max);
            let min = v.iter().cloned().fold(f64::MAX, f64::min);
            max / min
        };
        // Common practice for a Monte Carlo repeatability check, not a published bound:
        // four seeds within a factor 1.25 of each other.
        assert!(
            spread(&means) < 1.25,
            "{years} year(s): means {means:?} (medians {medians:?})"
        );
    }
}
