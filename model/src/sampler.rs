//! The sampler: a marginal Metropolis–Hastings chain on the log standard deviations,
//! followed by an exact joint Gaussian draw of all location parameters.
//!
//! The chain's state is `eta = log sd` alone, and its target is the marginal posterior of
//! `eta`, with every location parameter (intercept, coefficients, site, year and group
//! effects) integrated out analytically (`marginal`). At each saved state all location
//! parameters are then drawn jointly and exactly from their Gaussian conditional given
//! `eta`, so a saved draw is a draw of the full joint posterior whenever the chain on
//! `eta` is, and the location parameters mix exactly as fast as `eta` does. Nothing is
//! updated block by block: this is not a Gibbs sampler. Related work, not the method used
//! (recalled from memory; references in docs/architecture.md): collapsed Gibbs sampling
//! (Liu 1994) and collapsed and blocked Gibbs samplers for crossed random effects
//! (Papaspiliopoulos, Roberts & Zanella 2020); the closest construction is the one-block
//! update of hyperparameters and a Gaussian field of Knorr-Held & Rue (2002).
//!
//! Each transition is one of two Metropolis–Hastings kernels, chosen at random (a mixture
//! of kernels that each leave the posterior invariant leaves it invariant too):
//! - an *independence* proposal, a multivariate Student-t (5 df) centred on a Laplace
//!   fit (when warm-started: with the previous version's covariance, `warm.rs`),
//!   re-fitted to the chain's own warm-up draws (when warm-started, only once they hold
//!   enough effective draws); close to the posterior it moves in one step anywhere;
//! - an *adaptive random walk* (Haario, Saksman & Tamminen 2001) with the covariance of
//!   the same fit, scale tuned towards acceptance 0.3 during warm-up; it keeps the chain
//!   moving in the tails where the independence proposal is thin.
//!
//! Adaptation stops when warm-up ends, so saved draws come from a fixed Markov kernel.
//! Chains run on a thread pool; chain `c` draws from its own ChaCha stream `(seed, c)`, so
//! the draws for a seed are the same whatever the number of threads.

use crate::censored::Augmented;
use crate::error::ModelError;
use crate::marginal::{BetaPrior, Factorised};
use crate::priors::SdPrior;
use crate::stats::SuffStats;
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{ChiSquared, Distribution, StandardNormal};
use serde::{Deserialize, Serialize};
use std::sync::atomic::{AtomicBool, Ordering};

/// Degrees of freedom of the independence proposal: heavy enough tails that the
/// importance ratio stays bounded when the posterior is a little wider than its fit.
const PROPOSAL_DF: f64 = 5.0;
/// Inflation of the fitted covariance for the independence proposal.
const PROPOSAL_INFLATE: f64 = 1.3;
/// Probability of an independence transition (else random walk).
const P_INDEPENDENCE: f64 = 0.7;

/// Sampler settings, with documented defaults.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SamplerSettings {
    /// Independent chains (default 4).
    pub chains: usize,
    /// Saved draws per chain (default 1000).
    pub draws: usize,
    /// Warm-up iterations per chain on a cold start (default 500).
    pub warmup: usize,
    /// Warm-up iterations per chain when warm-started (default 150).
    pub warm_warmup: usize,
    /// Metropolis–Hastings transitions per saved draw (default 2).
    pub steps_per_draw: usize,
    /// Saved draws per chain of the random effects (site, year, group), thinned evenly
    /// (default 100). Forecasts use these draws.
    pub effect_draws: usize,
    /// Seed of the random streams.
    pub seed: u64,
    /// Worker threads; 0 means one per available core.
    pub threads: usize,
    /// Dense or sparse reduced system (default: by the number of factor levels).
    #[serde(default)]
    pub normal_equations: crate::stats::NormalEquations,
}

impl Default for SamplerSettings {
    fn default() -> Self {
        SamplerSettings {
            chains: 4,
            draws: 1000,
            warmup: 500,
            warm_warmup: 150,
            steps_per_draw: 2,
            effect_draws: 100,
            seed: 1,
            threads: 0,
            normal_equations: crate::stats::NormalEquations::Auto,
        }
    }
}

impl SamplerSettings {
    pub(crate) fn validate(&self) -> Result<(), ModelError> {
        let bad = |m: &str| Err(ModelError::InvalidSettings(m.to_string()));
        if self.chains == 0 {
            return bad("chains must be at least 1");
        }
        if self.draws < 10 {
            return bad("draws must be at least 10 per chain");
        }
        if self.steps_per_draw == 0 {
            return bad("steps_per_draw must be at least 1");
        }
        if self.effect_draws == 0 || self.effect_draws > self.draws {
            return bad("effect_draws must be between 1 and draws");
        }
        Ok(())
    }
}

