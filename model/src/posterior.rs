//! Entry point of the Bayesian fit: start values (a Laplace fit of the marginal posterior
//! of the log standard deviations, or the previous version's posterior re-centred on the
//! data, `warm.rs`), the chains, and
//! the assembled posterior with its summaries and diagnostics.

use crate::data::Data;
use crate::diagnostics::{diagnose_with, quantile_sorted, ZTable};
use crate::error::ModelError;
use crate::marginal::BetaPrior;
use crate::optimize::{hessian, minimise};
use crate::priors::{Priors, ResolvedPriors};
use crate::reml::{point_from_stats, Method};
use crate::sampler::{
    run_chain, ChainOutput, ChainStart, Controls, Fit, SamplerSettings, Target, WarmStart,
};
use crate::stats::NormalEquations;
use crate::stats::SuffStats;
use crate::warm::{overdispersed_starts, WarmPlan};
use nalgebra::{DMatrix, DVector};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

/// Which family a summary row belongs to (the `kind` column of `posterior_summary`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SummaryKind {
    Sd,
    Share,
    Coef,
    Effect,
    /// The network trend per year, per decade and (log scale) percent per year.
    Trend,
}

impl SummaryKind {
    pub fn as_str(&self) -> &'static str {
        match self {
            SummaryKind::Sd => "sd",
            SummaryKind::Share => "share",
            SummaryKind::Coef => "coef",
            SummaryKind::Effect => "effect",
            SummaryKind::Trend => "trend",
        }
    }
}

/// Posterior summary of one scalar quantity.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    pub kind: SummaryKind,
    pub term: String,
    pub level: Option<String>,
    pub mean: f64,
    pub sd: f64,
    pub q05: f64,
    pub q25: f64,
    pub q50: f64,
    pub q75: f64,
    pub q95: f64,
    pub rhat: f64,
    pub ess_bulk: f64,
    pub ess_tail: f64,
}

/// Convergence and cost figures of a fit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitDiagnostics {
    /// Maximum R-hat over standard deviations, shares and coefficients (the gate).
    pub max_rhat: f64,
    pub min_ess_bulk: f64,
    pub min_ess_tail: f64,
    /// Maximum R-hat over the (thinned) random-effect draws, reported, not gated.
    pub max_rhat_effects: f64,
    pub acceptance_rate: f64,
    pub warmup: usize,
    pub warm_started: bool,
    pub steps_per_draw: usize,
}

/// Thinned draws of the random effects and what forecasts need alongside them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EffectDraws {
    /// Number of effect draws (all chains).
    pub n: usize,
    pub per_chain: usize,
    /// `n_sites x n`, level-major: the draws of one site are contiguous (chain after
    /// chain), which is how summaries and forecasts read them.
    pub site: Vec<f64>,
    /// `n_years x n`, level-major.
    pub year: Vec<f64>,
    /// Per further factor: `n_levels x n`, level-major.
    pub groups: Vec<Vec<f64>>,
    /// Standard deviations at each effect draw: `n x m`.
    pub sd: Vec<f64>,
    /// Coefficients (original units) at each effect draw: `n x p`.
    pub coef: Vec<f64>,
    /// Model-scale mean at the network's average covariates, per effect draw.
    pub mean_at_covariate_means: Vec<f64>,
    /// Index of each effect draw in the full draws (chain-major `chain * draws + draw`).
    pub draw_index: Vec<usize>,
}

/// A fitted posterior.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Posterior {
    pub sd_names: Vec<String>,
    /// `intercept`, then covariates.
    pub coef_names: Vec<String>,
    pub site_labels: Vec<String>,
    pub year_labels: Vec<i32>,
    pub group_names: Vec<String>,
    pub group_labels: Vec<Vec<String>>,
    pub covariate_means: Vec<f64>,
    /// Per covariate, each site's value when it is an attribute of the site
    /// ([`Data::site_level_covariates`]).
    pub site_covariates: Vec<Option<Vec<f64>>>,
    /// Latest observed year of each site.
    pub site_last_year: Vec<i32>,
    /// The network trend's origin year ([`crate::DataBuilder::with_trend`]); its
    /// coefficient is the last one.
    #[serde(default)]
    pub trend_origin: Option<i32>,
    pub n_obs: usize,
    pub chains: usize,
    /// Saved draws per chain.
    pub draws: usize,
    /// `chains x draws x m`, chain-major.
    pub sd_draws: Vec<f64>,
    /// `chains x draws x p`, original units.
    pub coef_draws: Vec<f64>,
    pub effects: EffectDraws,
    pub summaries: Vec<Summary>,
    pub diagnostics: FitDiagnostics,
    pub priors: ResolvedPriors,
    pub warm_start: WarmStart,
    pub warnings: Vec<String>,
}

