//! REML and ML estimates of the variance components from the collapsed marginal
//! likelihood (see `marginal`), with the conventional standard errors of the coefficients
//! `sqrt(diag((X' V^-1 X)^-1))` at the estimates.
//!
//! The −2 REML log-likelihood is reported in the convention
//! `log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi)` with `X` in original units
//! (Harville 1977; the convention under which the Penicillin example gives 330.86).
//! Internally `X` is standardised, which shifts `log|X' V^-1 X|` by `-2 sum log s_j`
//! (`s_j` the covariate sds); we add it back.

use crate::data::Data;
use crate::error::ModelError;
use crate::marginal::Factorised;
use crate::optimize::minimise;
use crate::stats::{NormalEquations, SuffStats};
use serde::{Deserialize, Serialize};

/// Which likelihood to maximise.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Method {
    Reml,
    Ml,
}

/// A coefficient estimate on original units.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CoefEstimate {
    pub name: String,
    pub estimate: f64,
    pub se: f64,
}

/// Point estimates of a REML or ML fit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PointFit {
    pub method: Method,
    /// `(name, sd)` for residual, site, year, then further groups.
    pub sd: Vec<(String, f64)>,
    /// Intercept first, then covariates (original units).
    pub coef: Vec<CoefEstimate>,
    /// `-2` times the maximised (restricted) log-likelihood.
    pub criterion: f64,
    pub n_obs: usize,
    pub iterations: usize,
    pub converged: bool,
    /// Guard warnings and variances estimated at zero.
    pub warnings: Vec<String>,
}

impl PointFit {
    /// The sd of the named component.
    pub fn sd_of(&self, name: &str) -> Option<f64> {
        self.sd.iter().find(|(n, _)| n == name).map(|(_, v)| *v)
    }
}

/// Maximise the REML or ML likelihood of `data`.
///
/// A factor with a single level is refused: with a flat prior on the intercept its
/// variance does not enter the likelihood at all.
pub fn fit_point(data: &Data, method: Method) -> Result<PointFit, ModelError> {
    fit_point_using(data, method, NormalEquations::Auto)
}

/// [`fit_point`] with the reduced system stored as `normal` says.
pub fn fit_point_using(
    data: &Data,
    method: Method,
    normal: NormalEquations,
) -> Result<PointFit, ModelError> {
    if data.n_censored() > 0 {
        return Err(ModelError::Censored {
            censored: data.n_censored(),
            observations: data.n_obs(),
        });
    }
    if let Some((factor, levels)) = data.factor_levels().into_iter().find(|(_, l)| *l < 2) {
        return Err(ModelError::TooFewLevels { factor, levels });
    }
    let stats = SuffStats::new(data, normal)?;
    point_from_stats(data, &stats, method)
}

pub(crate) fn point_from_stats(
    data: &Data,
    stats: &SuffStats,
    method: Method,
) -> Result<PointFit, ModelError> {
    let names = data.sd_names();
    let m = names.len();
    // Parameters: log residual variance, then each component's variance as a ratio to
    // the residual variance, bounded below by (practically) zero. On this scale the
    // criterion keeps a non-zero slope at the boundary, so an optimiser cannot stall at
    // a tiny variance the way it can on the log-sd scale, where every slope vanishes as
    // the sd goes to zero.
    let to_sds = |x: &[f64]| -> Vec<f64> {
        let sd_resid = (0.5 * x[0]).exp();
        std::iter::once(sd_resid)
            .chain(x[1..].iter().map(|r| r.max(0.0).sqrt() * sd_resid))
            .collect()
    };
    let objective = |x: &[f64]| -> f64 {
        match Factorised::new(stats, &to_sds(x), None) {
            Some(f) => match method {
                Method::Reml => f.neg2_reml_loglik_std(stats),
                Method::Ml => f.ml_criterion(stats),
            },
            None => f64::INFINITY,
        }
    };
    let log_var = (stats.y_sd * stats.y_sd).ln();
    let ratio_floor = 1e-12;
    let mut lower = vec![log_var - 40.0];
    let mut upper = vec![log_var + 15.0];
    lower.extend(std::iter::repeat_n(ratio_floor, m - 1));
    upper.extend(std::iter::repeat_n(1e8, m - 1));
    let mut best: Option<crate::optimize::Minimum> = None;
    for (resid_share, ratio) in [(0.5, 1.0), (0.2, 4.0), (0.8, 0.1), (0.5, 0.01)] {
        let mut x0 = vec![log_var + f64::ln(resid_share)];
        x0.extend(std::iter::repeat_n(ratio, m - 1));
        let found = minimise(&objective, &x0, &lower, &upper, 1e-8, 1000);
        if best.as_ref().is_none_or(|b| found.value < b.value) {
            best = Some(found);
        }
    }
    let best = best.ok_or_else(|| ModelError::Numerical("optimiser produced no result".into()))?;
    if !best.value.is_finite() {
        return Err(ModelError::Numerical(
            "the likelihood could not be evaluated at any start value".into(),
        ));
    }
    let sds = to_sds(&best.x);
    let fac = Factorised::new(stats, &sds, None).ok_or_else(|| {
        ModelError::Numerical("Schur complement not positive definite at the estimate".into())
    })?;
    let lay = &stats.layout;
    let beta_std: Vec<f64> = (0..lay.p)
        .map(|j| fac.mean_u[lay.fixed_offset + j])
        .collect();
    let estimates = stats.coef_to_original(&beta_std);
    let cov_std = fac
        .chol
        .inverse_columns(lay.fixed_offset..lay.q)
        .rows(lay.fixed_offset, lay.p)
        .into_owned();
    let t = stats.coef_transform();
    let cov = &t * cov_std * t.transpose();
    let mut coef_names = vec!["intercept".to_string()];
    coef_names.extend(data.covariate_names.iter().cloned());
    let coef = coef_names
        .into_iter()
        .enumerate()
        .map(|(j, name)| CoefEstimate {
            name,
            estimate: estimates[j],
            se: cov[(j, j)].max(0.0).sqrt(),
        })
        .collect();
    let criterion = match method {
        Method::Reml => {
            fac.neg2_reml_loglik_std(stats) + 2.0 * stats.cov_sd.iter().map(|s| s.ln()).sum::<f64>()
        }
        Method::Ml => fac.ml_criterion(stats),
    };
    let mut warnings = data.warnings.clone();
    for (name, ratio) in names.iter().skip(1).zip(&best.x[1..]) {
        if *ratio <= ratio_floor * 10.0 {
            warnings.push(format!(
                "the {name} sd is estimated at zero (boundary of the parameter space)"
            ));
        }
    }
    if !best.converged {
        warnings.push(format!(
            "the optimiser stopped after {} iterations without meeting its tolerance",
            best.iterations
        ));
    }
    Ok(PointFit {
        method,
        sd: names.into_iter().zip(sds).collect(),
        coef,
        criterion,
        n_obs: stats.n_obs,
        iterations: best.iterations,
        converged: best.converged,
        warnings,
    })
}