/// What a later fit needs to warm-start from this one: the posterior of the log standard
/// deviations (mean, covariance; `warm.rs` re-centres it on the new data and draws
/// over-dispersed start points from it).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct WarmStart {
    pub sd_names: Vec<String>,
    pub log_sd_mean: Vec<f64>,
    /// Row-major `m x m` covariance of the log standard deviations.
    pub log_sd_cov: Vec<f64>,
}

impl WarmStart {
    /// The warm-start state of saved standard-deviation draws (`chains x draws x m`,
    /// chain-major, as in [`crate::Posterior::sd_draws`]): moments of their logs over all
    /// chains. This is all a later fit needs, so a store that keeps the draws keeps the
    /// warm start.
    pub fn from_draws(sd_names: &[String], sd_draws: &[f64]) -> WarmStart {
        let m = sd_names.len();
        let log_draws: Vec<Vec<f64>> = sd_draws
            .chunks(m)
            .map(|r| r.iter().map(|s| s.ln()).collect())
            .collect();
        let (log_sd_mean, log_sd_cov) = match Fit::from_draws(&log_draws) {
            Some(f) => (
                f.mean.iter().copied().collect(),
                f.cov().transpose().iter().copied().collect(),
            ),
            None => (
                vec![0.0; m],
                DMatrix::<f64>::identity(m, m).iter().copied().collect(),
            ),
        };
        WarmStart {
            sd_names: sd_names.to_vec(),
            log_sd_mean,
            log_sd_cov,
        }
    }
}

/// Progress of one chain, reported through [`Controls::progress`].
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    pub chain: usize,
    pub iteration: usize,
    pub total: usize,
}

/// Cancellation and progress hooks; both optional.
#[derive(Default, Clone, Copy)]
pub struct Controls<'a> {
    pub cancel: Option<&'a AtomicBool>,
    pub progress: Option<&'a (dyn Fn(Progress) + Sync)>,
}

/// The log posterior of the log standard deviations.
pub(crate) struct Target<'a> {
    pub stats: &'a SuffStats,
    pub sd_priors: Vec<SdPrior>,
    pub beta_prior: BetaPrior,
    /// The censored values with their provisional starting values; each chain moves its
    /// own copy (`censored.rs`), and its target is then the posterior given the current
    /// values.
    pub censored: Option<Augmented>,
}

impl Target<'_> {
    pub fn eval(&self, eta: &[f64]) -> Option<(f64, Factorised)> {
        self.eval_with(self.stats, eta)
    }

    /// [`Target::eval`] on a chain's own statistics (censored values moved).
    pub fn eval_with(&self, stats: &SuffStats, eta: &[f64]) -> Option<(f64, Factorised)> {
        if eta.iter().any(|e| !e.is_finite() || e.abs() > 700.0) {
            return None;
        }
        let sds: Vec<f64> = eta.iter().map(|e| e.exp()).collect();
        let fac = Factorised::new(stats, &sds, Some(&self.beta_prior))?;
        let lp = fac.log_marginal(stats, &self.beta_prior) + self.log_prior(eta);
        lp.is_finite().then_some((lp, fac))
    }

    /// Density of `eta = log sd`: the prior of the sds times the Jacobian `sd`.
    fn log_prior(&self, eta: &[f64]) -> f64 {
        self.sd_priors
            .iter()
            .zip(eta)
            .map(|(p, &e)| p.ln_pdf(e.exp()) + e)
            .sum()
    }

    /// The log density at the current `eta` after the censored values moved: the factor
    /// is kept, the response parts of `fac` are evaluated again.
    fn rescore(&self, stats: &SuffStats, eta: &[f64], fac: &mut Factorised) -> f64 {
        fac.refresh(stats, Some(&self.beta_prior));
        let lp = fac.log_marginal(stats, &self.beta_prior) + self.log_prior(eta);
        if lp.is_finite() {
            lp
        } else {
            f64::NEG_INFINITY
        }
    }

    pub fn log_density(&self, eta: &[f64]) -> f64 {
        self.eval(eta).map_or(f64::NEG_INFINITY, |(lp, _)| lp)
    }
}

/// A Gaussian-shaped fit of the posterior: location and Cholesky factor of the scale.
#[derive(Debug, Clone)]
pub(crate) struct Fit {
    pub mean: DVector<f64>,
    pub chol: DMatrix<f64>,
}

impl Fit {
    pub fn from_cov(mean: DVector<f64>, cov: &DMatrix<f64>) -> Option<Self> {
        let c = nalgebra::Cholesky::new(cov.clone())?;
        Some(Fit { mean, chol: c.l() })
    }

