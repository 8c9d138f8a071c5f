//! Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
//! arXiv:1804.06788): draw parameters from the prior, data from the model, fit, and take
//! the rank of each true value among thinned posterior draws. With an exact sampler the
//! ranks are uniform; a chi-square test of the rank histogram checks it.

use crate::data::{Censoring, DataBuilder};
use crate::error::ModelError;
use crate::posterior::sample;
use crate::priors::{NormalPrior, Priors, SdPrior};
use crate::sampler::{Controls, SamplerSettings};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Design and priors of an SBC study.
#[derive(Debug, Clone)]
pub struct SbcSpec {
    pub sites: usize,
    pub years: usize,
    pub visits: usize,
    /// Prior on residual, site and year sds alike.
    pub sd_prior: SdPrior,
    pub intercept: NormalPrior,
    pub coefficient: NormalPrior,
    /// Posterior draws kept per replicate (ranks run 0..=kept).
    pub kept: usize,
    /// Values on this side of this limit are delivered censored. The limit is fixed by
    /// the design, not by the parameters or the data, so the censoring is ignorable and
    /// the censored likelihood is the right one.
    pub censor: Option<(Censoring, f64)>,
    pub settings: SamplerSettings,
}

impl Default for SbcSpec {
    fn default() -> Self {
        SbcSpec {
            sites: 12,
            years: 6,
            visits: 2,
            sd_prior: SdPrior::HalfNormal { scale: 0.5 },
            intercept: NormalPrior { mean: 1.0, sd: 1.0 },
            coefficient: NormalPrior { mean: 0.0, sd: 0.5 },
            kept: 99,
            censor: None,
            settings: SamplerSettings {
                chains: 2,
                draws: 500,
                warmup: 300,
                effect_draws: 5,
                threads: 1,
                ..Default::default()
            },
        }
    }
}

/// The quantities ranked, in order.
pub const SBC_QUANTITIES: [&str; 5] = ["sd residual", "sd site", "sd year", "intercept", "coef x"];

/// What one replicate gives.
#[derive(Debug, Clone)]
pub struct Replicate {
    /// Ranks of the true values of [`SBC_QUANTITIES`].
    pub ranks: Vec<usize>,
    pub censored: usize,
    pub observations: usize,
}

/// One replicate: ranks of the true values of [`SBC_QUANTITIES`].
pub fn sbc_replicate(spec: &SbcSpec, seed: u64) -> Result<Replicate, ModelError> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let sd_resid = spec.sd_prior.sample(&mut rng);
    let sd_site = spec.sd_prior.sample(&mut rng);
    let sd_year = spec.sd_prior.sample(&mut rng);
    let z = |rng: &mut ChaCha8Rng| rng.sample::<f64, _>(StandardNormal);
    // The intercept prior is on the mean at average covariates and the coefficient prior
    // on the standardised covariate (population sd): simulate in exactly those terms.
    let intercept = spec.intercept.mean + spec.intercept.sd * z(&mut rng);
    let coef_std = spec.coefficient.mean + spec.coefficient.sd * z(&mut rng);
    let site: Vec<f64> = (0..spec.sites).map(|_| sd_site * z(&mut rng)).collect();
    let year: Vec<f64> = (0..spec.years).map(|_| sd_year * z(&mut rng)).collect();
    let mut rows = Vec::new();
    for s in 0..spec.sites {
        for t in 0..spec.years {
            for _ in 0..spec.visits {
                rows.push((s, t, 5.0 + 2.0 * z(&mut rng), z(&mut rng)));
            }
        }
    }
    let n = rows.len() as f64;
    let mean_x = rows.iter().map(|r| r.2).sum::<f64>() / n;
    let sd_x = (rows.iter().map(|r| (r.2 - mean_x).powi(2)).sum::<f64>() / n).sqrt();
    let mut b = DataBuilder::new(vec!["x".into()], vec![]);
    for &(s, t, x, e) in &rows {
        let y = intercept + coef_std * (x - mean_x) / sd_x + site[s] + year[t] + sd_resid * e;
        let site = format!("s{s}");
        match spec.censor {
            Some((Censoring::Below, limit)) if y < limit => {
                b.push_censored(&site, 2000 + t as i32, &[], &[x], Censoring::Below, limit)?
            }
            Some((Censoring::Above, limit)) if y > limit => {
                b.push_censored(&site, 2000 + t as i32, &[], &[x], Censoring::Above, limit)?
            }
            _ => b.push(&site, 2000 + t as i32, &[], &[x], y)?,
        }
    }
    let data = b.build()?;
    let priors = Priors {
        residual_sd: Some(spec.sd_prior),
        site_sd: Some(spec.sd_prior),
        year_sd: Some(spec.sd_prior),
        group_sd: None,
        intercept: Some(spec.intercept),
        coefficients: Some(spec.coefficient),
    };
    let settings = SamplerSettings {
        seed: seed ^ 0x5bc,
        ..spec.settings.clone()
    };
    let post = sample(&data, &priors, &settings, None, Controls::default())?;
    let truth = [
        sd_resid,
        sd_site,
        sd_year,
        intercept - coef_std * mean_x / sd_x,
        coef_std / sd_x,
    ];
    let total = post.chains * post.draws;
    let step = (total / spec.kept).max(1);
    let ranks: Vec<usize> = truth
        .iter()
        .enumerate()
        .map(|(q, &true_value)| {
            let draws: Vec<f64> = match q {
                0..=2 => post.sd_chains(q).concat(),
                _ => post.coef_chains(q - 3).concat(),
            };
            draws
                .iter()
                .step_by(step)
                .take(spec.kept)
                .filter(|&&d| d < true_value)
                .count()
        })
        .collect();
    Ok(Replicate {
        ranks,
        censored: data.n_censored(),
        observations: data.n_obs(),
    })
}

/// Chi-square test of uniformity of ranks in `0..=max_rank`, pooled into `bins` bins.
/// Returns the bin counts, the statistic and its p-value.
pub fn rank_uniformity(ranks: &[usize], max_rank: usize, bins: usize) -> (Vec<usize>, f64, f64) {
    let mut counts = vec![0usize; bins];
    for &r in ranks {
        counts[(r * bins / (max_rank + 1)).min(bins - 1)] += 1;
    }
    let expected = ranks.len() as f64 / bins as f64;
    let stat = counts
        .iter()
        .map(|&c| (c as f64 - expected).powi(2) / expected)
        .sum::<f64>();
    let p = ChiSquared::new((bins - 1) as f64).map_or(f64::NAN, |d| 1.0 - d.cdf(stat));
    (counts, stat, p)
}
