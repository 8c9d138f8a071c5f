//! Posterior predictive forecasts for the four targets of README.md "Forecast targets".
//!
//! For each saved effect draw `d`, a target's predictive distribution on the model scale
//! is `N(m_d, v_d)`: `m_d` holds the parts the target knows (intercept and covariates,
//! and the drawn effect of a monitored site and/or an observed year), `v_d` the variances
//! of the parts it does not (a new year's effect, a new site's effect, the effects of
//! further grouping factors — a forecast does not know the crew or laboratory in advance —
//! and residual noise). The forecast is the mixture over draws, so parameter uncertainty
//! enters through the spread of `m_d` and `v_d`. Its quantiles are found by solving the
//! mixture CDF exactly (Rao–Blackwellised: no extra Monte Carlo noise from drawing
//! observations). Under a log transform, quantiles map through `exp`; the response-scale
//! mean and sd of the mixture need not exist (each component's mean is `exp(m_d + v_d/2)`,
//! and `E[exp(v/2)]` over the posterior of `v` is infinite under half-t and exponential
//! priors, and under a half-normal one once its scale is large enough), so `mean` is the
//! posterior median of the per-draw predictive mean — finite for any posterior — and `sd`
//! is not given.
//!
//! The predictive variance `E[v_d] + Var(m_d)` is split into shares by source: each
//! unknown effect's variance, residual noise, and `Var(m_d)` as the estimation share.
//!
//! Threshold exceedance ([`exceedance`]): the probability that the value a row forecasts
//! exceeds a threshold `t` (response scale) is the mixture's survival function at `g(t)`,
//! `mean_d Phi((m_d - g(t)) / sqrt(v_d))` with `g` the transform — exact for the stored
//! draws, no sampling. It is the probability of the true value, whatever detection limit
//! a laboratory would report it against.

use crate::normal::{inverse_normal, norm_cdf};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

/// What forecasts need from a posterior: thinned joint draws of every effect with the
/// standard deviations and coefficients of the same draws, and the data's labels. It is
/// small enough to store with a version, so forecasts can be rebuilt from the store.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ForecastBasis {
    pub sd_names: Vec<String>,
    pub coef_names: Vec<String>,
    pub site_labels: Vec<String>,
    /// Observed years, ascending.
    pub year_labels: Vec<i32>,
    pub group_names: Vec<String>,
    pub group_labels: Vec<Vec<String>>,
    pub covariate_means: Vec<f64>,
    /// Per covariate, each monitored site's own value when the covariate is an attribute
    /// of the site (constant within every site), else `None`; known-site rows hold such a
    /// covariate at the site's value instead of the network mean.
    #[serde(default)]
    pub site_covariates: Vec<Option<Vec<f64>>>,
    pub site_last_year: Vec<i32>,
    /// The network trend's origin year: the last covariate is then `year - origin`, set
    /// from each row's own year (a new year's trend is extrapolated).
    #[serde(default)]
    pub trend_origin: Option<i32>,
    /// Number of joint draws.
    pub n: usize,
    /// Index of each joint draw in the posterior's full draws (chain-major).
    pub draw_index: Vec<usize>,
    /// `n_sites x n`, level-major.
    pub site: Vec<f64>,
    /// `n_years x n`, level-major.
    pub year: Vec<f64>,
    /// Per further factor, `n_levels x n`.
    pub groups: Vec<Vec<f64>>,
    /// `n x m`.
    pub sd: Vec<f64>,
    /// `n x p`, original units.
    pub coef: Vec<f64>,
}

impl ForecastBasis {
    /// Model-scale mean at the network's average covariates, per draw.
    fn mean_at_covariate_means(&self) -> Vec<f64> {
        let p = self.coef_names.len();
        (0..self.n)
            .map(|d| {
                let row = &self.coef[d * p..(d + 1) * p];
                row[0]
                    + row[1..]
                        .iter()
                        .zip(&self.covariate_means)
                        .map(|(b, x)| b * x)
                        .sum::<f64>()
            })
            .collect()
    }

    /// Latest observed year.
    pub fn data_through_year(&self) -> i32 {
        self.year_labels.last().copied().unwrap_or(0)
    }
}

/// The four forecast targets (the `target` column of `forecasts`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ForecastTarget {
    KnownSiteKnownYear,
    KnownSiteNewYear,
    NewSiteKnownYear,
    NewSiteNewYear,
}

