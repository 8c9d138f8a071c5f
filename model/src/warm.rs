//! Warm starts: the previous version's posterior of the log standard deviations checked
//! against the new data, re-centred on them, and the chains' start points.
//!
//! A warm start reuses what the previous version learnt about the *shape* of the
//! posterior (its covariance, from thousands of draws), not where it was:
//! - **Re-centring.** A Laplace fit of the new data (the one the cold path starts from)
//!   gives the mode `mu_new` and curvature covariance `S_new`. The proposal is centred on
//!   `mu_new` and keeps the previous posterior's covariance `S_prev`: a sample covariance
//!   of ~4000 draws carries the skew and the tail width of the log standard deviations
//!   that the curvature at the mode misses, and one more year or a few more sites change
//!   the posterior's location far more than its shape.
//! - **Conflict.** When the new data conflict with the previous posterior, its shape is no
//!   guide either. The conflict is measured before any chain runs, as the Mahalanobis
//!   distance `d` of `mu_new` from the previous mean under `S_prev + S_new` (the
//!   difference of two estimates, each with its own uncertainty; the sum errs towards
//!   accepting). The warm start is refused with [`ModelError::WarmStartRefused`] when `d^2`
//!   exceeds the `1 - 1e-6` quantile of chi-square with `m` degrees of freedom (`d` about
//!   4.9 for 1 component, 5.7 for 3, 6.7 for 6). A new typical or outlying year, new sites
//!   or a few corrected values move `d` to about 0.5–2 (docs/benchmarks.md, warm-start
//!   matrix); a response multiplied by 1000 moves every log standard deviation by
//!   `ln 1000 = 6.9`, tens of posterior sds.
//! - **Start points.** Each chain starts from its own draw of `N(mu_new, (1.5 L)(1.5 L)')`
//!   with `L L' = S_prev`: over-dispersed relative to the posterior, as R-hat assumes, and
//!   drawn from stream 0 of the seed (chains use streams 1, 2, …), so they do not depend
//!   on how chains are scheduled. The cold path draws its starts the same way around its
//!   Laplace fit.
//! - **Adaptation.** During a warm warm-up only the random walk's scale adapts; the
//!   proposal is refitted to the chain's own warm-up draws only when they hold at least
//!   [`REFIT_ESS_PER_COMPONENT`] effective draws per component (see `sampler::run_chain`).

use crate::data::Data;
use crate::error::ModelError;
use crate::posterior::laplace;
use crate::sampler::{Fit, SamplerSettings, Target, WarmStart};
use crate::stats::SuffStats;
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Upper-tail probability of chi-square (m degrees of freedom) beyond which the new data's
/// mode is taken to conflict with the previous posterior.
pub const CONFLICT_TAIL: f64 = 1e-6;

/// Scale of the start points' spread relative to the posterior's.
pub(crate) const START_SPREAD: f64 = 1.5;

/// A warm warm-up refits its proposal to its own draws only when the later half of its
/// history holds at least this many effective draws per variance component (the minimum
/// bulk ESS over components). An `m x m` covariance fitted to fewer is noisier than the
/// previous version's, fitted to thousands: measured, refits from 23–75 draws of a
/// 150-iteration warm-up failed the gate with 5 and 6 components (issue 10).
pub const REFIT_ESS_PER_COMPONENT: f64 = 30.0;

/// A warm start checked against the new data: where its proposal is centred, how far that
/// is from the previous posterior, and where each chain starts.
#[derive(Debug, Clone, PartialEq)]
pub struct WarmPlan {
    /// Centre of the proposal: the Laplace mode of the new data's posterior of the log
    /// standard deviations.
    pub centre: Vec<f64>,
    /// Mahalanobis distance of `centre` from the previous posterior mean (module doc);
    /// at most [`conflict_threshold`] of the number of components.
    pub distance: f64,
    /// Start point of each chain (log standard deviations).
    pub starts: Vec<Vec<f64>>,
}

/// The distance above which a warm start of `m` components is refused.
pub fn conflict_threshold(m: usize) -> f64 {
    ChiSquared::new(m.max(1) as f64)
        .map(|c| c.inverse_cdf(1.0 - CONFLICT_TAIL).sqrt())
        .unwrap_or(f64::INFINITY)
}

