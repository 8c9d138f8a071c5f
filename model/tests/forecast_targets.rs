//! The four forecast targets against an independent computation. For a fixed set of joint
//! draws (invented, with effects and variance components large enough that leaving any
//! one out moves a figure by many Monte Carlo errors), each forecast row's mean, variance,
//! quantiles and variance shares are recomputed by plain Monte Carlo: for every joint draw,
//! `K` fresh values with a new site / new year / group / residual noise drawn here, from
//! the draw's own standard deviations, and the known site and year effects of the draw
//! added to the mean. Nothing from `forecast.rs` is used but the rows under test.
//!
//! Bounds (all at 5 Monte Carlo standard errors; the sampling is stratified by draw, so
//! the plain i.i.d. errors used below are upper bounds): the mean within
//! `5 sqrt(Var / N)`; the variance within `5 sqrt((mu4 - Var^2) / N)` (`mu4` the sample's
//! fourth central moment); a quantile `q_p` through its CDF, the share of values at or
//! below `q_p` within `5 sqrt(p (1 - p) / N)` of `p`; the shares within the relative
//! error of the Monte Carlo variance. `N = n K = 200,000` values per row.
//!
//! Threshold exceedance (`exceedance`) against the same Monte Carlo values: the share of
//! values above each threshold within `5 sqrt(p (1 - p) / N) + 5 / N` of the exact
//! probability `p` (binomial error; the `5 / N` keeps a probability near 0 or 1 from
//! asking for an exact zero).

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use tidemark_model::*;

const N_DRAWS: usize = 200;
const K: usize = 1000;
const SITES: [f64; 3] = [-0.8, 0.3, 0.9];
const YEARS: [f64; 4] = [0.5, -0.6, 0.2, -0.4];
const CREWS: [f64; 2] = [0.3, -0.3];

fn z(rng: &mut ChaCha8Rng) -> f64 {
    StandardNormal.sample(rng)
}

/// Joint draws of a network of 3 sites, years 2001-2004, one crew factor and one
/// covariate; each draw's sds and effects vary around fixed centres.
fn basis() -> ForecastBasis {
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let n = N_DRAWS;
    let centres = [0.4, 0.7, 0.6, 0.5]; // residual, site, year, crew
    let mut sd = Vec::new();
    let mut coef = Vec::new();
    for _ in 0..n {
        for c in centres {
            sd.push(c * (0.2 * z(&mut rng)).exp());
        }
        coef.push(1.0 + 0.1 * z(&mut rng));
        coef.push(0.2 + 0.02 * z(&mut rng));
    }
    let mut effects = |centres: &[f64]| -> Vec<f64> {
        centres
            .iter()
            .flat_map(|&c| (0..n).map(|_| c + 0.1 * z(&mut rng)).collect::<Vec<_>>())
            .collect()
    };
    let site = effects(&SITES);
    let year = effects(&YEARS);
    let crew = effects(&CREWS);
    ForecastBasis {
        sd_names: vec![
            "residual".into(),
            "site".into(),
            "year".into(),
            "crew".into(),
        ],
        coef_names: vec!["intercept".into(), "x".into()],
        site_labels: vec!["s1".into(), "s2".into(), "s3".into()],
        year_labels: vec![2001, 2002, 2003, 2004],
        group_names: vec!["crew".into()],
        group_labels: vec![vec!["a".into(), "b".into()]],
        covariate_means: vec![10.0],
        site_covariates: vec![None],
        site_last_year: vec![2004, 2003, 2002],
        trend_origin: None,
        n,
        draw_index: (0..n).collect(),
        site,
        year,
        groups: vec![crew],
        sd,
        coef,
    }
}

