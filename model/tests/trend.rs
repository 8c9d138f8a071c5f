//! The network trend (`DataBuilder::with_trend`): a fixed linear term in `year - origin`
//! recovered on a generated network with a known trend, forecasts that put each new year
//! on the trend line (checked against the draws directly), intervals that widen with the
//! horizon, and a horizon of one equal to today's rows. Invented data.

use tidemark_model::simulate::{simulate_rows, site_label, NetworkSpec};
use tidemark_model::*;

const TRUE_TREND: f64 = 0.03;
const ORIGIN: i32 = 2000;

/// 60 sites x 12 years from 2000 with a trend of 0.03 per year added to every value.
fn trending() -> (Data, Data) {
    let spec = NetworkSpec {
        sites: 60,
        years: 12,
        covariates: 1,
        sd_year: 0.15,
        seed: 33,
        ..Default::default()
    };
    let (rows, _) = simulate_rows(&spec);
    let names = vec!["x1".to_string()];
    let mut with = DataBuilder::new(names.clone(), vec![]).with_trend(ORIGIN);
    let mut without = DataBuilder::new(names, vec![]);
    for r in &rows {
        let y = r.y + TRUE_TREND * f64::from(r.year - ORIGIN);
        with.push(&site_label(r.site), r.year, &[], &r.covariates, y)
            .unwrap();
        without
            .push(&site_label(r.site), r.year, &[], &r.covariates, y)
            .unwrap();
    }
    (with.build().unwrap(), without.build().unwrap())
}

fn fit(data: &Data) -> Posterior {
    let settings = SamplerSettings {
        seed: 9,
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

#[test]
fn the_trend_is_recovered_and_new_years_lie_on_the_trend_line() {
    let (data, _) = trending();
    assert_eq!(data.trend_origin(), Some(ORIGIN));
    assert_eq!(data.covariate_names(), ["x1", TREND]);
    let post = fit(&data);
    let s = post.summary(SummaryKind::Coef, TREND, None).unwrap();
    assert!(
        s.q05 < TRUE_TREND && TRUE_TREND < s.q95,
        "trend 90% interval {:.4}..{:.4}",
        s.q05,
        s.q95
    );
    assert!(post.diagnostics.max_rhat < 1.01);

    // Each new-site row's mean is the mixture mean: per draw, the intercept and the
    // covariate at its network mean plus the trend at the row's year (a direct
    // computation from the draws, not the forecast code's fixed part).
    let basis = post.forecast_basis(usize::MAX);
    let rows = forecast_to(&basis, Transform::None, &Scenario::baseline(), 3);
    let p = basis.coef_names.len();
    for year in [2012, 2013, 2014] {
        let row = rows
            .iter()
            .find(|r| r.target == ForecastTarget::NewSiteNewYear && r.year == year)
            .unwrap();
        let direct: f64 = (0..basis.n)
            .map(|d| {
                let c = &basis.coef[d * p..(d + 1) * p];
                c[0] + c[1] * basis.covariate_means[0] + c[2] * f64::from(year - ORIGIN)
            })
            .sum::<f64>()
            / basis.n as f64;
        assert!(
            (row.mean - direct).abs() < 1e-9,
            "{year}: {} vs {direct}",
            row.mean
        );
    }
}

#[test]
fn intervals_widen_with_the_horizon_and_one_year_ahead_equals_todays_rows() {
    let (data, _) = trending();
    let post = fit(&data);
    let basis = post.forecast_basis(usize::MAX);
    let today = forecast(&basis, Transform::None, &Scenario::baseline());
    let one = forecast_to(&basis, Transform::None, &Scenario::baseline(), 1);
    assert_eq!(today, one);
    let rows = forecast_to(&basis, Transform::None, &Scenario::baseline(), 5);
    let width = |target: ForecastTarget, site: Option<&str>, year: i32| {
        let r = rows
            .iter()
            .find(|r| r.target == target && r.site.as_deref() == site && r.year == year)
            .unwrap();
        r.q975 - r.q025
    };
    let site = basis.site_labels[0].as_str();
    for (target, s) in [
        (ForecastTarget::NewSiteNewYear, None),
        (ForecastTarget::KnownSiteNewYear, Some(site)),
    ] {
        let widths: Vec<f64> = (2012..=2016).map(|y| width(target, s, y)).collect();
        assert!(
            widths.windows(2).all(|w| w[1] > w[0]),
            "{target:?}: widths {widths:?}"
        );
    }
    // Without a trend every new year has the same predictive distribution.
    let (_, flat) = trending();
    let post = fit(&flat);
    let basis = post.forecast_basis(usize::MAX);
    let rows = forecast_to(&basis, Transform::None, &Scenario::baseline(), 3);
    let new_site: Vec<&ForecastRow> = rows
        .iter()
        .filter(|r| r.target == ForecastTarget::NewSiteNewYear)
        .collect();
    assert_eq!(new_site.len(), 3);
    assert!(new_site
        .windows(2)
        .all(|w| (w[0].q50 - w[1].q50).abs() < 1e-12 && w[1].year == w[0].year + 1));
}

#[test]
fn a_trend_needs_two_years() {
    let mut b = DataBuilder::new(vec![], vec![]).with_trend(ORIGIN);
    for s in 0..8 {
        b.push(&format!("s{s}"), 2005, &[], &[], s as f64 * 0.3 + 1.0)
            .unwrap();
    }
    assert_eq!(b.build().unwrap_err(), ModelError::TrendNeedsYears);
}

/// Exceedance of a trend series' rows puts each row at its own year: the probability of
/// exceeding a row's own median is one half for every year of the horizon.
#[test]
fn exceedance_follows_the_trend_line() {
    let (data, _) = trending();
    let post = fit(&data);
    let basis = post.forecast_basis(usize::MAX);
    let rows = forecast_to(&basis, Transform::None, &Scenario::baseline(), 4);
    for row in rows
        .iter()
        .filter(|r| r.target == ForecastTarget::NewSiteNewYear)
    {
        let p = exceedance(
            &basis,
            Transform::None,
            &Scenario::baseline(),
            std::slice::from_ref(row),
            &[row.q50],
        )
        .unwrap();
        assert!((p[0][0] - 0.5).abs() < 1e-6, "{}: {}", row.year, p[0][0]);
    }
}