/// Over-dispersed start points around a fit: `chains` draws of `N(mean, (s L)(s L)')` with
/// `s` = [`START_SPREAD`], from stream 0 of `seed`.
pub(crate) fn overdispersed_starts(fit: &Fit, chains: usize, seed: u64) -> Vec<Vec<f64>> {
    let m = fit.mean.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(0);
    let wide = &fit.chol * START_SPREAD;
    (0..chains)
        .map(|_| {
            let z = DVector::from_fn(m, |_, _| rng.sample::<f64, _>(StandardNormal));
            (&fit.mean + &wide * z).iter().copied().collect()
        })
        .collect()
}

/// Check `warm` against the new data and plan the warm start: the re-centred proposal
/// (returned as a [`Fit`] for the chains) and the start points, or the refusal.
pub(crate) fn plan(
    target: &Target,
    data: &Data,
    stats: &SuffStats,
    settings: &SamplerSettings,
    warm: &WarmStart,
) -> Result<(WarmPlan, Fit), ModelError> {
    let m = warm.log_sd_mean.len();
    let prev_cov = DMatrix::from_row_slice(m, m, &warm.log_sd_cov);
    let prev =
        Fit::from_cov(DVector::from_vec(warm.log_sd_mean.clone()), &prev_cov).ok_or_else(|| {
            ModelError::Numerical("warm-start covariance is not positive definite".into())
        })?;
    // The Laplace fit's own warnings concern a proposal this path does not use.
    let mut curvature_warnings = Vec::new();
    let new = laplace(target, data, stats, &mut curvature_warnings)?;
    // Without a usable curvature, the previous covariance stands in for the new one.
    let new_cov = if curvature_warnings.is_empty() {
        new.cov()
    } else {
        prev_cov.clone()
    };
    let shift = &new.mean - &prev.mean;
    let pooled = nalgebra::Cholesky::new(&prev_cov + &new_cov).ok_or_else(|| {
        ModelError::Numerical("warm-start covariance is not positive definite".into())
    })?;
    let distance = shift.dot(&pooled.solve(&shift)).max(0.0).sqrt();
    let threshold = conflict_threshold(m);
    if distance.is_nan() || distance > threshold {
        return Err(ModelError::WarmStartRefused {
            reason: conflict_reason(&warm.sd_names, &shift, &pooled, distance, threshold),
            distance,
        });
    }
    let fit = Fit {
        mean: new.mean.clone(),
        chol: prev.chol.clone(),
    };
    let plan = WarmPlan {
        centre: new.mean.iter().copied().collect(),
        distance,
        starts: overdispersed_starts(&fit, settings.chains, settings.seed),
    };
    Ok((plan, fit))
}

/// Why a warm start was refused, in the analyst's terms: the component that moved most
/// (in posterior sds), by what factor, and the distance against its threshold.
fn conflict_reason(
    names: &[String],
    shift: &DVector<f64>,
    pooled: &nalgebra::Cholesky<f64, nalgebra::Dyn>,
    distance: f64,
    threshold: f64,
) -> String {
    let l = pooled.l();
    let var = &l * l.transpose();
    let worst = (0..shift.len())
        .max_by(|&a, &b| {
            let z = |k: usize| (shift[k] / var[(k, k)].sqrt()).abs();
            z(a).total_cmp(&z(b))
        })
        .unwrap_or(0);
    let factor = significant(shift[worst].exp());
    let moved = names.get(worst).map_or("a", |n| n.as_str());
    let scale = if shift[worst].abs() > 3.0 {
        " (a change of the response's unit or scale?)"
    } else {
        ""
    };
    format!(
        "the new data conflict with the previous version's posterior: the {moved} standard \
         deviation is {factor} times the previous estimate{scale}, a distance of \
         {distance:.1} from the previous posterior where the warm start is refused above \
         {threshold:.1}"
    )
}

/// `x` to three significant digits, without an exponent.
fn significant(x: f64) -> String {
    if !(x.is_finite() && x > 0.0) {
        return format!("{x}");
    }
    let digits = (2 - x.log10().floor() as i32).max(0) as usize;
    format!("{x:.digits$}")
}