    /// Mean and covariance of draws (rows); `None` when degenerate.
    pub fn from_draws(draws: &[Vec<f64>]) -> Option<Self> {
        let m = draws.first()?.len();
        let n = draws.len() as f64;
        if n < (m + 2) as f64 {
            return None;
        }
        let mean = DVector::from_fn(m, |i, _| draws.iter().map(|d| d[i]).sum::<f64>() / n);
        let mut cov = DMatrix::zeros(m, m);
        for d in draws {
            for i in 0..m {
                for j in 0..m {
                    cov[(i, j)] += (d[i] - mean[i]) * (d[j] - mean[j]);
                }
            }
        }
        cov /= n - 1.0;
        // A small ridge keeps a nearly degenerate sample covariance usable.
        for i in 0..m {
            cov[(i, i)] += 1e-10;
        }
        Fit::from_cov(mean, &cov)
    }

    fn scaled(&self, factor: f64) -> Fit {
        Fit {
            mean: self.mean.clone(),
            chol: &self.chol * factor,
        }
    }

    /// Log density of the multivariate t up to a constant.
    fn ln_t(&self, x: &[f64]) -> f64 {
        let m = x.len();
        let diff = DVector::from_fn(m, |i, _| x[i] - self.mean[i]);
        let z = self
            .chol
            .solve_lower_triangular(&diff)
            .unwrap_or_else(|| DVector::from_element(m, f64::INFINITY));
        -0.5 * (PROPOSAL_DF + m as f64) * (z.norm_squared() / PROPOSAL_DF).ln_1p()
    }

    fn draw_t<R: Rng + ?Sized>(&self, rng: &mut R) -> Vec<f64> {
        let m = self.mean.len();
        let z = DVector::from_fn(m, |_, _| rng.sample::<f64, _>(StandardNormal));
        let w = ChiSquared::new(PROPOSAL_DF)
            .map(|c| c.sample(rng))
            .unwrap_or(PROPOSAL_DF);
        let x = &self.mean + &self.chol * z * (PROPOSAL_DF / w).sqrt();
        x.iter().copied().collect()
    }

    fn step_normal<R: Rng + ?Sized>(&self, from: &[f64], scale: f64, rng: &mut R) -> Vec<f64> {
        let m = from.len();
        let z = DVector::from_fn(m, |_, _| rng.sample::<f64, _>(StandardNormal));
        let step = &self.chol * z * scale;
        from.iter().zip(step.iter()).map(|(a, b)| a + b).collect()
    }

    pub fn cov(&self) -> DMatrix<f64> {
        &self.chol * self.chol.transpose()
    }
}

/// How one chain starts.
pub(crate) struct ChainStart {
    pub eta: Vec<f64>,
    pub fit: Fit,
    pub warmup: usize,
    /// Warm-started: `fit` comes from the previous version and is kept unless the warm-up
    /// history holds enough effective draws (`warm::REFIT_ESS_PER_COMPONENT`).
    pub warm: bool,
}

/// The smallest bulk ESS over the components of a stretch of one chain.
fn effective_draws(history: &[Vec<f64>]) -> f64 {
    let m = history.first().map_or(0, |h| h.len());
    (0..m)
        .map(|k| {
            let column: Vec<f64> = history.iter().map(|h| h[k]).collect();
            crate::diagnostics::diagnose(&[&column]).ess_bulk
        })
        .map(|e| if e.is_nan() { 0.0 } else { e })
        .fold(f64::INFINITY, f64::min)
}

/// Saved output of one chain.
pub(crate) struct ChainOutput {
    /// `draws x m` log-free standard deviations.
    pub sd: Vec<f64>,
    /// `draws x p` standardised coefficients (internal parameterisation).
    pub beta_std: Vec<f64>,
    /// Thinned effect draws: `e x (n_sites)` site effects and `e x q` non-site `u`.
    pub site_effects: Vec<f64>,
    pub u_effects: Vec<f64>,
    /// Index (within the saved draws) of each effect draw.
    pub effect_index: Vec<usize>,
    pub accepted: usize,
    pub proposed: usize,
    pub end: Vec<f64>,
}

/// Thinning of the effect draws: every `thin`-th saved draw, `n_effect` of them per chain
/// (at least `effect_draws`, fewer than twice as many).
pub(crate) fn effect_thinning(draws: usize, effect_draws: usize) -> (usize, usize) {
    let thin = (draws / effect_draws.max(1)).max(1);
    (thin, draws / thin)
}

