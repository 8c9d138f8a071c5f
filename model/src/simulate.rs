//! Generated monitoring networks with known parameters, for tests, benchmarks and
//! simulation-based calibration. Invented data: never a substitute for a reference.

use crate::data::{Data, DataBuilder};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Shape and true parameters of a generated network.
#[derive(Debug, Clone)]
pub struct NetworkSpec {
    pub sites: usize,
    pub years: usize,
    pub visits: usize,
    /// Share of site-years without observations.
    pub missing: f64,
    pub covariates: usize,
    pub sd_residual: f64,
    pub sd_site: f64,
    pub sd_year: f64,
    pub intercept: f64,
    /// Coefficient of every covariate (each covariate ~ N(10, 2^2)).
    pub coef: f64,
    pub first_year: i32,
    pub seed: u64,
}

/// The benchmark network B1 (`model/benches/networks.rs`): 200 sites x 20 years from 2000,
/// two visits per observed site-year, 15% of site-years unobserved, two covariates with
/// coefficient 0.1, intercept 2, and sds 0.3 (residual), 0.6 (site), 0.4 (year) — sites
/// vary more than years, as in many monitoring networks. Tests override what they need,
/// usually the size and the seed.
impl Default for NetworkSpec {
    fn default() -> Self {
        NetworkSpec {
            sites: 200,
            years: 20,
            visits: 2,
            missing: 0.15,
            covariates: 2,
            sd_residual: 0.3,
            sd_site: 0.6,
            sd_year: 0.4,
            intercept: 2.0,
            coef: 0.1,
            first_year: 2000,
            seed: 7,
        }
    }
}

/// The true effects behind a generated network.
#[derive(Debug, Clone)]
pub struct Truth {
    pub site: Vec<f64>,
    pub year: Vec<f64>,
    /// Per further grouping factor ([`simulate_grouped_rows`]), the effect of each level.
    pub groups: Vec<Vec<f64>>,
}

/// One row of a generated network.
#[derive(Debug, Clone)]
pub struct Row {
    pub site: usize,
    pub year: i32,
    /// Level of each further grouping factor (empty without them).
    pub groups: Vec<usize>,
    pub covariates: Vec<f64>,
    pub y: f64,
}

/// A further grouping factor of a generated network (a crew, an instrument, a lab): each
/// visit draws one of `levels` uniformly, and level effects are `N(0, sd^2)`.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupSpec {
    pub name: String,
    pub levels: usize,
    pub sd: f64,
}

/// Generate the rows of a network (site labels `S00042`, years from `first_year`).
pub fn simulate_rows(spec: &NetworkSpec) -> (Vec<Row>, Truth) {
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
    let normal = |rng: &mut ChaCha8Rng| rng.sample::<f64, _>(StandardNormal);
    let site: Vec<f64> = (0..spec.sites)
        .map(|_| spec.sd_site * normal(&mut rng))
        .collect();
    let year: Vec<f64> = (0..spec.years)
        .map(|_| spec.sd_year * normal(&mut rng))
        .collect();
    let mut rows = Vec::new();
    for (s, a) in site.iter().enumerate() {
        for (t, b) in year.iter().enumerate() {
            if rng.gen::<f64>() < spec.missing {
                continue;
            }
            for _ in 0..spec.visits {
                let x: Vec<f64> = (0..spec.covariates)
                    .map(|_| 10.0 + 2.0 * normal(&mut rng))
                    .collect();
                let y = spec.intercept
                    + spec.coef * x.iter().sum::<f64>()
                    + a
                    + b
                    + spec.sd_residual * normal(&mut rng);
                rows.push(Row {
                    site: s,
                    year: spec.first_year + t as i32,
                    groups: Vec::new(),
                    covariates: x,
                    y,
                });
            }
        }
    }
    (
        rows,
        Truth {
            site,
            year,
            groups: Vec::new(),
        },
    )
}

