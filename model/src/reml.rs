//! REML and ML estimates of the variance components from the collapsed marginal
//! likelihood (see `marginal`), with the conventional standard errors of the coefficients
//! `sqrt(diag((X' V^-1 X)^-1))` at the estimates.
//!
//! The REML criterion is reported in the convention
//! `log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi)` with `X` in original units
//! (Harville 1977; the convention under which the Penicillin example gives 330.86).
//! Internally `X` is standardised, which shifts `log|X' V^-1 X|` by `-2 sum log s_j`
//! (`s_j` the covariate sds); we add it back.

use crate::data::Data;
use crate::error::ModelError;
use crate::marginal::Factorised;
use crate::optimize::minimise;
use crate::stats::SuffStats;
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
pub fn fit_point(data: &Data, method: Method) -> Result<PointFit, ModelError> {
    let stats = SuffStats::new(data);
    point_from_stats(data, &stats, method)
}

pub(crate) fn point_from_stats(
    data: &Data,
    stats: &SuffStats,
    method: Method,
) -> Result<PointFit, ModelError> {
    let names = data.sd_names();
    let m = names.len();
    let scale = stats.y_sd;
    let objective = |eta: &[f64]| -> f64 {
        let sds: Vec<f64> = eta.iter().map(|e| e.exp()).collect();
        match Factorised::new(stats, &sds, None) {
            Some(f) => match method {
                Method::Reml => f.reml_criterion_std(stats),
                Method::Ml => f.ml_criterion(stats),
            },
            None => f64::INFINITY,
        }
    };
    // The bounds are generous: an sd below 1e-7 of the response's sd is zero for every
    // practical purpose, and pinning it there keeps the factorisation well conditioned.
    let lower = vec![(scale * 1e-7).ln(); m];
    let upper = vec![(scale * 1e3).ln(); m];
    let mut best: Option<crate::optimize::Minimum> = None;
    for start in [0.5, 0.15] {
        let x0 = vec![(scale * start).ln(); m];
        let found = minimise(&objective, &x0, &lower, &upper, 1e-7, 500);
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
    let sds: Vec<f64> = best.x.iter().map(|e| e.exp()).collect();
    let fac = Factorised::new(stats, &sds, None).ok_or_else(|| {
        ModelError::Numerical("Schur complement not positive definite at the estimate".into())
    })?;
    let lay = &stats.layout;
    let beta_std: Vec<f64> = (0..lay.p)
        .map(|j| fac.mean_u[lay.fixed_offset + j])
        .collect();
    let estimates = stats.coef_to_original(&beta_std);
    let m_inv = fac.chol.inverse();
    let cov_std = m_inv
        .view((lay.fixed_offset, lay.fixed_offset), (lay.p, lay.p))
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
            fac.reml_criterion_std(stats) + 2.0 * stats.cov_sd.iter().map(|s| s.ln()).sum::<f64>()
        }
        Method::Ml => fac.ml_criterion(stats),
    };
    let mut warnings = data.warnings.clone();
    for (name, eta) in names.iter().zip(&best.x) {
        if *eta <= lower[0] + 1e-9 {
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