impl ForecastTarget {
    pub fn as_str(&self) -> &'static str {
        match self {
            ForecastTarget::KnownSiteKnownYear => "known_site_known_year",
            ForecastTarget::KnownSiteNewYear => "known_site_new_year",
            ForecastTarget::NewSiteKnownYear => "new_site_known_year",
            ForecastTarget::NewSiteNewYear => "new_site_new_year",
        }
    }
    fn new_site(&self) -> bool {
        matches!(
            self,
            ForecastTarget::NewSiteKnownYear | ForecastTarget::NewSiteNewYear
        )
    }
    fn new_year(&self) -> bool {
        matches!(
            self,
            ForecastTarget::KnownSiteNewYear | ForecastTarget::NewSiteNewYear
        )
    }
}

/// How the response maps to the model scale.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Transform {
    None,
    Log,
}

impl Transform {
    /// The name used in configs, the database and screens.
    pub fn as_str(&self) -> &'static str {
        match self {
            Transform::None => "none",
            Transform::Log => "log",
        }
    }

    /// The transform named `name`, if it is one.
    pub fn parse(name: &str) -> Option<Transform> {
        [Transform::None, Transform::Log]
            .into_iter()
            .find(|t| t.as_str() == name)
    }
}

impl std::fmt::Display for Transform {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl Transform {
    /// `y` on the model scale: as given, or its natural log (`-inf` at 0, NaN below).
    pub fn to_model(&self, y: f64) -> f64 {
        match self {
            Transform::None => y,
            Transform::Log => y.ln(),
        }
    }
}

/// Which scale a published number is on: the response's own (in the series' unit), or the
/// model's (after the transform; for `log`, natural-log units of the response).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Scale {
    Response,
    Model,
}

impl Scale {
    /// The name used in the database (`scale` columns).
    pub fn as_str(&self) -> &'static str {
        match self {
            Scale::Response => "response",
            Scale::Model => "model",
        }
    }
}

/// Covariate values of a forecast (original units); `baseline` uses the network means.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Scenario {
    pub name: String,
    /// One value per covariate, or `None` for the network mean.
    pub covariates: Vec<Option<f64>>,
    /// Per covariate, an amount added to the value a row would otherwise use (the network
    /// mean, or a monitored site's own value of a covariate that is an attribute of the
    /// site); empty or 0 for none.
    #[serde(default)]
    pub shifts: Vec<f64>,
}

impl Scenario {
    /// Every covariate at its network mean.
    pub fn baseline() -> Self {
        Scenario {
            name: "baseline".into(),
            covariates: Vec::new(),
            shifts: Vec::new(),
        }
    }
}

/// The covariate values of one row of `scenario`: its set values, else a monitored site's
/// own value of a site-level covariate, the trend at the row's `year`, then the shifts
/// (a shifted covariate left at the network mean is the mean plus the shift).
fn row_covariates(
    basis: &ForecastBasis,
    site: Option<usize>,
    scenario: &Scenario,
    year: i32,
) -> Vec<Option<f64>> {
    let mut v = at_year(
        basis,
        &covariates_at(basis, site, &scenario.covariates),
        year,
    );
    for (j, &shift) in scenario.shifts.iter().enumerate() {
        if shift != 0.0 && j < v.len() {
            v[j] = Some(v[j].unwrap_or(basis.covariate_means[j]) + shift);
        }
    }
    v
}

/// One forecast row (response scale for `mean`…`q975`, model scale for the shares).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ForecastRow {
    pub target: ForecastTarget,
    pub site: Option<String>,
    pub year: i32,
    pub scenario: String,
    /// The site's last observed year (known-site rows; `None` for a new site).
    pub last_observed_year: Option<i32>,
    /// Predictive mean; under a log transform the posterior median of each draw's
    /// predictive mean `exp(m_d + v_d/2)` (see the module comment).
    pub mean: f64,
    /// Predictive sd; `None` under a log transform, where it may not exist.
    pub sd: Option<f64>,
    pub q025: f64,
    pub q10: f64,
    pub q25: f64,
    pub q50: f64,
    pub q75: f64,
    pub q90: f64,
    pub q975: f64,
    pub share_site: f64,
    pub share_year: f64,
    pub share_groups: f64,
    pub share_residual: f64,
    pub share_estimation: f64,
    /// The variance components of the parts this row does not know whose factor was
    /// observed at a single level (one site, one year, one crew): their posterior is the
    /// prior, so that part of the row's uncertainty is assumed, not estimated. Empty when
    /// every such component was estimated from the data.
    #[serde(default)]
    pub prior_only: Vec<String>,
}