/// [`simulate_rows`] with further grouping factors: each row draws a level of every factor
/// and gets its effect added. Levels and effects come from a stream of their own, so the
/// sites, years, covariates and residuals are exactly those of `simulate_rows(spec)`.
pub fn simulate_grouped_rows(spec: &NetworkSpec, groups: &[GroupSpec]) -> (Vec<Row>, Truth) {
    let (mut rows, mut truth) = simulate_rows(spec);
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
    rng.set_stream(1);
    truth.groups = groups
        .iter()
        .map(|g| {
            (0..g.levels)
                .map(|_| g.sd * rng.sample::<f64, _>(StandardNormal))
                .collect()
        })
        .collect();
    for r in &mut rows {
        for (g, effects) in groups.iter().zip(&truth.groups) {
            let level = rng.gen_range(0..g.levels.max(1) as u32) as usize;
            r.groups.push(level);
            r.y += effects[level];
        }
    }
    (rows, truth)
}

/// Level label of a generated grouping factor.
pub fn level_label(level: usize) -> String {
    format!("L{level:03}")
}

/// Rows of a generated network as a validated [`Data`] set, covariates named `x1, x2, ...`
/// and the further factors named as in `groups`.
pub fn rows_data(
    rows: &[Row],
    covariates: usize,
    groups: &[GroupSpec],
) -> Result<Data, crate::ModelError> {
    let names = (1..=covariates).map(|j| format!("x{j}")).collect();
    let mut b = DataBuilder::new(names, groups.iter().map(|g| g.name.clone()).collect());
    for r in rows {
        let labels: Vec<String> = r.groups.iter().map(|&l| level_label(l)).collect();
        let labels: Vec<&str> = labels.iter().map(|l| l.as_str()).collect();
        b.push(&site_label(r.site), r.year, &labels, &r.covariates, r.y)?;
    }
    b.build()
}

/// Site label used by generated networks.
pub fn site_label(s: usize) -> String {
    format!("S{s:05}")
}

/// Generate a network as a validated [`Data`] set.
pub fn simulate(spec: &NetworkSpec) -> (Data, Truth) {
    let (rows, truth) = simulate_rows(spec);
    let names = (1..=spec.covariates).map(|j| format!("x{j}")).collect();
    let mut b = DataBuilder::new(names, vec![]);
    for r in &rows {
        b.push(&site_label(r.site), r.year, &[], &r.covariates, r.y)
            .expect("generated rows are finite");
    }
    (
        b.build().expect("generated networks pass the guards"),
        truth,
    )
}

// ---------------------------------------------------------------------------------------
// Surveys: a network with a sampling schedule, a per-visit covariate, a grouping factor
// (e.g. field crew) drawn per visit, and several responses on their own scales. This is
// what the demo feed is made from, so every draw must be reproducible bit for bit on any
// machine: normal deviates use `libm` (not the platform's maths library) and integer
// draws use `u32` (not `usize`, whose sampling depends on the pointer width).

/// When a site of a survey is in the network.
#[derive(Debug, Clone, PartialEq)]
pub struct SurveySite {
    /// First season in the network; a site is always sampled in its first season.
    pub first_year: i32,
    /// Last season in the network, if the site is dropped.
    pub last_year: Option<i32>,
    /// Seasons the site is planned not to be sampled (on top of random skips).
    pub gaps: Vec<i32>,
    /// `(season, visits)`: seasons with a planned number of visits (1 or 2), which
    /// override the random skip and second visit; e.g. an intensive survey.
    pub planned: Vec<(i32, u32)>,
}

/// A covariate recorded at each visit:
/// `x = centre + u_year + u_site + noise`, rounded to `resolution`.
#[derive(Debug, Clone, PartialEq)]
pub struct CovariateSpec {
    pub centre: f64,
    pub sd_year: f64,
    pub sd_site: f64,
    pub sd_visit: f64,
    /// The recorded value is a multiple of this (e.g. 0.1); responses are generated from
    /// the rounded value, so the recorded covariate is exactly the one in the model.
    pub resolution: f64,
    /// The covariate enters the responses as `(x - reference)`, so each intercept is the
    /// model-scale value at the reference.
    pub reference: f64,
}

/// The scale on which a response is Gaussian.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scale {
    /// The response itself.
    Identity,
    /// The log of the response (the written value is `exp` of the model-scale value).
    Log,
}

/// One response of a survey, on its model scale:
/// `z = intercept + coef·(x − reference) + a_site + b_year + c_group + e`.
#[derive(Debug, Clone, PartialEq)]
pub struct ResponseSpec {
    pub scale: Scale,
    pub intercept: f64,
    pub coef: f64,
    pub sd_site: f64,
    pub sd_year: f64,
    /// Zero: the grouping factor has no effect on this response.
    pub sd_group: f64,
    pub sd_residual: f64,
}