impl Posterior {
    /// Draws of standard deviation `k`, one vector per chain.
    pub fn sd_chains(&self, k: usize) -> Vec<Vec<f64>> {
        let m = self.sd_names.len();
        (0..self.chains)
            .map(|c| {
                (0..self.draws)
                    .map(|d| self.sd_draws[(c * self.draws + d) * m + k])
                    .collect()
            })
            .collect()
    }

    /// Draws of coefficient `j`, one vector per chain.
    pub fn coef_chains(&self, j: usize) -> Vec<Vec<f64>> {
        let p = self.coef_names.len();
        (0..self.chains)
            .map(|c| {
                (0..self.draws)
                    .map(|d| self.coef_draws[(c * self.draws + d) * p + j])
                    .collect()
            })
            .collect()
    }

    /// A summary of `f` of coefficient `j`'s draws (a monotone or any other function:
    /// the quantiles, mean, sd and diagnostics are those of the transformed draws), filed
    /// under `kind`, `term` and `level`.
    pub fn coef_summary_by(
        &self,
        j: usize,
        (kind, term, level): (SummaryKind, &str, Option<String>),
        f: impl Fn(f64) -> f64,
    ) -> Summary {
        let chains: Vec<Vec<f64>> = self
            .coef_chains(j)
            .into_iter()
            .map(|c| c.into_iter().map(&f).collect())
            .collect();
        let table = ZTable::new(2 * (self.draws / 2) * self.chains);
        summarise(kind, term, level, &chains, &table)
    }

    /// The summary row of a kind and term (level `None` for non-effects).
    pub fn summary(&self, kind: SummaryKind, term: &str, level: Option<&str>) -> Option<&Summary> {
        self.summaries
            .iter()
            .find(|s| s.kind == kind && s.term == term && s.level.as_deref() == level)
    }

    /// The forecast basis of `per_chain` evenly spaced effect draws per chain (all of them
    /// when `per_chain` is at least [`EffectDraws::per_chain`]).
    pub fn forecast_basis(&self, per_chain: usize) -> crate::forecast::ForecastBasis {
        let eff = &self.effects;
        let within = basis_columns(eff.per_chain, per_chain);
        let cols: Vec<usize> = (0..self.chains)
            .flat_map(|c| within.iter().map(move |&k| c * eff.per_chain + k))
            .collect();
        let pick = |rows: &[f64], levels: usize| -> Vec<f64> {
            (0..levels)
                .flat_map(|l| cols.iter().map(move |&c| rows[l * eff.n + c]))
                .collect()
        };
        let m = self.sd_names.len();
        let p = self.coef_names.len();
        crate::forecast::ForecastBasis {
            sd_names: self.sd_names.clone(),
            coef_names: self.coef_names.clone(),
            site_labels: self.site_labels.clone(),
            year_labels: self.year_labels.clone(),
            group_names: self.group_names.clone(),
            group_labels: self.group_labels.clone(),
            covariate_means: self.covariate_means.clone(),
            site_covariates: self.site_covariates.clone(),
            site_last_year: self.site_last_year.clone(),
            trend_origin: self.trend_origin,
            n: cols.len(),
            draw_index: cols.iter().map(|&c| eff.draw_index[c]).collect(),
            site: pick(&eff.site, self.site_labels.len()),
            year: pick(&eff.year, self.year_labels.len()),
            groups: eff
                .groups
                .iter()
                .zip(&self.group_labels)
                .map(|(g, labels)| pick(g, labels.len()))
                .collect(),
            sd: cols
                .iter()
                .flat_map(|&c| eff.sd[c * m..(c + 1) * m].iter().copied())
                .collect(),
            coef: cols
                .iter()
                .flat_map(|&c| eff.coef[c * p..(c + 1) * p].iter().copied())
                .collect(),
        }
    }