/// Monte Carlo values of one row's target (model scale), the per-draw mean of its known
/// parts, and the per-draw variance of the parts it does not know.
fn monte_carlo(
    b: &ForecastBasis,
    row: &ForecastRow,
    x: f64,
    rng: &mut ChaCha8Rng,
) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let n = b.n;
    let site = row
        .site
        .as_ref()
        .map(|l| b.site_labels.iter().position(|s| s == l).unwrap());
    let year = match row.target {
        ForecastTarget::KnownSiteKnownYear | ForecastTarget::NewSiteKnownYear => {
            Some(b.year_labels.iter().position(|&y| y == row.year).unwrap())
        }
        _ => None,
    };
    let mut values = Vec::with_capacity(n * K);
    let mut known = Vec::with_capacity(n);
    let mut unknown_var = Vec::with_capacity(n);
    for d in 0..n {
        let sd = &b.sd[d * 4..d * 4 + 4];
        let mut centre = b.coef[d * 2] + b.coef[d * 2 + 1] * x;
        if let Some(s) = site {
            centre += b.site[s * n + d];
        }
        if let Some(t) = year {
            centre += b.year[t * n + d];
        }
        known.push(centre);
        let mut var = sd[0].powi(2) + sd[3].powi(2);
        if site.is_none() {
            var += sd[1].powi(2);
        }
        if year.is_none() {
            var += sd[2].powi(2);
        }
        unknown_var.push(var);
        for _ in 0..K {
            let mut y = centre + sd[0] * z(rng) + sd[3] * z(rng);
            if site.is_none() {
                y += sd[1] * z(rng);
            }
            if year.is_none() {
                y += sd[2] * z(rng);
            }
            values.push(y);
        }
    }
    (values, known, unknown_var)
}

fn moments(v: &[f64]) -> (f64, f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n;
    let m4 = v.iter().map(|x| (x - mean).powi(4)).sum::<f64>() / n;
    (mean, var, m4)
}

fn check_rows(transform: Transform, scenario: &Scenario, x: f64) {
    check_rows_of(&basis(), transform, scenario, |_| x);
}

/// [`check_rows`] on a given basis, each row's Monte Carlo at the covariate value `x_of`
/// says that row should be computed at.
fn check_rows_of(
    b: &ForecastBasis,
    transform: Transform,
    scenario: &Scenario,
    x_of: impl Fn(&ForecastRow) -> f64,
) {
    let b = b.clone();
    let rows = forecast(&b, transform, scenario);
    assert_eq!(rows.len(), 3 + 3 + 4 + 1);
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let n_vals = (N_DRAWS * K) as f64;
    for row in &rows {
        let x = x_of(row);
        let at = format!(
            "{} {:?} {} ({transform}, x = {x})",
            row.target.as_str(),
            row.site,
            row.year
        );
        let (model_scale, known, unknown_var) = monte_carlo(&b, row, x, &mut rng);
        let values: Vec<f64> = match transform {
            Transform::None => model_scale.clone(),
            Transform::Log => model_scale.iter().map(|v| v.exp()).collect(),
        };
        let (mean, var, m4) = moments(&values);
        match transform {
            Transform::None => {
                let tol_mean = 5.0 * (var / n_vals).sqrt();
                assert!(
                    (row.mean - mean).abs() < tol_mean,
                    "{at}: mean {} vs Monte Carlo {mean} +- {tol_mean}",
                    row.mean
                );
                let tol_var = 5.0 * ((m4 - var * var) / n_vals).sqrt();
                let sd = row.sd.expect("an sd on the model scale");
                assert!(
                    (sd.powi(2) - var).abs() < tol_var,
                    "{at}: variance {} vs Monte Carlo {var} +- {tol_var}",
                    sd.powi(2)
                );
            }
            Transform::Log => {
                // The mean is the median over draws of each draw's lognormal mean
                // exp(m + v/2), here from the draw's own known parts and unknown
                // variances; the response-scale sd is not published.
                let mut per_draw: Vec<f64> = known
                    .iter()
                    .zip(&unknown_var)
                    .map(|(m, v)| (m + v / 2.0).exp())
                    .collect();
                per_draw.sort_by(f64::total_cmp);
                let median = (per_draw[N_DRAWS / 2 - 1] + per_draw[N_DRAWS / 2]) / 2.0;
                assert!(
                    (row.mean - median).abs() <= 1e-12 * median,
                    "{at}: mean {} vs the median per-draw mean {median}",
                    row.mean
                );
                // And exp(m + v/2) is each draw's mean: the draw's Monte Carlo values agree.
                for d in [0, N_DRAWS / 2, N_DRAWS - 1] {
                    let draw = &values[d * K..(d + 1) * K];
                    let (mc, mc_var, _) = moments(draw);
                    let exact = (known[d] + unknown_var[d] / 2.0).exp();
                    let tol = 5.0 * (mc_var / K as f64).sqrt();
                    assert!(
                        (mc - exact).abs() < tol,
                        "{at}: draw {d}: {mc} vs {exact} +- {tol}"
                    );
                }
                assert_eq!(row.sd, None, "{at}: no response-scale sd under log");
            }
        }
        for (p, q) in [
            (0.025, row.q025),
            (0.1, row.q10),
            (0.25, row.q25),
            (0.5, row.q50),
            (0.75, row.q75),
            (0.9, row.q90),
            (0.975, row.q975),
        ] {
            let below = values.iter().filter(|&&v| v <= q).count() as f64 / n_vals;
            let tol = 5.0 * (p * (1.0 - p) / n_vals).sqrt();
            assert!(
                (below - p).abs() < tol,
                "{at}: q{p} = {q} has {below} of the Monte Carlo values below (+- {tol})"
            );
        }
        // Shares of the model-scale variance, from the draws' own sds and known means.
        let (_, var_model, m4_model) = moments(&model_scale);
        let rel = 5.0 * ((m4_model - var_model * var_model) / n_vals).sqrt() / var_model;
        let avg =
            |k: usize| (0..N_DRAWS).map(|d| b.sd[d * 4 + k].powi(2)).sum::<f64>() / N_DRAWS as f64;
        let new_site = row.site.is_none();
        let new_year = matches!(
            row.target,
            ForecastTarget::KnownSiteNewYear | ForecastTarget::NewSiteNewYear
        );
        let (_, var_known, _) = moments(&known);
        for (label, got, part) in [
            ("residual", row.share_residual, avg(0)),
            ("site", row.share_site, if new_site { avg(1) } else { 0.0 }),
            ("year", row.share_year, if new_year { avg(2) } else { 0.0 }),
            ("groups", row.share_groups, avg(3)),
            ("estimation", row.share_estimation, var_known),
        ] {
            let want = part / var_model;
            assert!(
                (got - want).abs() <= want * rel + 1e-12,
                "{at}: share {label} {got} vs {want} (relative +- {rel})"
            );
        }
    }
}