/// Shape and true parameters of a survey.
#[derive(Debug, Clone, PartialEq)]
pub struct SurveySpec {
    pub sites: Vec<SurveySite>,
    pub first_year: i32,
    pub last_year: i32,
    /// Chance that an established site is not sampled in a season.
    pub p_skip: f64,
    /// Chance that a sampled site-season gets a second visit.
    pub p_second_visit: f64,
    /// Levels of the grouping factor; each visit draws one uniformly.
    pub groups: usize,
    pub covariate: CovariateSpec,
    pub responses: Vec<ResponseSpec>,
    pub seed: u64,
}

/// One generated visit.
#[derive(Debug, Clone, PartialEq)]
pub struct SurveyVisit {
    /// Index into [`SurveySpec::sites`].
    pub site: usize,
    pub year: i32,
    /// 1 or 2 within the site and season.
    pub visit: u32,
    /// Level of the grouping factor, `0..groups`.
    pub group: usize,
    /// The recorded (rounded) covariate.
    pub covariate: f64,
    /// One value per response, on the response scale (not rounded).
    pub values: Vec<f64>,
}

/// Realized effects of one component: by site, by season (from `first_year`), by group.
#[derive(Debug, Clone, PartialEq)]
pub struct Effects {
    pub site: Vec<f64>,
    pub year: Vec<f64>,
    pub group: Vec<f64>,
}

/// The realized effects behind a generated survey.
#[derive(Debug, Clone, PartialEq)]
pub struct SurveyTruth {
    /// Site and year parts of the covariate (`group` is empty).
    pub covariate: Effects,
    /// One per response, in the order of [`SurveySpec::responses`]; `group` is all zero
    /// for a response with `sd_group == 0`.
    pub responses: Vec<Effects>,
}

/// Named random streams, so that one component's draws do not shift another's.
const STREAM_EFFECTS: u64 = 1;
const STREAM_COVARIATE: u64 = 2;
const STREAM_SCHEDULE: u64 = 3;
const STREAM_VISITS: u64 = 4;

fn stream(seed: u64, id: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(id);
    rng
}

/// A standard normal deviate by the polar method, with `libm` for the logarithm so the
/// value is the same on every platform.
fn portable_normal(rng: &mut ChaCha8Rng) -> f64 {
    loop {
        let u = 2.0 * rng.gen::<f64>() - 1.0;
        let v = 2.0 * rng.gen::<f64>() - 1.0;
        let s = u * u + v * v;
        if s > 0.0 && s < 1.0 {
            return u * libm::sqrt(-2.0 * libm::log(s) / s);
        }
    }
}

fn round_to(x: f64, resolution: f64) -> f64 {
    // Dividing by the resolution's reciprocal keeps e.g. 0.1 steps exact decimals
    // (21.3, not 21.300000000000001) after the round.
    let steps = libm::round(x / resolution);
    let inverse = libm::round(1.0 / resolution);
    if inverse >= 1.0 && (1.0 / inverse - resolution).abs() < 1e-12 {
        steps / inverse
    } else {
        steps * resolution
    }
}