    /// Latest observed year.
    pub fn data_through_year(&self) -> i32 {
        self.year_labels.last().copied().unwrap_or(0)
    }
}

/// Positions, within one chain of `available` effect draws, of the `keep` draws a forecast
/// basis keeps (all of them when `keep >= available`): the last draw of each of `keep`
/// equal strides, `ceil((k + 1) available / keep) - 1`, so the last kept draw is the
/// chain's last. In integers: the same ratio in floating point can round up past a whole
/// number and point one past the end of the chain (`available = 110`, `keep = 25`).
pub(crate) fn basis_columns(available: usize, keep: usize) -> Vec<usize> {
    if available == 0 {
        return Vec::new();
    }
    let keep = keep.clamp(1, available);
    (1..=keep)
        .map(|k| (k * available).div_ceil(keep) - 1)
        .collect()
}

/// What every fit of a data set computes before its chains: the sufficient statistics,
/// the resolved priors and the coefficients' prior in the chains' parameterisation.
struct Prepared {
    stats: SuffStats,
    censored: Option<crate::censored::Augmented>,
    sd_names: Vec<String>,
    resolved: ResolvedPriors,
    beta_prior: BetaPrior,
}

impl Prepared {
    fn new(data: &Data, priors: &Priors, normal: NormalEquations) -> Result<Prepared, ModelError> {
        let stats = SuffStats::new(data, normal)?;
        let sd_names = data.sd_names();
        let resolved =
            priors.resolve(&sd_names, &data.covariate_names, stats.y_mean, stats.y_sd)?;
        let beta_prior = beta_prior(&resolved, &stats);
        let censored = crate::censored::Augmented::new(data, &stats);
        Ok(Prepared {
            stats,
            censored,
            sd_names,
            resolved,
            beta_prior,
        })
    }

    fn target(&self) -> Target<'_> {
        Target {
            stats: &self.stats,
            sd_priors: self.resolved.sd.iter().map(|(_, p)| *p).collect(),
            beta_prior: self.beta_prior.clone(),
            censored: self.censored.clone(),
        }
    }
}

/// Whether `warm` describes the data's variance components, with consistent sizes; the
/// reason when it does not.
fn warm_fits(warm: &WarmStart, sd_names: &[String]) -> Result<(), String> {
    let m = sd_names.len();
    if warm.sd_names != sd_names {
        return Err(format!(
            "the previous version has the variance components {:?}, the data {:?}",
            warm.sd_names, sd_names
        ));
    }
    if warm.log_sd_mean.len() != m || warm.log_sd_cov.len() != m * m {
        return Err("the previous version's posterior moments have the wrong size".into());
    }
    Ok(())
}

/// Check a warm start against the data before sampling (what [`sample`] does first with
/// its `warm`): the re-centred start points, or [`ModelError::WarmStartRefused`] with the
/// reason when the data conflict with the previous posterior or describe other variance
/// components. The method and its threshold are in `warm.rs` (README, "Warm starts").
pub fn check_warm_start(
    data: &Data,
    priors: &Priors,
    settings: &SamplerSettings,
    warm: &WarmStart,
) -> Result<WarmPlan, ModelError> {
    settings.validate()?;
    let prep = Prepared::new(data, priors, settings.normal_equations)?;
    warm_fits(warm, &prep.sd_names).map_err(|reason| ModelError::WarmStartRefused {
        reason,
        distance: f64::INFINITY,
    })?;
    let target = prep.target();
    Ok(crate::warm::plan(&target, data, &prep.stats, settings, warm)?.0)
}

