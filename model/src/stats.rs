//! Sufficient statistics of the crossed model, built in one pass over the observations.
//!
//! Notation (docs/architecture.md, "Notation in the code"): `y = W u + Z a + e`, where `a`
//! are the site effects and `u = (b, c, beta)` stacks the year effects, the effects of
//! further grouping factors and the fixed coefficients (intercept first, then standardised
//! covariates) — `beta` last so that the trailing block of a Cholesky factor belongs to the
//! coefficients.
//!
//! Because every observation belongs to exactly one site, `Z'Z = diag(n_s)` and the site
//! block of the normal equations is diagonal. Eliminating it (a Schur complement) only
//! needs, per site, `n_s`, the site sum of the response and the site sum `w_s` of the rows
//! of `W`. Sites with the same count `n_s` share the same diagonal entry for every value
//! of the variance parameters, so we keep, per count class `k`,
//! `C_k = sum w_s w_s'`, `e_k = sum w_s ysum_s` and `f_k = sum ysum_s^2`. A marginal
//! likelihood evaluation then costs `O(K q^2 + q^3)` for `K` count classes and `q`
//! non-site parameters: nothing proportional to the number of observations or sites.
//!
//! The response is centred at its mean (translation invariance keeps the −2 REML log-likelihood
//! unchanged and avoids cancellation in `y'y - mu'Q mu`); covariates are centred and
//! scaled by their (population) sd.

use crate::data::Data;
use crate::sparse::{SparsePlan, SparseStats};
use nalgebra::{DMatrix, DVector};

/// How the reduced system of the non-site parameters is stored and factorised.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum NormalEquations {
    /// Sparse once the grouping factors have more than [`SPARSE_FROM_LEVELS`] levels in
    /// all, dense below.
    #[default]
    Auto,
    /// Dense `q x q` matrices and a dense Cholesky factor.
    Dense,
    /// A fixed sparse pattern and a supernodal sparse Cholesky factor (`sparse`).
    Sparse,
}

/// Levels of the grouping factors (years not counted) from which `Auto` goes sparse. On
/// B4-shaped data (`benches/observers.rs`) both take the same time at 30 levels; sparse
/// is 1.8 times as fast at 100 and 8 times at 300 (docs/benchmarks.md).
pub const SPARSE_FROM_LEVELS: usize = 60;

impl NormalEquations {
    /// Whether `data`'s reduced system is kept sparse.
    pub(crate) fn is_sparse_for(self, data: &Data) -> bool {
        self.sparse(&Layout::new(data))
    }

    fn sparse(self, layout: &Layout) -> bool {
        match self {
            NormalEquations::Auto => layout.fixed_offset - layout.n_years > SPARSE_FROM_LEVELS,
            NormalEquations::Dense => false,
            NormalEquations::Sparse => true,
        }
    }
}

/// `W'W` and the classes' `C_k`, dense or on a sparse pattern.
#[derive(Debug, Clone)]
pub(crate) enum Normal {
    Dense {
        wtw: DMatrix<f64>,
        c: Vec<DMatrix<f64>>,
    },
    Sparse(SparseStats),
}

/// Positions of the parameter blocks inside `u`.
#[derive(Debug, Clone)]
pub(crate) struct Layout {
    pub n_years: usize,
    /// Offset of each further grouping factor's first level inside `u`.
    pub group_offsets: Vec<usize>,
    pub group_sizes: Vec<usize>,
    /// Offset of the intercept inside `u`.
    pub fixed_offset: usize,
    /// Number of fixed coefficients including the intercept.
    pub p: usize,
    pub q: usize,
}

impl Layout {
    pub(crate) fn new(data: &Data) -> Self {
        let n_years = data.n_years();
        let mut group_offsets = Vec::new();
        let mut group_sizes = Vec::new();
        let mut at = n_years;
        for labels in &data.group_labels {
            group_offsets.push(at);
            group_sizes.push(labels.len());
            at += labels.len();
        }
        let p = 1 + data.covariates.len();
        Layout {
            n_years,
            group_offsets,
            group_sizes,
            fixed_offset: at,
            p,
            q: at + p,
        }
    }
}

/// Row `i` of `W` as (index in `u`, value): its year, its group levels, the intercept and
/// its standardised covariates.
pub(crate) fn design_row(
    data: &Data,
    layout: &Layout,
    (cov_mean, cov_sd): (&[f64], &[f64]),
    i: usize,
    out: &mut Vec<(usize, f64)>,
) {
    out.clear();
    out.push((data.year[i] as usize, 1.0));
    for (k, g) in data.groups.iter().enumerate() {
        out.push((layout.group_offsets[k] + g[i] as usize, 1.0));
    }
    out.push((layout.fixed_offset, 1.0));
    for (j, c) in data.covariates.iter().enumerate() {
        out.push((
            layout.fixed_offset + 1 + j,
            (c[i] - cov_mean[j]) / cov_sd[j],
        ));
    }
}