/// Generate a survey: visits in season order, then site order, then visit number.
///
/// # Panics
/// On a spec that cannot describe a survey (no seasons, no groups, negative sds,
/// probabilities outside `[0, 1]`, a non-positive resolution, a planned season outside
/// its site's seasons). Specs are written by
/// programmers, not read from feeds.
pub fn simulate_survey(spec: &SurveySpec) -> (Vec<SurveyVisit>, SurveyTruth) {
    assert!(spec.last_year >= spec.first_year, "a survey needs a season");
    assert!(spec.groups >= 1, "a survey needs at least one group level");
    assert!(u32::try_from(spec.groups).is_ok(), "too many group levels");
    assert!((0.0..=1.0).contains(&spec.p_skip) && (0.0..=1.0).contains(&spec.p_second_visit));
    assert!(
        spec.covariate.resolution > 0.0,
        "resolution must be positive"
    );
    assert!(
        spec.sites
            .iter()
            .flat_map(|s| &s.planned)
            .all(|(_, n)| (1..=2).contains(n)),
        "a planned season has 1 or 2 visits"
    );
    for site in &spec.sites {
        for (year, _) in &site.planned {
            assert!(
                *year >= site.first_year
                    && !matches!(site.last_year, Some(last) if *year > last)
                    && !site.gaps.contains(year),
                "a planned season {year} lies outside its site's seasons"
            );
        }
    }
    let c = &spec.covariate;
    for sd in [c.sd_year, c.sd_site, c.sd_visit].into_iter().chain(
        spec.responses
            .iter()
            .flat_map(|r| [r.sd_site, r.sd_year, r.sd_group, r.sd_residual]),
    ) {
        assert!(
            sd >= 0.0 && sd.is_finite(),
            "sds must be finite and non-negative"
        );
    }
    let n_years = (spec.last_year - spec.first_year + 1) as usize;
    let n_sites = spec.sites.len();

    let mut rng = stream(spec.seed, STREAM_EFFECTS);
    let draw = |n: usize, sd: f64, rng: &mut ChaCha8Rng| -> Vec<f64> {
        (0..n).map(|_| sd * portable_normal(rng)).collect()
    };
    let responses: Vec<Effects> = spec
        .responses
        .iter()
        .map(|r| Effects {
            site: draw(n_sites, r.sd_site, &mut rng),
            year: draw(n_years, r.sd_year, &mut rng),
            group: draw(spec.groups, r.sd_group, &mut rng),
        })
        .collect();
    let mut rng = stream(spec.seed, STREAM_COVARIATE);
    let covariate = Effects {
        year: draw(n_years, c.sd_year, &mut rng),
        site: draw(n_sites, c.sd_site, &mut rng),
        group: Vec::new(),
    };

    let mut schedule = stream(spec.seed, STREAM_SCHEDULE);
    let mut rng = stream(spec.seed, STREAM_VISITS);
    let mut visits = Vec::new();
    for (t, year) in (spec.first_year..=spec.last_year).enumerate() {
        for (s, site) in spec.sites.iter().enumerate() {
            let active =
                year >= site.first_year && !matches!(site.last_year, Some(last) if year > last);
            if !active || site.gaps.contains(&year) {
                continue;
            }
            // Both draws are made for every active site-season, so a change of p_skip
            // does not shift which site-seasons get a second visit.
            let skip = schedule.gen::<f64>() < spec.p_skip;
            let second = schedule.gen::<f64>() < spec.p_second_visit;
            let n = match site.planned.iter().find(|(y, _)| *y == year) {
                Some((_, n)) => *n,
                None if year > site.first_year && skip => continue,
                None => 1 + u32::from(second),
            };
            for visit in 1..=n {
                let group = rng.gen_range(0..spec.groups as u32) as usize;
                let x = round_to(
                    c.centre
                        + covariate.year[t]
                        + covariate.site[s]
                        + c.sd_visit * portable_normal(&mut rng),
                    c.resolution,
                );
                let values = spec
                    .responses
                    .iter()
                    .zip(&responses)
                    .map(|(r, e)| {
                        let z = r.intercept
                            + r.coef * (x - c.reference)
                            + e.site[s]
                            + e.year[t]
                            + e.group[group]
                            + r.sd_residual * portable_normal(&mut rng);
                        match r.scale {
                            Scale::Identity => z,
                            Scale::Log => libm::exp(z),
                        }
                    })
                    .collect();
                visits.push(SurveyVisit {
                    site: s,
                    year,
                    visit,
                    group,
                    covariate: x,
                    values,
                });
            }
        }
    }
    (
        visits,
        SurveyTruth {
            covariate,
            responses,
        },
    )
}

/// Group label used by [`survey_data`].
pub fn group_label(g: usize) -> String {
    format!("G{g:02}")
}

/// One response of a survey as a [`Data`] set on its model scale, with the covariate
/// entered as `(x − reference)` and, when the response has a group effect, the grouping
/// factor named `group`.
pub fn survey_data(
    spec: &SurveySpec,
    visits: &[SurveyVisit],
    response: usize,
) -> Result<Data, crate::ModelError> {
    let r = &spec.responses[response];
    let grouped = r.sd_group > 0.0;
    let groups = if grouped {
        vec!["group".to_string()]
    } else {
        vec![]
    };
    let mut b = DataBuilder::new(vec!["x".to_string()], groups);
    for v in visits {
        let label = group_label(v.group);
        let g: &[&str] = if grouped { &[&label] } else { &[] };
        let z = match r.scale {
            Scale::Identity => v.values[response],
            Scale::Log => libm::log(v.values[response]),
        };
        b.push(
            &site_label(v.site),
            v.year,
            g,
            &[v.covariate - spec.covariate.reference],
            z,
        )?;
    }
    b.build()
}