/// Fit the Bayesian model: draws from the exact posterior of every parameter.
///
/// `warm`, when given and naming the same variance components, is checked against the
/// data first ([`check_warm_start`]): a conflict returns
/// [`ModelError::WarmStartRefused`] before any chain runs (the caller starts cold);
/// otherwise its covariance, re-centred on the data, gives the proposal and the start
/// points, and the shorter `warm_warmup` is used. A warm start naming other components is
/// ignored (a cold start).
pub fn sample(
    data: &Data,
    priors: &Priors,
    settings: &SamplerSettings,
    warm: Option<&WarmStart>,
    controls: Controls,
) -> Result<Posterior, ModelError> {
    settings.validate()?;
    let prep = Prepared::new(data, priors, settings.normal_equations)?;
    let stats = &prep.stats;
    let target = prep.target();
    let warm = warm.filter(|w| warm_fits(w, &prep.sd_names).is_ok());
    let mut warnings = data.warnings.clone();
    let (fit, starts, warmup) = match warm {
        Some(w) => {
            let (plan, fit) = crate::warm::plan(&target, data, stats, settings, w)?;
            (fit, plan.starts, settings.warm_warmup)
        }
        None => {
            let fit = laplace(&target, data, stats, &mut warnings)?;
            let starts = overdispersed_starts(&fit, settings.chains, settings.seed);
            (fit, starts, settings.warmup)
        }
    };
    let starts: Vec<ChainStart> = starts
        .into_iter()
        .map(|eta| ChainStart {
            eta,
            fit: fit.clone(),
            warmup,
            warm: warm.is_some(),
        })
        .collect();

    let threads = if settings.threads == 0 {
        std::thread::available_parallelism().map_or(1, |n| n.get())
    } else {
        settings.threads
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads.min(settings.chains).max(1))
        .build()
        .map_err(|e| ModelError::Numerical(format!("cannot start worker threads: {e}")))?;
    let outputs: Vec<ChainOutput> = pool.install(|| {
        starts
            .par_iter()
            .enumerate()
            .map(|(c, start)| run_chain(&target, settings, c, start, controls))
            .collect::<Result<Vec<_>, _>>()
    })?;

    let run = ChainRun {
        outputs,
        warmup,
        warm_started: warm.is_some(),
    };
    Ok(assemble(
        data,
        stats,
        settings,
        prep.resolved.clone(),
        run,
        warnings,
        &pool,
    ))
}

/// The coefficients' normal priors as means and precisions; the intercept's mean is moved
/// by the response mean because the chains work on the centred response.
fn beta_prior(resolved: &ResolvedPriors, stats: &SuffStats) -> BetaPrior {
    let mut prior = BetaPrior {
        mean: vec![resolved.intercept.mean - stats.y_mean],
        prec: vec![1.0 / resolved.intercept.sd.powi(2)],
    };
    for (_, p) in &resolved.coefficients {
        prior.mean.push(p.mean);
        prior.prec.push(1.0 / p.sd.powi(2));
    }
    prior
}

/// Mode and curvature of the log posterior of the log standard deviations.
pub(crate) fn laplace(
    target: &Target,
    data: &Data,
    stats: &SuffStats,
    warnings: &mut Vec<String>,
) -> Result<Fit, ModelError> {
    let m = target.sd_priors.len();
    let scale = stats.y_sd;
    let start: Vec<f64> = match point_from_stats(data, stats, Method::Reml) {
        Ok(fit) => fit
            .sd
            .iter()
            .map(|(_, s)| s.max(scale * 1e-2).ln())
            .collect(),
        Err(_) => vec![(scale * 0.5).ln(); m],
    };
    let neg = |eta: &[f64]| -target.log_density(eta);
    let lower = vec![(scale * 1e-8).ln(); m];
    let upper = vec![(scale * 1e4).ln(); m];
    let mode = minimise(&neg, &start, &lower, &upper, 1e-6, 400);
    if !mode.value.is_finite() {
        return Err(ModelError::Numerical(
            "the posterior cannot be evaluated near its mode".into(),
        ));
    }
    let h = hessian(&neg, &mode.x, 1e-3);
    let cov = nalgebra::Cholesky::new(h.clone())
        .map(|c| c.inverse())
        .filter(|c| (0..m).all(|i| c[(i, i)] > 0.0 && c[(i, i)].is_finite()));
    let cov = cov.unwrap_or_else(|| {
        warnings.push("the posterior curvature at its mode is not positive definite; starting from a diffuse proposal".into());
        DMatrix::from_diagonal_element(m, m, 0.25)
    });
    Fit::from_cov(DVector::from_vec(mode.x), &cov)
        .ok_or_else(|| ModelError::Numerical("Laplace covariance not positive definite".into()))
}