/// Thresholds for one row, response scale: at its own 10%, 50% and 90% quantiles (so
/// each probability is away from 0 and 1 and well measured), and far in either tail.
fn thresholds_for(row: &ForecastRow) -> Vec<f64> {
    vec![
        row.q025 - (row.q975 - row.q025).abs(),
        row.q10,
        row.q50,
        row.q90,
        row.q975 + (row.q975 - row.q025),
    ]
}

/// Every row's exceedance probabilities against the share of its Monte Carlo values above
/// each threshold; under `log` the thresholds of the lowest tail are kept positive.
fn check_exceedance_of(
    b: &ForecastBasis,
    transform: Transform,
    scenario: &Scenario,
    x_of: impl Fn(&ForecastRow) -> f64,
) {
    let rows = forecast(b, transform, scenario);
    let thresholds: Vec<Vec<f64>> = rows
        .iter()
        .map(|r| {
            let mut t = thresholds_for(r);
            if transform == Transform::Log {
                t[0] = r.q025 / 4.0;
            }
            t
        })
        .collect();
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let n_vals = (N_DRAWS * K) as f64;
    let mut checked = 0;
    for (row, ts) in rows.iter().zip(&thresholds) {
        let got = exceedance(b, transform, scenario, std::slice::from_ref(row), ts).unwrap();
        assert_eq!(got.len(), 1);
        let (model_scale, _, _) = monte_carlo(b, row, x_of(row), &mut rng);
        for (&t, &p) in ts.iter().zip(&got[0]) {
            let above = match transform {
                Transform::None => model_scale.iter().filter(|&&v| v > t).count(),
                Transform::Log => model_scale.iter().filter(|&&v| v.exp() > t).count(),
            } as f64
                / n_vals;
            let tol = 5.0 * (p * (1.0 - p) / n_vals).sqrt() + 5.0 / n_vals;
            assert!(
                (above - p).abs() < tol,
                "{} {:?} {} ({transform}): P(Y > {t}) = {p}, Monte Carlo {above} +- {tol}",
                row.target.as_str(),
                row.site,
                row.year
            );
            checked += 1;
        }
        // Higher thresholds are exceeded less often.
        assert!(got[0].windows(2).all(|w| w[0] >= w[1]), "{:?}", got[0]);
        // The middle thresholds sit at the row's own quantiles: 0.9, 0.5, 0.1 exactly.
        for (p, want) in got[0][1..4].iter().zip([0.9, 0.5, 0.1]) {
            assert!((p - want).abs() < 1e-7, "{p} vs {want}");
        }
    }
    assert_eq!(checked, rows.len() * 5);
    // All rows at once give the same numbers as one by one.
    let shared = [rows[0].q50, rows[rows.len() - 1].q90];
    let all = exceedance(b, transform, scenario, &rows, &shared).unwrap();
    for (row, probs) in rows.iter().zip(&all) {
        let one = exceedance(b, transform, scenario, std::slice::from_ref(row), &shared).unwrap();
        assert_eq!(&one[0], probs);
    }
}