/// Sites that share one observation count.
#[derive(Debug, Clone)]
pub(crate) struct CountClass {
    /// Observations per site in this class.
    pub n: f64,
    pub n_sites: f64,
    pub e: DVector<f64>,
    pub f: f64,
}

/// Everything a marginal-likelihood evaluation or a location draw needs.
#[derive(Debug, Clone)]
pub(crate) struct SuffStats {
    pub layout: Layout,
    pub n_obs: usize,
    pub n_sites: usize,
    pub y_mean: f64,
    pub y_sd: f64,
    pub cov_mean: Vec<f64>,
    pub cov_sd: Vec<f64>,
    /// The design part, shared: chains that move censored values (`censored.rs`) clone
    /// the rest, which depends on the response.
    pub normal: std::sync::Arc<Normal>,
    pub wty: DVector<f64>,
    pub yty: f64,
    pub classes: Vec<CountClass>,
    pub site_class: Vec<usize>,
    pub site_ysum: Vec<f64>,
    /// Sparse `w_s` per site: entries `site_w_idx[site_w_ptr[s]..site_w_ptr[s+1]]`.
    /// Shared like `normal`: they do not depend on the response.
    pub site_w_ptr: std::sync::Arc<Vec<usize>>,
    pub site_w_idx: std::sync::Arc<Vec<u32>>,
    pub site_w_val: std::sync::Arc<Vec<f64>>,
}