fn summarise(
    kind: SummaryKind,
    term: &str,
    level: Option<String>,
    chains: &[Vec<f64>],
    table: &ZTable,
) -> Summary {
    let refs: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
    let (d, all) = diagnose_with(&refs, table);
    let n = all.len() as f64;
    let mean = all.iter().sum::<f64>() / n;
    let sd = (all.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    Summary {
        kind,
        term: term.to_string(),
        level,
        mean,
        sd,
        q05: quantile_sorted(&all, 0.05),
        q25: quantile_sorted(&all, 0.25),
        q50: quantile_sorted(&all, 0.5),
        q75: quantile_sorted(&all, 0.75),
        q95: quantile_sorted(&all, 0.95),
        rhat: d.rhat,
        ess_bulk: d.ess_bulk,
        ess_tail: d.ess_tail,
    }
}

/// The chains' output and how they were started.
struct ChainRun {
    outputs: Vec<ChainOutput>,
    warmup: usize,
    warm_started: bool,
}

/// The posterior from the chains' output: saved draws, effect draws, summaries with their
/// diagnostics, and the warm start for the next version.
fn assemble(
    data: &Data,
    stats: &SuffStats,
    settings: &SamplerSettings,
    priors: ResolvedPriors,
    run: ChainRun,
    warnings: Vec<String>,
    pool: &rayon::ThreadPool,
) -> Posterior {
    let sd_names = data.sd_names();
    let mut coef_names = vec!["intercept".to_string()];
    coef_names.extend(data.covariate_names.iter().cloned());
    let chains = run.outputs.len();
    let draws = settings.draws;

    let (sd_draws, coef_draws) = saved_draws(&run.outputs, stats, draws);
    let effects = effect_draws(&run.outputs, stats, sd_names.len(), draws, &coef_draws);
    let saved = SavedDraws {
        chains,
        draws,
        m: sd_names.len(),
        p: coef_names.len(),
        sd: &sd_draws,
        coef: &coef_draws,
        effects: &effects,
    };
    let summaries = summarise_all(&saved, summary_rows(data, &sd_names, &coef_names), pool);
    let diagnostics = fit_diagnostics(&summaries, &run, settings.steps_per_draw);
    let warm_start = WarmStart::from_draws(&sd_names, &sd_draws);

    Posterior {
        sd_names,
        coef_names,
        site_labels: data.site_labels.clone(),
        year_labels: data.year_labels.clone(),
        group_names: data.group_names.clone(),
        group_labels: data.group_labels.clone(),
        covariate_means: data.covariate_means(),
        site_covariates: data.site_level_covariates(),
        site_last_year: data.site_last_year(),
        trend_origin: data.trend_origin,
        n_obs: data.n_obs(),
        chains,
        draws,
        sd_draws,
        coef_draws,
        effects,
        summaries,
        diagnostics,
        priors,
        warm_start,
        warnings,
    }
}

/// Every saved draw, chain after chain: the standard deviations as sampled, and the
/// coefficients moved from the standardised scale the chains use to original units.
fn saved_draws(outputs: &[ChainOutput], stats: &SuffStats, draws: usize) -> (Vec<f64>, Vec<f64>) {
    let p = stats.layout.p;
    let mut sd_draws = Vec::with_capacity(outputs.iter().map(|o| o.sd.len()).sum());
    let mut coef_draws = Vec::with_capacity(outputs.len() * draws * p);
    for out in outputs {
        sd_draws.extend_from_slice(&out.sd);
        for d in 0..draws {
            coef_draws.extend(stats.coef_to_original(&out.beta_std[d * p..(d + 1) * p]));
        }
    }
    (sd_draws, coef_draws)
}

/// The thinned effect draws of all chains, turned level-major (see [`EffectDraws`]), with
/// the standard deviations and coefficients of the same draws beside them.
fn effect_draws(
    outputs: &[ChainOutput],
    stats: &SuffStats,
    m: usize,
    draws: usize,
    coef_draws: &[f64],
) -> EffectDraws {
    let lay = &stats.layout;
    let p = lay.p;
    let per_chain = outputs[0].effect_index.len();
    let n_eff = per_chain * outputs.len();
    let n_sites = stats.n_sites;
    let mut effects = EffectDraws {
        n: n_eff,
        per_chain,
        site: vec![0.0; n_eff * n_sites],
        year: vec![0.0; n_eff * lay.n_years],
        groups: lay
            .group_sizes
            .iter()
            .map(|&size| vec![0.0; n_eff * size])
            .collect(),
        sd: Vec::with_capacity(n_eff * m),
        coef: Vec::with_capacity(n_eff * p),
        mean_at_covariate_means: Vec::with_capacity(n_eff),
        draw_index: Vec::with_capacity(n_eff),
    };
    for (c, out) in outputs.iter().enumerate() {
        for (e, &d) in out.effect_index.iter().enumerate() {
            let col = c * per_chain + e;
            let u = &out.u_effects[e * lay.q..(e + 1) * lay.q];
            let sites = &out.site_effects[e * n_sites..(e + 1) * n_sites];
            for (s, &v) in sites.iter().enumerate() {
                effects.site[s * n_eff + col] = v;
            }
            for (t, &b) in u[..lay.n_years].iter().enumerate() {
                effects.year[t * n_eff + col] = b;
            }
            for (k, (&off, &size)) in lay.group_offsets.iter().zip(&lay.group_sizes).enumerate() {
                for l in 0..size {
                    effects.groups[k][l * n_eff + col] = u[off + l];
                }
            }
            effects.sd.extend_from_slice(&out.sd[d * m..(d + 1) * m]);
            let base = (c * draws + d) * p;
            effects.coef.extend_from_slice(&coef_draws[base..base + p]);
            effects
                .mean_at_covariate_means
                .push(u[lay.fixed_offset] + stats.y_mean);
            effects.draw_index.push(c * draws + d);
        }
    }
    effects
}

/// Where the draws of one summarised quantity are read from.
enum Source {
    Sd(usize),
    /// Variance share of a component: its variance over the sum of all variances.
    Share(usize),
    Coef(usize),
    Site(usize),
    Year(usize),
    Group(usize, usize),
}

/// One row of the summary table, before its numbers are known.
struct SummaryRow {
    kind: SummaryKind,
    term: String,
    level: Option<String>,
    source: Source,
}

/// The rows of the summary table in their stored order: standard deviations, shares,
/// coefficients, then site, year and group effects level by level.
fn summary_rows(data: &Data, sd_names: &[String], coef_names: &[String]) -> Vec<SummaryRow> {
    let row = |kind, term: &str, level: Option<String>, source| SummaryRow {
        kind,
        term: term.to_string(),
        level,
        source,
    };
    let mut rows = Vec::new();
    for (k, name) in sd_names.iter().enumerate() {
        rows.push(row(SummaryKind::Sd, name, None, Source::Sd(k)));
    }
    for (k, name) in sd_names.iter().enumerate() {
        rows.push(row(SummaryKind::Share, name, None, Source::Share(k)));
    }
    for (j, name) in coef_names.iter().enumerate() {
        rows.push(row(SummaryKind::Coef, name, None, Source::Coef(j)));
    }
    for (s, label) in data.site_labels.iter().enumerate() {
        rows.push(row(
            SummaryKind::Effect,
            "site",
            Some(label.clone()),
            Source::Site(s),
        ));
    }
    for (t, label) in data.year_labels.iter().enumerate() {
        rows.push(row(
            SummaryKind::Effect,
            "year",
            Some(label.to_string()),
            Source::Year(t),
        ));
    }
    for (k, name) in data.group_names.iter().enumerate() {
        for (l, label) in data.group_labels[k].iter().enumerate() {
            rows.push(row(
                SummaryKind::Effect,
                name,
                Some(label.clone()),
                Source::Group(k, l),
            ));
        }
    }
    rows
}

/// The draws of a posterior being assembled, read one quantity at a time.
struct SavedDraws<'a> {
    chains: usize,
    draws: usize,
    m: usize,
    p: usize,
    /// `chains x draws x m`, chain-major.
    sd: &'a [f64],
    /// `chains x draws x p`, original units.
    coef: &'a [f64],
    effects: &'a EffectDraws,
}