pub(crate) fn run_chain(
    target: &Target,
    settings: &SamplerSettings,
    chain: usize,
    start: &ChainStart,
    controls: Controls,
) -> Result<ChainOutput, ModelError> {
    let stats = target.stats;
    let m = start.eta.len();
    let lay = &stats.layout;
    let mut rng = ChaCha8Rng::seed_from_u64(settings.seed);
    rng.set_stream(chain as u64 + 1);

    let mut aug = target.censored.clone();
    let mut eta = start.eta.clone();
    let (mut lp, mut fac) = target
        .eval(&eta)
        .or_else(|| {
            eta = start.fit.mean.iter().copied().collect();
            target.eval(&eta)
        })
        .ok_or_else(|| {
            ModelError::Numerical("the posterior cannot be evaluated at the start point".into())
        })?;

    let mut indep = start.fit.scaled(PROPOSAL_INFLATE);
    let mut walk = start.fit.clone();
    let mut log_rw_scale = (2.38 / (m as f64).sqrt()).ln();
    let warmup = start.warmup;
    let total = warmup + settings.draws;
    let (thin, n_effect) = effect_thinning(settings.draws, settings.effect_draws);

    let mut out = ChainOutput {
        sd: Vec::with_capacity(settings.draws * m),
        beta_std: Vec::with_capacity(settings.draws * lay.p),
        site_effects: Vec::with_capacity(n_effect * stats.n_sites),
        u_effects: Vec::with_capacity(n_effect * lay.q),
        effect_index: Vec::with_capacity(n_effect),
        accepted: 0,
        proposed: 0,
        end: Vec::new(),
    };
    let mut history: Vec<Vec<f64>> = Vec::with_capacity(warmup);
    let adapt_at = [warmup * 3 / 10, warmup * 6 / 10, warmup * 8 / 10, warmup];
    let mut site_buf = vec![0.0; stats.n_sites];

    for it in 0..total {
        if it % 64 == 0 {
            if controls.cancel.is_some_and(|c| c.load(Ordering::Relaxed)) {
                return Err(ModelError::Cancelled);
            }
            if let Some(p) = controls.progress {
                p(Progress {
                    chain,
                    iteration: it,
                    total,
                });
            }
        }
        let warming = it < warmup;
        for _ in 0..settings.steps_per_draw {
            let independence = rng.gen::<f64>() < P_INDEPENDENCE;
            let proposal = if independence {
                indep.draw_t(&mut rng)
            } else {
                walk.step_normal(&eta, log_rw_scale.exp(), &mut rng)
            };
            let mut accepted = false;
            let now = aug.as_ref().map_or(stats, |a| &a.stats);
            if let Some((lp_new, fac_new)) = target.eval_with(now, &proposal) {
                let mut log_ratio = lp_new - lp;
                if independence {
                    log_ratio += indep.ln_t(&eta) - indep.ln_t(&proposal);
                }
                let alpha = log_ratio.min(0.0).exp();
                if !independence && warming {
                    // Robbins–Monro towards acceptance 0.3 (Andrieu & Thoms 2008).
                    log_rw_scale += (alpha - 0.3) / ((it + 1) as f64).sqrt();
                }
                if rng.gen::<f64>() < alpha {
                    eta = proposal;
                    lp = lp_new;
                    fac = fac_new;
                    accepted = true;
                }
            } else if !independence && warming {
                log_rw_scale -= 0.3 / ((it + 1) as f64).sqrt();
            }
            if !warming {
                out.proposed += 1;
                out.accepted += accepted as usize;
            }
        }
        if warming {
            history.push(eta.clone());
            if adapt_at.contains(&(it + 1)) {
                // Refit both proposals to the later half of the warm-up so far; a warm
                // start keeps the previous version's unless that half is informative.
                let recent = &history[history.len() / 2..];
                let informative = !start.warm
                    || effective_draws(recent) >= crate::warm::REFIT_ESS_PER_COMPONENT * m as f64;
                if let Some(fit) = Fit::from_draws(recent).filter(|_| informative) {
                    indep = fit.scaled(PROPOSAL_INFLATE);
                    walk = fit;
                }
            }
            if let Some(a) = aug.as_mut() {
                let u = fac.draw_u(&mut rng);
                a.sweep(&fac, u.as_slice(), None, &mut rng);
                lp = target.rescore(&a.stats, &eta, &mut fac);
            }
            continue;
        }
        let saved = it - warmup;
        out.sd.extend(fac.sds.iter());
        let u = fac.draw_u(&mut rng);
        out.beta_std
            .extend((0..lay.p).map(|j| u[lay.fixed_offset + j]));
        let mut sites_drawn = false;
        if saved % thin == thin - 1 && out.effect_index.len() < n_effect {
            let now = aug.as_ref().map_or(stats, |a| &a.stats);
            fac.draw_sites(now, u.as_slice(), &mut rng, &mut site_buf);
            out.site_effects.extend_from_slice(&site_buf);
            out.u_effects.extend(u.iter());
            out.effect_index.push(saved);
            sites_drawn = true;
        }
        if let Some(a) = aug.as_mut() {
            let sites = sites_drawn.then_some(site_buf.as_slice());
            a.sweep(&fac, u.as_slice(), sites, &mut rng);
            lp = target.rescore(&a.stats, &eta, &mut fac);
        }
    }
    out.end = eta;
    Ok(out)
}