/// How a generated observer factor ([`simulate_observer_rows`]) assigns observers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ObserverAssignment {
    /// Each observer covers a block of neighbouring sites for a period and moves one block
    /// along at the next period (volunteers taking over the next survey squares).
    Blocks,
    /// Each (block, period) gets an observer drawn uniformly: the same counts, no locality.
    Random,
}

/// An observer factor of `levels` observers (effects `N(0, sd^2)`): sites are cut into
/// contiguous blocks of `min(10, site-periods / levels)` sites, years into periods of
/// `period_years`, and one observer covers each (block, period).
#[derive(Debug, Clone, PartialEq)]
pub struct ObserverSpec {
    pub levels: usize,
    pub period_years: usize,
    pub sd: f64,
    pub assignment: ObserverAssignment,
}

/// [`simulate_rows`] plus a factor named `observer` laid out as `observers` says. The
/// sites, years, covariates and residuals are exactly those of `simulate_rows(spec)`.
pub fn simulate_observer_rows(spec: &NetworkSpec, observers: &ObserverSpec) -> (Vec<Row>, Truth) {
    let (mut rows, mut truth) = simulate_rows(spec);
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
    rng.set_stream(2);
    let levels = observers.levels.max(1);
    let periods = spec.years.div_ceil(observers.period_years.max(1)).max(1);
    let block = (spec.sites * periods / levels).clamp(1, 10);
    let blocks = spec.sites.div_ceil(block);
    let slots = blocks * periods;
    // Slot order walks the diagonals (block - period): consecutive slots, and so one
    // observer's slots, are the same block line moving one block per period.
    let slot_observer: Vec<usize> = match observers.assignment {
        ObserverAssignment::Blocks => (0..slots)
            .map(|k| {
                let (b, t) = (k / periods, k % periods);
                let diagonal = (b + blocks - t % blocks) % blocks;
                (diagonal * periods + t) * levels / slots
            })
            .collect(),
        ObserverAssignment::Random => (0..slots)
            .map(|_| rng.gen_range(0..levels as u32) as usize)
            .collect(),
    };
    let effects: Vec<f64> = (0..levels)
        .map(|_| observers.sd * rng.sample::<f64, _>(StandardNormal))
        .collect();
    for r in &mut rows {
        let t = (r.year - spec.first_year) as usize / observers.period_years.max(1);
        let o = slot_observer[(r.site / block) * periods + t.min(periods - 1)];
        r.groups.push(o);
        r.y += effects[o];
    }
    truth.groups = vec![effects];
    (rows, truth)
}

/// [`simulate_observer_rows`] as a validated [`Data`] set: covariates `x1, x2, ...` and
/// the factor `observer`.
pub fn observer_data(
    spec: &NetworkSpec,
    observers: &ObserverSpec,
) -> Result<Data, crate::ModelError> {
    let (rows, _) = simulate_observer_rows(spec, observers);
    let group = GroupSpec {
        name: "observer".into(),
        levels: observers.levels,
        sd: observers.sd,
    };
    rows_data(&rows, spec.covariates, &[group])
}

/// `data` with every value on `side` of the empirical `share` quantile of the response
/// delivered as censored at that limit (benchmarks and demonstrations; a limit taken from
/// the data is not what a laboratory does, but it fixes the censored share). Returns the
/// censored data and the limit.
pub fn censor_share(data: &Data, side: crate::Censoring, share: f64) -> (Data, f64) {
    let mut sorted = data.response.clone();
    sorted.sort_by(f64::total_cmp);
    let at = |p: f64| {
        let k = ((sorted.len() as f64 * p) as usize).min(sorted.len() - 1);
        sorted[k]
    };
    let limit = match side {
        crate::Censoring::Below => at(share),
        crate::Censoring::Above => at(1.0 - share),
    };
    let mut out = data.clone();
    out.censored.clear();
    for (i, y) in out.response.iter_mut().enumerate() {
        let beyond = match side {
            crate::Censoring::Below => *y < limit,
            crate::Censoring::Above => *y > limit,
        };
        if beyond {
            *y = limit;
            out.censored.push((i as u32, side));
        }
    }
    (out, limit)
}