impl SavedDraws<'_> {
    /// The draws of one quantity, one vector per chain.
    fn per_chain(&self, source: &Source) -> Vec<Vec<f64>> {
        let (chains, draws, m, p) = (self.chains, self.draws, self.m, self.p);
        let saved = |value: &dyn Fn(usize) -> f64| -> Vec<Vec<f64>> {
            (0..chains)
                .map(|c| (0..draws).map(|d| value(c * draws + d)).collect())
                .collect()
        };
        let thinned = |levels: &[f64], l: usize| -> Vec<Vec<f64>> {
            let n = self.effects.n;
            levels[l * n..(l + 1) * n]
                .chunks(self.effects.per_chain)
                .map(|c| c.to_vec())
                .collect()
        };
        match *source {
            Source::Sd(k) => saved(&|i| self.sd[i * m + k]),
            Source::Share(k) => saved(&|i| {
                let row = &self.sd[i * m..(i + 1) * m];
                row[k] * row[k] / row.iter().map(|s| s * s).sum::<f64>()
            }),
            Source::Coef(j) => saved(&|i| self.coef[i * p + j]),
            Source::Site(s) => thinned(&self.effects.site, s),
            Source::Year(t) => thinned(&self.effects.year, t),
            Source::Group(k, l) => thinned(&self.effects.groups[k], l),
        }
    }
}

