//! Forecast calibration by target on generated networks with a known truth.
//!
//! A network is generated, then a share of its sites and its final year are held out;
//! the model is fitted to the rest, and every held-out value is scored against the
//! forecast of its target:
//! - `known_site_known_year`: one visit held out of some observed site-years of kept sites;
//! - `known_site_new_year`: kept sites in the final year;
//! - `new_site_known_year`: held-out sites in the fitted years;
//! - `new_site_new_year`: held-out sites in the final year.
//!
//! Every forecast is the production predictive ([`crate::forecast::predictive`]) at the
//! held-out visit's own covariate value. A value is covered at level `c` when its probability integral transform `F(y)` under
//! the forecast lies in `[(1-c)/2, (1+c)/2]` — the same as falling inside the central
//! interval. Next to each empirical coverage stands the coverage that the *true*
//! generating model reaches on the very same held-out values (the fair yardstick: a single
//! realised year drives all new-year values of a replicate, so even a perfect forecaster
//! does not cover 80% of them in any one network).

use crate::data::DataBuilder;
use crate::error::ModelError;
use crate::forecast::{predictive, ForecastTarget};
use crate::normal::{inverse_normal, norm_cdf};
use crate::posterior::sample;
use crate::priors::Priors;
use crate::sampler::{Controls, SamplerSettings};
use crate::simulate::site_label;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Interval levels scored.
pub const LEVELS: [f64; 3] = [0.5, 0.8, 0.95];

/// The generated network and the hold-out design.
#[derive(Debug, Clone)]
pub struct CalibrationSpec {
    pub sites: usize,
    pub years: usize,
    pub visits: usize,
    pub sd_residual: f64,
    pub sd_site: f64,
    pub sd_year: f64,
    pub intercept: f64,
    pub coef: f64,
    /// Share of sites held out as "new".
    pub holdout_sites: f64,
    /// Share of kept site-years with one visit held out.
    pub holdout_visits: f64,
    pub settings: SamplerSettings,
}

impl Default for CalibrationSpec {
    fn default() -> Self {
        CalibrationSpec {
            sites: 60,
            years: 10,
            visits: 2,
            sd_residual: 0.3,
            sd_site: 0.5,
            sd_year: 0.5,
            intercept: 1.0,
            coef: 0.1,
            holdout_sites: 0.25,
            holdout_visits: 0.15,
            settings: SamplerSettings {
                chains: 2,
                draws: 500,
                warmup: 300,
                effect_draws: 100,
                threads: 1,
                ..SamplerSettings::default()
            },
        }
    }
}

/// Coverage counts of one target.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Coverage {
    pub n: usize,
    /// Held-out values inside the fitted forecast's interval, per level of [`LEVELS`].
    pub fitted: [usize; 3],
    /// Held-out values inside the true model's interval, per level.
    pub truth: [usize; 3],
    /// Sum of the fitted 80% interval widths (model scale), for average widths.
    pub width80: f64,
    /// Sum of the true model's 80% interval widths on the same values.
    pub width80_truth: f64,
}

impl Coverage {
    pub fn add(&mut self, other: &Coverage) {
        self.n += other.n;
        for i in 0..3 {
            self.fitted[i] += other.fitted[i];
            self.truth[i] += other.truth[i];
        }
        self.width80 += other.width80;
        self.width80_truth += other.width80_truth;
    }
    pub fn rate(&self, level: usize) -> (f64, f64) {
        let n = self.n.max(1) as f64;
        (self.fitted[level] as f64 / n, self.truth[level] as f64 / n)
    }
    /// Mean fitted 80% width over the true model's on the same values.
    pub fn width_ratio(&self) -> f64 {
        self.width80 / self.width80_truth
    }
}

/// The four targets in a fixed order.
pub const TARGETS: [ForecastTarget; 4] = [
    ForecastTarget::KnownSiteKnownYear,
    ForecastTarget::KnownSiteNewYear,
    ForecastTarget::NewSiteKnownYear,
    ForecastTarget::NewSiteNewYear,
];