/// The exceedance probability of every target, on both scales and with a site-level
/// covariate, equals a plain Monte Carlo over the same joint draws.
#[test]
fn exceedance_probabilities_equal_a_plain_monte_carlo_over_the_same_draws() {
    let b = basis();
    check_exceedance_of(&b, Transform::None, &Scenario::baseline(), |_| 10.0);
    check_exceedance_of(&b, Transform::Log, &Scenario::baseline(), |_| 10.0);
    let scenario = Scenario {
        name: "x14".into(),
        covariates: vec![Some(14.0)],
        shifts: vec![],
    };
    check_exceedance_of(&b, Transform::None, &scenario, |_| 14.0);
    let sited = site_level_basis();
    check_exceedance_of(&sited, Transform::Log, &Scenario::baseline(), |r| {
        depth_of(&sited, r)
    });
}

/// Thresholds a series cannot ask are refused; under `log`, no threshold at or below 0
/// is accepted (it would be exceeded with probability 1).
#[test]
fn exceedance_refuses_thresholds_it_cannot_answer() {
    let b = basis();
    let rows = forecast_baseline(&b, Transform::Log);
    for bad in [f64::NAN, f64::INFINITY, 0.0, -1.0] {
        assert!(
            exceedance(&b, Transform::Log, &Scenario::baseline(), &rows, &[bad]).is_err(),
            "{bad}"
        );
    }
    assert!(exceedance(&b, Transform::None, &Scenario::baseline(), &rows, &[-1.0]).is_ok());
    // A row whose site the basis does not know is an error, not a guess.
    let mut stranger = rows[0].clone();
    stranger.site = Some("elsewhere".into());
    assert!(exceedance(
        &b,
        Transform::Log,
        &Scenario::baseline(),
        &[stranger],
        &[1.0]
    )
    .is_err());
}

#[test]
fn the_four_targets_equal_a_plain_monte_carlo_over_the_same_draws() {
    check_rows(Transform::None, &Scenario::baseline(), 10.0);
}

#[test]
fn a_covariate_scenario_moves_every_target_by_its_coefficient_draws() {
    let scenario = Scenario {
        name: "x14".into(),
        covariates: vec![Some(14.0)],
        shifts: vec![],
    };
    check_rows(Transform::None, &scenario, 14.0);
}

#[test]
fn log_scale_targets_equal_a_plain_monte_carlo_of_the_back_transformed_values() {
    check_rows(Transform::Log, &Scenario::baseline(), 10.0);
}

/// Site depths for the site-level covariate tests: far enough from the network mean (10)
/// that holding them at the mean moves a known-site row by many Monte Carlo errors.
const DEPTHS: [f64; 3] = [6.0, 10.5, 15.0];

fn site_level_basis() -> ForecastBasis {
    let mut b = basis();
    b.site_covariates = vec![Some(DEPTHS.to_vec())];
    b
}

fn depth_of(b: &ForecastBasis, row: &ForecastRow) -> f64 {
    match &row.site {
        Some(label) => DEPTHS[b.site_labels.iter().position(|s| s == label).unwrap()],
        None => 10.0,
    }
}