/// Summaries of every row, in parallel on the fit's worker threads.
fn summarise_all(
    saved: &SavedDraws,
    rows: Vec<SummaryRow>,
    pool: &rayon::ThreadPool,
) -> Vec<Summary> {
    // One normal-quantile table per split-chain length, shared by all rows of that length.
    let draws_table = ZTable::new(2 * (saved.draws / 2) * saved.chains);
    let effects_table = ZTable::new(2 * (saved.effects.per_chain / 2) * saved.chains);
    pool.install(|| {
        rows.into_par_iter()
            .map(|row| {
                let table = if row.kind == SummaryKind::Effect {
                    &effects_table
                } else {
                    &draws_table
                };
                let chains = saved.per_chain(&row.source);
                summarise(row.kind, &row.term, row.level, &chains, table)
            })
            .collect()
    })
}

/// The gate's figures (worst R-hat and ESS over every quantity but the random effects)
/// and the cost of the run.
fn fit_diagnostics(summaries: &[Summary], run: &ChainRun, steps_per_draw: usize) -> FitDiagnostics {
    let gated: Vec<&Summary> = summaries
        .iter()
        .filter(|s| s.kind != SummaryKind::Effect)
        .collect();
    // An undefined figure counts as the worst possible, so that it cannot pass the gate.
    let max_of = |f: fn(&Summary) -> f64| {
        gated
            .iter()
            .map(|s| f(s))
            .map(|v| if v.is_nan() { f64::INFINITY } else { v })
            .fold(f64::NEG_INFINITY, f64::max)
    };
    let min_of = |f: fn(&Summary) -> f64| {
        gated
            .iter()
            .map(|s| f(s))
            .map(|v| if v.is_nan() { 0.0 } else { v })
            .fold(f64::INFINITY, f64::min)
    };
    let max_rhat_effects = summaries
        .iter()
        .filter(|s| s.kind == SummaryKind::Effect)
        .map(|s| s.rhat)
        .filter(|r| r.is_finite())
        .fold(1.0, f64::max);
    let (accepted, proposed) = run
        .outputs
        .iter()
        .fold((0, 0), |(a, p), o| (a + o.accepted, p + o.proposed));
    FitDiagnostics {
        max_rhat: max_of(|s| s.rhat),
        min_ess_bulk: min_of(|s| s.ess_bulk),
        min_ess_tail: min_of(|s| s.ess_tail),
        max_rhat_effects,
        acceptance_rate: accepted as f64 / proposed.max(1) as f64,
        warmup: run.warmup,
        warm_started: run.warm_started,
        steps_per_draw,
    }
}