struct Held {
    target: usize,
    site: usize,
    year: usize,
    x: f64,
    y: f64,
}

fn covered(pit: f64) -> [bool; 3] {
    LEVELS.map(|c| pit >= (1.0 - c) / 2.0 && pit <= (1.0 + c) / 2.0)
}

/// One replicate: coverage per target, in the order of [`TARGETS`].
pub fn calibration_replicate(
    spec: &CalibrationSpec,
    seed: u64,
) -> Result<[Coverage; 4], ModelError> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let z = |rng: &mut ChaCha8Rng| rng.sample::<f64, _>(StandardNormal);
    let site: Vec<f64> = (0..spec.sites)
        .map(|_| spec.sd_site * z(&mut rng))
        .collect();
    let year: Vec<f64> = (0..spec.years)
        .map(|_| spec.sd_year * z(&mut rng))
        .collect();
    let n_new = ((spec.sites as f64) * spec.holdout_sites).round() as usize;
    let last = spec.years - 1;
    let mut builder = DataBuilder::new(vec!["x".into()], vec![]);
    let mut held = Vec::new();
    for (s, a) in site.iter().enumerate() {
        let new_site = s < n_new;
        for (t, b) in year.iter().enumerate() {
            let hold_one = !new_site && t < last && rng.gen::<f64>() < spec.holdout_visits;
            for v in 0..spec.visits {
                let x = 10.0 + 2.0 * z(&mut rng);
                let y = spec.intercept + spec.coef * x + a + b + spec.sd_residual * z(&mut rng);
                let target = match (new_site, t == last) {
                    (false, false) if hold_one && v == 0 => Some(0),
                    (false, false) => None,
                    (false, true) => Some(1),
                    (true, false) => Some(2),
                    (true, true) => Some(3),
                };
                match target {
                    None => builder.push(&site_label(s), 2000 + t as i32, &[], &[x], y)?,
                    Some(target) => held.push(Held {
                        target,
                        site: s,
                        year: t,
                        x,
                        y,
                    }),
                }
            }
        }
    }
    let data = builder.build()?;
    let settings = SamplerSettings {
        seed: seed ^ 0xca1,
        ..spec.settings.clone()
    };
    let post = sample(
        &data,
        &Priors::default(),
        &settings,
        None,
        Controls::default(),
    )?;
    let basis = post.forecast_basis(usize::MAX);
    let site_index = |s: usize| basis.site_labels.binary_search(&site_label(s)).ok();
    let year_index = |t: usize| basis.year_labels.binary_search(&(2000 + t as i32)).ok();
    let mut out: [Coverage; 4] = Default::default();
    for h in &held {
        let known_site = site_index(h.site).filter(|_| h.target < 2);
        let known_year = year_index(h.year).filter(|_| h.target == 0 || h.target == 2);
        // The production predictive, at the held-out visit's own covariate value.
        let pred = predictive(&basis, known_site, known_year, &[Some(h.x)])?;
        let width = pred.quantile(0.9) - pred.quantile(0.1);
        let pit = pred.cdf(h.y);
        // The true model: known parts at their true values, unknown parts integrated.
        let mut t_mean = spec.intercept + spec.coef * h.x;
        let mut t_var = spec.sd_residual.powi(2);
        if h.target < 2 {
            t_mean += site[h.site];
        } else {
            t_var += spec.sd_site.powi(2);
        }
        if h.target == 0 || h.target == 2 {
            t_mean += year[h.year];
        } else {
            t_var += spec.sd_year.powi(2);
        }
        let pit_true = norm_cdf((h.y - t_mean) / t_var.sqrt());
        let c = &mut out[h.target];
        c.n += 1;
        c.width80 += width;
        c.width80_truth += 2.0 * inverse_normal(0.9) * t_var.sqrt();
        for (i, (a, b)) in covered(pit).iter().zip(covered(pit_true)).enumerate() {
            c.fitted[i] += *a as usize;
            c.truth[i] += b as usize;
        }
    }
    Ok(out)
}