/// A covariate that is an attribute of the site: known-site rows at the site's own value,
/// new-site rows at the network mean.
#[test]
fn a_site_level_covariate_is_held_at_each_known_sites_own_value() {
    let b = site_level_basis();
    check_rows_of(&b, Transform::None, &Scenario::baseline(), |r| {
        depth_of(&b, r)
    });
    check_rows_of(&b, Transform::Log, &Scenario::baseline(), |r| {
        depth_of(&b, r)
    });
    // The public predictive follows the same rule.
    let rows = forecast_baseline(&b, Transform::None);
    let row = rows
        .iter()
        .find(|r| r.target == ForecastTarget::KnownSiteNewYear && r.site.as_deref() == Some("s1"))
        .unwrap();
    assert_eq!(
        predictive(&b, Some(0), None, &[]).unwrap().quantile(0.1),
        row.q10
    );
}

/// A scenario's value overrides the site's own value, for every row.
#[test]
fn a_scenario_value_overrides_a_site_level_covariate() {
    let scenario = Scenario {
        name: "x14".into(),
        covariates: vec![Some(14.0)],
        shifts: vec![],
    };
    check_rows_of(&site_level_basis(), Transform::None, &scenario, |_| 14.0);
}

/// A scenario's shift moves each row from the value it would otherwise use: a monitored
/// site's own value of a site-level covariate (the network mean for a new site), in the
/// rows and in their exceedance alike.
#[test]
fn a_scenario_shift_moves_each_row_from_its_own_value() {
    let b = site_level_basis();
    let scenario = Scenario {
        name: "deeper".into(),
        covariates: vec![],
        shifts: vec![2.0],
    };
    check_rows_of(&b, Transform::None, &scenario, |r| depth_of(&b, r) + 2.0);
    check_exceedance_of(&b, Transform::None, &scenario, |r| depth_of(&b, r) + 2.0);
}

/// The predictive the calibration study scores with is the one the rows come from.
#[test]
fn predictive_reproduces_the_forecast_rows_and_refuses_unknown_levels() {
    let b = basis();
    let rows = forecast_baseline(&b, Transform::None);
    let new_new = rows.last().unwrap();
    let pred = predictive(&b, None, None, &[]).unwrap();
    assert_eq!(pred.quantile(0.1), new_new.q10);
    assert!((pred.cdf(new_new.q90) - 0.9).abs() < 1e-9);
    assert!(predictive(&b, Some(3), None, &[]).is_err());
    assert!(predictive(&b, None, Some(4), &[]).is_err());
    assert!(predictive(&b, None, None, &[None, None]).is_err());
}

/// Rows name the unknown parts whose factor was seen at a single level: the prior alone
/// sets their variance. Here one site and one crew level, four years.
#[test]
fn rows_name_the_components_their_prior_alone_sets() {
    let mut b = basis();
    let n = b.n;
    b.site_labels.truncate(1);
    b.site.truncate(n);
    b.site_last_year.truncate(1);
    b.group_labels = vec![vec!["a".into()]];
    b.groups[0].truncate(n);
    let rows = forecast_baseline(&b, Transform::None);
    let names = |t: ForecastTarget| -> Vec<Vec<String>> {
        let mut v: Vec<Vec<String>> = rows
            .iter()
            .filter(|r| r.target == t)
            .map(|r| r.prior_only.clone())
            .collect();
        v.dedup();
        v
    };
    let s = |v: &[&str]| vec![v.iter().map(|x| x.to_string()).collect::<Vec<_>>()];
    assert_eq!(names(ForecastTarget::KnownSiteKnownYear), s(&["crew"]));
    assert_eq!(names(ForecastTarget::KnownSiteNewYear), s(&["crew"]));
    assert_eq!(
        names(ForecastTarget::NewSiteKnownYear),
        s(&["site", "crew"])
    );
    assert_eq!(names(ForecastTarget::NewSiteNewYear), s(&["site", "crew"]));
    // The full basis (3 sites, 4 years, 2 crews) marks nothing.
    assert!(forecast_baseline(&basis(), Transform::None)
        .iter()
        .all(|r| r.prior_only.is_empty()));
}