/// The exact Gaussian conditional of all location parameters given the standard
/// deviations: mean and dense covariance. Order: site effects, year effects, group
/// effects, intercept, covariate coefficients (original units). Dense: for checks and
/// small problems only.
#[derive(Debug, Clone)]
pub struct LocationConditional {
    pub mean: Vec<f64>,
    pub cov: DMatrix<f64>,
}

/// See [`LocationConditional`]. `sds` are residual, site, year, then groups.
pub fn location_conditional(
    data: &Data,
    priors: &Priors,
    sds: &[f64],
    normal: NormalEquations,
) -> Result<LocationConditional, ModelError> {
    let stats = SuffStats::new(data, normal)?;
    let sd_names = data.sd_names();
    if sds.len() != sd_names.len() || sds.iter().any(|s| s.is_nan() || *s <= 0.0) {
        return Err(ModelError::InvalidSettings(format!(
            "expected {} positive standard deviations",
            sd_names.len()
        )));
    }
    let resolved = priors.resolve(&sd_names, &data.covariate_names, stats.y_mean, stats.y_sd)?;
    let beta_prior = beta_prior(&resolved, &stats);
    let fac =
        crate::marginal::Factorised::new(&stats, sds, Some(&beta_prior)).ok_or_else(|| {
            ModelError::Numerical("conditional precision not positive definite".into())
        })?;
    let lay = &stats.layout;
    let s_n = stats.n_sites;
    let dim = s_n + lay.q;
    let mut mean = fac.site_means(&stats, fac.mean_u.as_slice());
    mean.extend(fac.mean_u.iter());
    let beta_at = s_n + lay.fixed_offset;
    let beta_orig = stats.coef_to_original(&mean[beta_at..]);
    mean[beta_at..].copy_from_slice(&beta_orig);
    let mut a = DMatrix::identity(dim, dim);
    a.view_mut((beta_at, beta_at), (lay.p, lay.p))
        .copy_from(&stats.coef_transform());
    let cov = &a * fac.dense_covariance(&stats) * a.transpose();
    Ok(LocationConditional { mean, cov })
}

#[cfg(test)]
mod tests {
    use super::basis_columns;
    use crate::sampler::effect_thinning;

    /// For every `draws` from 100 to 5000 (effect draws per chain as the sampler thins
    /// them) and kept counts of 1, 25, the chain's own length and more than it: the kept
    /// positions are inside the chain, strictly increasing (so distinct), end at the
    /// chain's last draw, and are evenly spread (every stride is `floor` or `ceil` of
    /// `available / keep`).
    #[test]
    fn basis_columns_are_in_range_distinct_and_evenly_spread_for_every_draw_count() {
        for effect_draws in [100, 30, 1] {
            for draws in 100..=5000 {
                let (_, available) = effect_thinning(draws, effect_draws);
                for keep in [1, 7, 25, 100, available, available + 1, usize::MAX] {
                    let cols = basis_columns(available, keep);
                    let kept = keep.min(available);
                    let at = format!("draws {draws}, per chain {available}, keep {keep}");
                    assert_eq!(cols.len(), kept, "{at}");
                    assert_eq!(*cols.last().unwrap(), available - 1, "{at}");
                    let (lo, hi) = (available / kept, available.div_ceil(kept));
                    let mut prev: Option<usize> = None;
                    for &c in &cols {
                        assert!(c < available, "{at}: {c}");
                        let stride = prev.map_or(c + 1, |p| c - p);
                        assert!(
                            prev.is_none_or(|p| c > p) && (lo..=hi).contains(&stride),
                            "{at}: stride {stride} outside {lo}..={hi} in {cols:?}"
                        );
                        prev = Some(c);
                    }
                }
            }
        }
    }
}