impl ForecastRow {
    /// The scale of `mean`, `sd` and the quantiles of every row: the response's own (a
    /// log series' quantiles are back-transformed). The shares are fractions of the
    /// model-scale variance and have no unit.
    pub const SCALE: Scale = Scale::Response;
}

const PROBS: [f64; 7] = [0.5, 0.25, 0.75, 0.1, 0.9, 0.025, 0.975];

#[inline]
fn norm_pdf(z: f64) -> f64 {
    (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// Median of ascending values (the mean of the middle two for an even count).
fn median_sorted(sorted: &[f64]) -> f64 {
    let n = sorted.len();
    if n % 2 == 1 {
        sorted[n / 2]
    } else {
        0.5 * (sorted[n / 2 - 1] + sorted[n / 2])
    }
}

/// Quantile `p` of the equal-weight mixture of `N(means[d], sds[d]^2)`.
pub(crate) fn mixture_quantile(means: &[f64], sds: &[f64], p: f64) -> f64 {
    let n = means.len() as f64;
    let cdf_pdf = |z: f64| -> (f64, f64) {
        let mut f = 0.0;
        let mut dens = 0.0;
        for (&m, &s) in means.iter().zip(sds) {
            let u = (z - m) / s;
            f += norm_cdf(u);
            dens += norm_pdf(u) / s;
        }
        (f / n, dens / n)
    };
    let s_max = sds.iter().cloned().fold(0.0, f64::max);
    let mut lo = means.iter().cloned().fold(f64::INFINITY, f64::min) - 12.0 * s_max;
    let mut hi = means.iter().cloned().fold(f64::NEG_INFINITY, f64::max) + 12.0 * s_max;
    // Start from the Cornish-Fisher expansion with the mixture's exact first four moments
    // (a normal mixture is close to normal, so one or two Newton steps then suffice).
    let mean = means.iter().sum::<f64>() / n;
    let (mut m2, mut m3, mut m4) = (0.0, 0.0, 0.0);
    for (&m, &s) in means.iter().zip(sds) {
        let (d, v) = (m - mean, s * s);
        m2 += d * d + v;
        m3 += d * d * d + 3.0 * d * v;
        m4 += d.powi(4) + 6.0 * d * d * v + 3.0 * v * v;
    }
    let (m2, m3, m4) = (m2 / n, m3 / n, m4 / n);
    let skew = m3 / m2.powf(1.5);
    let excess = m4 / (m2 * m2) - 3.0;
    let z_p = inverse_normal(p);
    let cf = z_p + (z_p * z_p - 1.0) * skew / 6.0 + (z_p.powi(3) - 3.0 * z_p) * excess / 24.0
        - (2.0 * z_p.powi(3) - 5.0 * z_p) * skew * skew / 36.0;
    let mut z = mean + cf * m2.sqrt();
    if !(z > lo && z < hi) {
        z = mean + z_p * m2.sqrt();
    }
    // Forecasts are reported to a few significant digits; 1e-8 of the widest component's
    // sd is far below that and typically reached in two or three Newton steps.
    let tol = 1e-8 * s_max.max(1e-300);
    for _ in 0..100 {
        let (f, dens) = cdf_pdf(z);
        let err = f - p;
        if err == 0.0 {
            return z;
        }
        if err > 0.0 {
            hi = hi.min(z);
        } else {
            lo = lo.max(z);
        }
        let mut next = if dens > 0.0 { z - err / dens } else { f64::NAN };
        if !(next >= lo && next <= hi) {
            next = 0.5 * (lo + hi);
        }
        if (next - z).abs() < tol || hi - lo < tol {
            return next;
        }
        z = next;
    }
    z
}

/// The predictive distribution of one forecast on the model scale: the equal-weight
/// mixture over joint draws `d` of `N(means[d], vars[d])`.
#[derive(Debug, Clone, PartialEq)]
pub struct Predictive {
    pub means: Vec<f64>,
    pub vars: Vec<f64>,
}

impl Predictive {
    /// The mixture CDF at `y` (model scale).
    pub fn cdf(&self, y: f64) -> f64 {
        let total: f64 = self
            .means
            .iter()
            .zip(&self.vars)
            .map(|(m, v)| norm_cdf((y - m) / v.sqrt()))
            .sum();
        total / self.means.len() as f64
    }

    /// The mixture quantile `p` (model scale), solved exactly.
    pub fn quantile(&self, p: f64) -> f64 {
        let sds: Vec<f64> = self.vars.iter().map(|v| v.sqrt()).collect();
        mixture_quantile(&self.means, &sds, p)
    }

    /// The mixture's survival function `P(Y > y)` at `y` (model scale): one minus
    /// [`Predictive::cdf`], summed as upper tails so a small probability keeps its
    /// relative accuracy.
    pub fn survival(&self, y: f64) -> f64 {
        let total: f64 = self
            .means
            .iter()
            .zip(&self.vars)
            .map(|(m, v)| norm_cdf((m - y) / v.sqrt()))
            .sum();
        total / self.means.len() as f64
    }
}

/// The predictive of a new value at a monitored site (`site`, an index into
/// `basis.site_labels`) or a new one (`None`), in an observed year (`year`, an index into
/// `basis.year_labels`) or a new one (`None`), with covariates at `covariates` (original
/// units; `None` or a missing entry means the network mean). The target follows from
/// which of site and year are known. This is the one place the predictive is built:
/// [`forecast`] and the calibration study both read it.
pub fn predictive(
    basis: &ForecastBasis,
    site: Option<usize>,
    year: Option<usize>,
    covariates: &[Option<f64>],
) -> Result<Predictive, crate::ModelError> {
    let bad = |m: String| Err(crate::ModelError::InvalidSettings(m));
    if site.is_some_and(|s| s >= basis.site_labels.len()) {
        return bad(format!("site index {site:?} is not a monitored site"));
    }
    if year.is_some_and(|t| t >= basis.year_labels.len()) {
        return bad(format!("year index {year:?} is not an observed year"));
    }
    if covariates.len() > basis.covariate_means.len() {
        return bad(format!(
            "{} covariate values given for {} covariates",
            covariates.len(),
            basis.covariate_means.len()
        ));
    }
    let fixed = fixed_part(basis, &covariates_at(basis, site, covariates));
    Ok(predictive_from(basis, &fixed, site, year))
}

/// The covariate values a row is computed at: the given ones; for a monitored site, its
/// own value of each covariate that is an attribute of the site; else `None` (the network
/// mean, which is also the baseline of within-site varying covariates and of new sites).
fn covariates_at(
    basis: &ForecastBasis,
    site: Option<usize>,
    given: &[Option<f64>],
) -> Vec<Option<f64>> {
    (0..basis.covariate_means.len())
        .map(|j| {
            given.get(j).copied().flatten().or_else(|| {
                let values = basis.site_covariates.get(j)?.as_ref()?;
                site.and_then(|s| values.get(s).copied())
            })
        })
        .collect()
}

/// Model-scale mean of the fixed part per draw: the mean at the network's average
/// covariates, shifted by the scenario's covariate values.
fn fixed_part(basis: &ForecastBasis, covariates: &[Option<f64>]) -> Vec<f64> {
    let p = basis.coef_names.len();
    let base = basis.mean_at_covariate_means();
    (0..basis.n)
        .map(|d| {
            let mut v = base[d];
            for (j, x) in covariates.iter().enumerate() {
                if let Some(x) = x {
                    v += basis.coef[d * p + 1 + j] * (x - basis.covariate_means[j]);
                }
            }
            v
        })
        .collect()
}

/// [`predictive`] given the fixed part per draw: a known site or year adds its drawn
/// effect to the mean; an unknown one adds its variance. Further groups and residual
/// noise are always unknown.
fn predictive_from(
    basis: &ForecastBasis,
    fixed: &[f64],
    site: Option<usize>,
    year: Option<usize>,
) -> Predictive {
    let n = basis.n;
    let m = basis.sd_names.len();
    let sd2 = |d: usize, k: usize| basis.sd[d * m + k].powi(2);
    let means = (0..n)
        .map(|d| {
            let mut v = fixed[d];
            if let Some(s) = site {
                v += basis.site[s * n + d];
            }
            if let Some(t) = year {
                v += basis.year[t * n + d];
            }
            v
        })
        .collect();
    let vars = (0..n)
        .map(|d| {
            let mut v = sd2(d, 0) + (3..m).map(|k| sd2(d, k)).sum::<f64>();
            if site.is_none() {
                v += sd2(d, 1);
            }
            if year.is_none() {
                v += sd2(d, 2);
            }
            v
        })
        .collect();
    Predictive { means, vars }
}

/// Where a forecast row is and how its variance splits by source.
struct RowSpec<'a> {
    target: ForecastTarget,
    site: Option<String>,
    year: i32,
    scenario: &'a str,
    transform: Transform,
    /// Mean variance over draws of the site, year, groups and residual parts the target
    /// does not know (0 for a known part).
    var_parts: [f64; 4],
    /// See [`ForecastRow::prior_only`].
    prior_only: Vec<String>,
}

fn row_from(spec: RowSpec, comp: &Predictive) -> ForecastRow {
    let n = comp.means.len() as f64;
    let sds: Vec<f64> = comp.vars.iter().map(|v| v.sqrt()).collect();
    let q: Vec<f64> = PROBS
        .iter()
        .map(|&p| mixture_quantile(&comp.means, &sds, p))
        .collect();
    let mean_m = comp.means.iter().sum::<f64>() / n;
    let var_m = comp.means.iter().map(|m| (m - mean_m).powi(2)).sum::<f64>() / n;
    let mean_v = comp.vars.iter().sum::<f64>() / n;
    let (mean, sd, q) = match spec.transform {
        Transform::None => (mean_m, Some((mean_v + var_m).sqrt()), q),
        Transform::Log => {
            // The median over draws of each draw's lognormal mean: finite whatever the
            // tails of the variance posterior (the mixture's own mean may not be).
            let mut per_draw: Vec<f64> = comp
                .means
                .iter()
                .zip(&comp.vars)
                .map(|(m, v)| (m + 0.5 * v).exp())
                .collect();
            per_draw.sort_unstable_by(f64::total_cmp);
            (
                median_sorted(&per_draw),
                None,
                q.iter().map(|z| z.exp()).collect(),
            )
        }
    };
    let total = mean_v + var_m;
    let [site_var, year_var, group_var, resid_var] = spec.var_parts;
    ForecastRow {
        target: spec.target,
        site: spec.site,
        year: spec.year,
        scenario: spec.scenario.to_string(),
        last_observed_year: None,
        mean,
        sd,
        q50: q[0],
        q25: q[1],
        q75: q[2],
        q10: q[3],
        q90: q[4],
        q025: q[5],
        q975: q[6],
        share_site: site_var / total,
        share_year: year_var / total,
        share_groups: group_var / total,
        share_residual: resid_var / total,
        share_estimation: var_m / total,
        prior_only: spec.prior_only,
    }
}

/// The baseline forecast set of a posterior: every monitored site next year and in its
/// latest observed year, a new site in every observed year and next year.
pub fn forecast_baseline(basis: &ForecastBasis, transform: Transform) -> Vec<ForecastRow> {
    forecast(basis, transform, &Scenario::baseline())
}

/// The forecast set for one covariate scenario, one year ahead.
pub fn forecast(
    basis: &ForecastBasis,
    transform: Transform,
    scenario: &Scenario,
) -> Vec<ForecastRow> {
    forecast_to(basis, transform, scenario, 1)
}

/// `covariates` with the trend column (when the basis has a trend) at `year`.
fn at_year(basis: &ForecastBasis, covariates: &[Option<f64>], year: i32) -> Vec<Option<f64>> {
    let mut out = covariates.to_vec();
    if let Some(origin) = basis.trend_origin {
        let j = basis.covariate_means.len().saturating_sub(1);
        if out.len() <= j {
            out.resize(j + 1, None);
        }
        out[j] = Some(f64::from(year) - f64::from(origin));
    }
    out
}

/// The forecast set for one covariate scenario with new-year targets for each of the
/// `horizon` years after the data (at least one): each such year has a new year effect
/// of its own, and under a trend its own point on the trend line.
pub fn forecast_to(
    basis: &ForecastBasis,
    transform: Transform,
    scenario: &Scenario,
    horizon: u32,
) -> Vec<ForecastRow> {
    let m = basis.sd_names.len();
    let n_sites = basis.site_labels.len();
    let new_years: Vec<i32> = (1..=horizon.max(1) as i32)
        .map(|h| basis.data_through_year() + h)
        .collect();
    let trend = basis.trend_origin.is_some();
    // The fixed part of a new site (or of a known site without site-level covariates);
    // without a trend it is the same in every year.
    let fixed_at = |year: i32| fixed_part(basis, &row_covariates(basis, None, scenario, year));
    // Whether a known site's row needs its own fixed part (a site-level covariate the
    // scenario leaves at its baseline).
    let site_level = (0..basis.covariate_means.len()).any(|j| {
        scenario.covariates.get(j).copied().flatten().is_none()
            && basis.site_covariates.get(j).is_some_and(|v| v.is_some())
    });
    let sd2 = |d: usize, k: usize| basis.sd[d * m + k].powi(2);
    let avg = |f: &dyn Fn(usize) -> f64| (0..basis.n).map(f).sum::<f64>() / basis.n as f64;
    let resid_var = avg(&|d| sd2(d, 0));
    let site_var = avg(&|d| sd2(d, 1));
    let year_var = avg(&|d| sd2(d, 2));
    let group_var = avg(&|d| (3..m).map(|k| sd2(d, k)).sum());
    // Further groups are never known to a forecast; a new site or year only on its targets.
    let single_level_groups: Vec<String> = basis
        .group_names
        .iter()
        .zip(&basis.group_labels)
        .filter(|(_, labels)| labels.len() == 1)
        .map(|(name, _)| name.clone())
        .collect();
    let prior_only = |target: ForecastTarget| -> Vec<String> {
        let mut names = Vec::new();
        if target.new_site() && n_sites == 1 {
            names.push("site".to_string());
        }
        if target.new_year() && basis.year_labels.len() == 1 {
            names.push("year".to_string());
        }
        names.extend(single_level_groups.iter().cloned());
        names
    };
    let spec = |target: ForecastTarget, site: Option<String>, year: i32| RowSpec {
        target,
        site,
        year,
        scenario: &scenario.name,
        transform,
        var_parts: [
            if target.new_site() { site_var } else { 0.0 },
            if target.new_year() { year_var } else { 0.0 },
            group_var,
            resid_var,
        ],
        prior_only: prior_only(target),
    };
    let year_index = |y: i32| basis.year_labels.binary_search(&y).ok();

    let mut rows: Vec<ForecastRow> = Vec::new();
    // Monitored sites: each new year, and their latest observed year.
    let site_targets = new_years
        .iter()
        .map(|&y| (ForecastTarget::KnownSiteNewYear, Some(y)))
        .chain(std::iter::once((ForecastTarget::KnownSiteKnownYear, None)));
    for (target, new_year) in site_targets {
        // Used by every site when the row needs no per-site covariates (then, under a
        // trend, the row is a new year's).
        let shared = fixed_at(new_year.unwrap_or(basis.data_through_year()));
        let site_rows: Vec<ForecastRow> = (0..n_sites)
            .into_par_iter()
            .map(|s| {
                let (year, t) = match new_year {
                    Some(y) => (y, None),
                    None => {
                        let year = basis.site_last_year[s];
                        (year, year_index(year))
                    }
                };
                let comp = if site_level || (trend && new_year.is_none()) {
                    let at = row_covariates(basis, Some(s), scenario, year);
                    predictive_from(basis, &fixed_part(basis, &at), Some(s), t)
                } else {
                    predictive_from(basis, &shared, Some(s), t)
                };
                let mut row = row_from(
                    spec(target, Some(basis.site_labels[s].clone()), year),
                    &comp,
                );
                row.last_observed_year = Some(basis.site_last_year[s]);
                row
            })
            .collect();
        rows.extend(site_rows);
    }
    // A new site in every observed year, then in each new year.
    for (t, &year) in basis.year_labels.iter().enumerate() {
        let comp = predictive_from(basis, &fixed_at(year), None, Some(t));
        rows.push(row_from(
            spec(ForecastTarget::NewSiteKnownYear, None, year),
            &comp,
        ));
    }
    for &year in &new_years {
        let comp = predictive_from(basis, &fixed_at(year), None, None);
        rows.push(row_from(
            spec(ForecastTarget::NewSiteNewYear, None, year),
            &comp,
        ));
    }
    rows
}

/// Whether a threshold can be asked of a series with `transform`: finite, and positive
/// under `log` (no value of a log series lies at or below 0). The reason when it cannot.
pub fn threshold_problem(transform: Transform, threshold: f64) -> Option<String> {
    if !threshold.is_finite() {
        return Some(format!("threshold {threshold} is not a finite number"));
    }
    if transform == Transform::Log && threshold <= 0.0 {
        return Some(format!(
            "threshold {threshold} is not positive; every value of a log-scale series is, \
             so it would be exceeded with probability 1"
        ));
    }
    None
}

/// The posterior predictive probability that the value each row forecasts exceeds each
/// threshold (response scale): `out[i][k] = P(Y_i > thresholds[k])` for `rows[i]`, a
/// row of [`forecast`]`(basis, transform, scenario)` (or a subset of them). Each row's
/// predictive is rebuilt by [`predictive`] from its target, site and year, so the
/// probability belongs to exactly the mixture the row's quantiles were solved from; it is
/// that mixture's survival function at `g(threshold)`, computed exactly.
pub fn exceedance(
    basis: &ForecastBasis,
    transform: Transform,
    scenario: &Scenario,
    rows: &[ForecastRow],
    thresholds: &[f64],
) -> Result<Vec<Vec<f64>>, crate::ModelError> {
    let bad = |m: String| crate::ModelError::InvalidSettings(m);
    if let Some(problem) = thresholds
        .iter()
        .find_map(|&t| threshold_problem(transform, t))
    {
        return Err(bad(problem));
    }
    let at: Vec<f64> = thresholds.iter().map(|&t| transform.to_model(t)).collect();
    let sites: std::collections::HashMap<&str, usize> = basis
        .site_labels
        .iter()
        .enumerate()
        .map(|(i, s)| (s.as_str(), i))
        .collect();
    rows.par_iter()
        .map(|row| {
            let site = match (&row.site, row.target.new_site()) {
                (None, true) => None,
                (Some(label), false) => Some(*sites.get(label.as_str()).ok_or_else(|| {
                    bad(format!(
                        "forecast row site {label:?} is not a monitored site"
                    ))
                })?),
                _ => {
                    return Err(bad(format!(
                        "forecast row of target {} with site {:?}",
                        row.target.as_str(),
                        row.site
                    )))
                }
            };
            let year = if row.target.new_year() {
                None
            } else {
                Some(basis.year_labels.binary_search(&row.year).map_err(|_| {
                    bad(format!(
                        "forecast row year {} is not an observed year",
                        row.year
                    ))
                })?)
            };
            // The row's own covariates, as `forecast_to` computed them (its year on the
            // trend line, its scenario's values and shifts).
            let covariates = row_covariates(basis, site, scenario, row.year);
            let comp = predictive(basis, site, year, &covariates)?;
            Ok(at.iter().map(|&y| comp.survival(y)).collect())
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One component: the survival function is the normal upper tail, far into it; it
    /// and the CDF sum to 1.
    #[test]
    fn survival_of_one_component_is_the_normal_upper_tail() {
        let p = Predictive {
            means: vec![1.0],
            vars: vec![4.0],
        };
        // 1 - Phi(1) and 1 - Phi(10), from mpmath's `ncdf(-z)` at 30 digits (run offline:
        // 0.158655253931457051414767454368, 7.6198530241605260659733432516e-24).
        assert!((p.survival(3.0) - 0.158_655_253_931_457_05).abs() < 1e-15);
        assert!((p.survival(21.0) / 7.619_853_024_160_526e-24 - 1.0).abs() < 1e-12);
        assert!((p.survival(0.3) + p.cdf(0.3) - 1.0).abs() < 1e-15);
    }

    /// A one-component mixture is a normal: its quantiles are the normal quantiles.
    #[test]
    fn mixture_quantiles_reduce_to_normal_quantiles() {
        for &p in &PROBS {
            let q = mixture_quantile(&[1.5], &[2.0], p);
            assert!(
                (q - (1.5 + 2.0 * inverse_normal(p))).abs() < 1e-8,
                "{p}: {q}"
            );
        }
        // Symmetric two-component mixture: the median is the centre; the CDF at the
        // returned quantile equals p.
        let (means, sds) = ([-1.0, 3.0], [0.5, 1.5]);
        for &p in &PROBS {
            let q = mixture_quantile(&means, &sds, p);
            let f = 0.5 * (norm_cdf((q + 1.0) / 0.5) + norm_cdf((q - 3.0) / 1.5));
            assert!((f - p).abs() < 1e-9, "{p}: F(q) = {f}");
        }
    }
}
