//! The survey simulator: a schedule that respects the network's history, reproducible
//! draws for a seed, and truth that REML recovers.

use tidemark_model::simulate::{
    simulate_survey, survey_data, CovariateSpec, ResponseSpec, Scale, SurveySite, SurveySpec,
};
use tidemark_model::{fit_point, Method};

fn spec(sites: usize, seed: u64) -> SurveySpec {
    SurveySpec {
        sites: (0..sites)
            .map(|s| SurveySite {
                first_year: 2000 + (s % 5) as i32,
                last_year: (s % 7 == 3).then_some(2008),
                gaps: if s % 11 == 0 {
                    vec![2010, 2011]
                } else {
                    vec![]
                },
                planned: if s % 4 == 1 && s % 7 != 3 {
                    vec![(2012, 2), (2013, 1)]
                } else {
                    vec![]
                },
            })
            .collect(),
        first_year: 2000,
        last_year: 2019,
        p_skip: 0.1,
        p_second_visit: 0.5,
        groups: 12,
        covariate: CovariateSpec {
            centre: 21.0,
            sd_year: 1.0,
            sd_site: 0.8,
            sd_visit: 1.2,
            resolution: 0.1,
            reference: 20.0,
        },
        responses: vec![
            ResponseSpec {
                scale: Scale::Log,
                intercept: 2.0,
                coef: 0.06,
                sd_site: 0.55,
                sd_year: 0.25,
                sd_group: 0.0,
                sd_residual: 0.3,
            },
            ResponseSpec {
                scale: Scale::Identity,
                intercept: 3.0,
                coef: -0.05,
                sd_site: 0.35,
                sd_year: 0.6,
                sd_group: 0.3,
                sd_residual: 0.25,
            },
        ],
        seed,
    }
}

#[test]
#[should_panic(expected = "outside its site's seasons")]
fn a_planned_season_outside_the_sites_seasons_is_refused() {
    let mut s = spec(10, 1);
    s.sites[0].gaps = vec![2012];
    s.sites[0].planned = vec![(2012, 1)];
    simulate_survey(&s);
}

#[test]
fn a_seed_gives_the_same_survey_and_another_seed_a_different_one() {
    let (a, ta) = simulate_survey(&spec(30, 5));
    let (b, tb) = simulate_survey(&spec(30, 5));
    assert_eq!(a, b);
    assert_eq!(ta, tb);
    let (c, _) = simulate_survey(&spec(30, 6));
    assert_ne!(a, c);
}

#[test]
fn the_schedule_follows_each_sites_history() {
    let s = spec(40, 9);
    let (visits, truth) = simulate_survey(&s);
    for (i, site) in s.sites.iter().enumerate() {
        let mine: Vec<_> = visits.iter().filter(|v| v.site == i).collect();
        assert!(
            mine.iter()
                .any(|v| v.year == site.first_year && v.visit == 1),
            "site {i} is sampled in its first season"
        );
        for v in &mine {
            assert!(v.year >= site.first_year);
            assert!(!matches!(site.last_year, Some(l) if v.year > l));
            assert!(!site.gaps.contains(&v.year));
            // A second visit only follows a first one.
            if v.visit == 2 {
                assert!(mine.iter().any(|w| w.year == v.year && w.visit == 1));
            }
            assert!(v.visit == 1 || v.visit == 2);
            assert!(v.group < s.groups);
            let tenths = v.covariate * 10.0;
            assert_eq!(tenths, tenths.round(), "recorded at 0.1: {}", v.covariate);
            assert!(v.values[0] > 0.0, "a log-scale response is positive");
        }
    }
    // Planned seasons have exactly their planned visits, whatever the random draws.
    for (i, site) in s.sites.iter().enumerate() {
        for &(year, n) in &site.planned {
            let got = visits
                .iter()
                .filter(|v| v.site == i && v.year == year)
                .count();
            assert_eq!(got, n as usize, "site {i} in {year}");
        }
    }
    assert!(s.sites.iter().any(|x| !x.planned.is_empty()));
    // Some site-seasons are skipped, some get a second visit.
    let second = visits.iter().filter(|v| v.visit == 2).count();
    let first = visits.len() - second;
    assert!(
        second > first / 3 && second < first * 2 / 3,
        "{second} of {first}"
    );
    assert!(truth.responses[0].group.iter().all(|g| *g == 0.0));
    assert_eq!(truth.responses[1].group.len(), s.groups);
}

fn population_sd(x: &[f64]) -> f64 {
    let m = x.iter().sum::<f64>() / x.len() as f64;
    (x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / x.len() as f64).sqrt()
}

#[test]
fn reml_recovers_the_realized_effects_of_each_response() {
    let s = spec(150, 3);
    let (visits, truth) = simulate_survey(&s);
    for (k, r) in s.responses.iter().enumerate() {
        let data = survey_data(&s, &visits, k).unwrap();
        let fit = fit_point(&data, Method::Reml).unwrap();
        let e = &truth.responses[k];
        let mut checks = vec![
            ("residual", r.sd_residual, 0.05),
            ("site", population_sd(&e.site), 0.15),
            ("year", population_sd(&e.year), 0.25),
        ];
        if r.sd_group > 0.0 {
            checks.push(("group", population_sd(&e.group), 0.35));
        }
        for (term, want, tol) in checks {
            let got = fit.sd_of(term).unwrap();
            assert!(
                (got / want - 1.0).abs() < tol,
                "response {k} {term}: REML {got:.3}, realized {want:.3}"
            );
        }
        let coef = &fit.coef[1];
        assert!(
            (coef.estimate - r.coef).abs() < 3.0 * coef.se,
            "response {k}: coef {} ± {}, true {}",
            coef.estimate,
            coef.se,
            r.coef
        );
    }
}