impl SuffStats {
    /// Fails only when the sparse storage cannot be planned (faer reports an index
    /// overflow or memory exhaustion for the pattern).
    pub fn new(data: &Data, normal: NormalEquations) -> Result<Self, crate::ModelError> {
        let layout = Layout::new(data);
        let sparse = normal.sparse(&layout);
        let n = data.n_obs();
        let q = layout.q;
        let y_mean = data.response.iter().sum::<f64>() / n as f64;
        let y_var = data
            .response
            .iter()
            .map(|y| (y - y_mean).powi(2))
            .sum::<f64>()
            / n as f64;
        let (cov_mean, cov_sd): (Vec<f64>, Vec<f64>) = data
            .covariates
            .iter()
            .map(|c| {
                let m = c.iter().sum::<f64>() / n as f64;
                let v = c.iter().map(|x| (x - m).powi(2)).sum::<f64>() / n as f64;
                (m, v.sqrt())
            })
            .unzip();

        // One sparse row of W per observation: (index in u, value).
        let nnz = 1 + data.groups.len() + layout.p;
        let row = |i: usize, out: &mut Vec<(usize, f64)>| {
            design_row(data, &layout, (&cov_mean, &cov_sd), i, out)
        };

        // Kept sparse, W'W and the classes' C_k live on the plan's pattern instead.
        let dense_q = if sparse { 0 } else { q };
        let mut wtw = DMatrix::zeros(dense_q, dense_q);
        let mut wty = DVector::zeros(q);
        let mut yty = 0.0;
        let mut entries = Vec::with_capacity(nnz);
        // Observations grouped by site with a counting sort: O(n).
        let n_sites = data.n_sites();
        let mut site_start = vec![0usize; n_sites + 1];
        for &s in &data.site {
            site_start[s as usize + 1] += 1;
        }
        for s in 0..n_sites {
            site_start[s + 1] += site_start[s];
        }
        let mut order = vec![0usize; n];
        let mut fill = site_start.clone();
        for (i, &s) in data.site.iter().enumerate() {
            order[fill[s as usize]] = i;
            fill[s as usize] += 1;
        }

        let mut site_ysum = vec![0.0; n_sites];
        let mut site_w_ptr = Vec::with_capacity(n_sites + 1);
        let mut site_w_idx = Vec::new();
        let mut site_w_val = Vec::new();
        let mut scratch = vec![0.0; q];
        let mut touched: Vec<usize> = Vec::new();
        let mut is_touched = vec![false; q];
        site_w_ptr.push(0);
        for s in 0..n_sites {
            let mut ysum = 0.0;
            for &i in &order[site_start[s]..site_start[s + 1]] {
                let y = data.response[i] - y_mean;
                ysum += y;
                yty += y * y;
                row(i, &mut entries);
                for &(a, va) in &entries {
                    wty[a] += va * y;
                    if !sparse {
                        for &(b, vb) in &entries {
                            wtw[(a, b)] += va * vb;
                        }
                    }
                    if !is_touched[a] {
                        is_touched[a] = true;
                        touched.push(a);
                    }
                    scratch[a] += va;
                }
            }
            touched.sort_unstable();
            for &a in &touched {
                site_w_idx.push(a as u32);
                site_w_val.push(scratch[a]);
                scratch[a] = 0.0;
                is_touched[a] = false;
            }
            touched.clear();
            site_w_ptr.push(site_w_idx.len());
            site_ysum[s] = ysum;
        }

        // Count classes, in increasing order of n_s.
        let mut counts: Vec<usize> = (0..n_sites)
            .map(|s| site_start[s + 1] - site_start[s])
            .collect();
        let mut distinct = counts.clone();
        distinct.sort_unstable();
        distinct.dedup();
        let class_of = |c: usize| distinct.binary_search(&c).unwrap_or(0);
        let mut classes: Vec<CountClass> = distinct
            .iter()
            .map(|&c| CountClass {
                n: c as f64,
                n_sites: 0.0,
                e: DVector::zeros(q),
                f: 0.0,
            })
            .collect();
        let mut class_c = vec![DMatrix::zeros(dense_q, dense_q); distinct.len()];
        let mut site_class = Vec::with_capacity(n_sites);
        for (s, count) in counts.iter_mut().enumerate() {
            let k = class_of(*count);
            site_class.push(k);
            let class = &mut classes[k];
            class.n_sites += 1.0;
            let (lo, hi) = (site_w_ptr[s], site_w_ptr[s + 1]);
            let ysum = site_ysum[s];
            class.f += ysum * ysum;
            for x in lo..hi {
                let (a, va) = (site_w_idx[x] as usize, site_w_val[x]);
                class.e[a] += va * ysum;
                if !sparse {
                    for z in lo..hi {
                        class_c[k][(a, site_w_idx[z] as usize)] += va * site_w_val[z];
                    }
                }
            }
        }

        let normal = std::sync::Arc::new(if sparse {
            let plan = SparsePlan::new(
                q,
                layout.n_years,
                layout.fixed_offset,
                &site_w_ptr,
                &site_w_idx,
            )
            .ok_or_else(|| {
                crate::ModelError::Numerical(format!(
                    "the sparse reduced system of {q} parameters could not be planned \
                     (too many entries for its index type, or out of memory)"
                ))
            })?;
            Normal::Sparse(SparseStats::new(
                plan,
                (n, &row),
                (&site_w_ptr, &site_w_idx, &site_w_val),
                &site_class,
                distinct.len(),
            ))
        } else {
            Normal::Dense { wtw, c: class_c }
        });
        Ok(SuffStats {
            layout,
            n_obs: n,
            n_sites,
            y_mean,
            y_sd: y_var.sqrt(),
            cov_mean,
            cov_sd,
            normal,
            wty,
            yty,
            classes,
            site_class,
            site_ysum,
            site_w_ptr: site_w_ptr.into(),
            site_w_idx: site_w_idx.into(),
            site_w_val: site_w_val.into(),
        })
    }

    /// `w_s' u` for one site.
    #[inline]
    pub fn site_dot(&self, s: usize, u: &[f64]) -> f64 {
        let (lo, hi) = (self.site_w_ptr[s], self.site_w_ptr[s + 1]);
        self.site_w_idx[lo..hi]
            .iter()
            .zip(&self.site_w_val[lo..hi])
            .map(|(&i, &v)| v * u[i as usize])
            .sum()
    }

    /// Map standardised coefficients (intercept at covariate means, per-sd slopes, on the
    /// centred response) to original units: `beta_orig = T beta_std`, plus the response
    /// mean on the intercept.
    pub fn coef_to_original(&self, beta_std: &[f64]) -> Vec<f64> {
        let mut out = Vec::with_capacity(beta_std.len());
        let mut intercept = beta_std[0] + self.y_mean;
        for (j, b) in beta_std[1..].iter().enumerate() {
            intercept -= b * self.cov_mean[j] / self.cov_sd[j];
        }
        out.push(intercept);
        for (j, b) in beta_std[1..].iter().enumerate() {
            out.push(b / self.cov_sd[j]);
        }
        out
    }

    /// The matrix `T` of `beta_orig = T beta_std` (without the response-mean shift).
    pub fn coef_transform(&self) -> DMatrix<f64> {
        let p = self.layout.p;
        let mut t = DMatrix::zeros(p, p);
        t[(0, 0)] = 1.0;
        for j in 1..p {
            t[(0, j)] = -self.cov_mean[j - 1] / self.cov_sd[j - 1];
            t[(j, j)] = 1.0 / self.cov_sd[j - 1];
        }
        t
    }
}
