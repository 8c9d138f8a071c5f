//! The marginal likelihood of the variance parameters and the Gaussian conditional of the
//! location parameters, both from one Cholesky factorisation of the Schur complement.
//!
//! With `lambda = 1 / sd_residual^2`, site precision `d_s = n_s lambda + 1 / sd_site^2`
//! (constant within a count class) and `Lambda_u` the prior precision of `u` (year and
//! group effects; the coefficients' normal prior, or zero for REML/ML), the joint
//! precision of `(a, u)` is `Q = [[D, B'], [B, A]]` with `A = lambda W'W + Lambda_u` and
//! `B = lambda W'Z`. Its Schur complement `M = A - B D^-1 B' = A - lambda^2 sum_k C_k / d_k`
//! is the precision of `u` with the site effects integrated out (see `stats`). Then
//!
//! - `log|Q| = sum_k n_sites_k log d_k + log|M|`;
//! - `mu' Q mu = lambda^2 sum_k f_k / d_k + r' M^-1 r` with
//!   `r = lambda W'y + Lambda_u m_u - lambda^2 sum_k e_k / d_k`;
//! - the conditional of `u` is `N(M^-1 r, M^-1)` and, given `u`, each site effect is
//!   `N(lambda (ysum_s - w_s'u) / d_s, 1 / d_s)` independently.
//!
//! Drawing `u` and then `a | u` is an exact joint draw from the conditional of all
//! location parameters given the standard deviations; the sampler (`sampler`) makes one
//! such draw per saved state of its marginal chain, with no Gibbs sweeps. (Collapsed
//! Gibbs samplers for crossed random effects, Papaspiliopoulos, Roberts & Zanella 2020,
//! Biometrika 107(1), "Scalable inference for crossed random effects models", recalled
//! from memory, are related work: they update such blocks in turn.)
//! The likelihood identities are the standard ones for Gaussian linear mixed models
//! (e.g. Harville 1977, JASA 72; Bates & DebRoy 2004, J. Multivariate Anal. 91).

use crate::sparse::SparseFactor;
use crate::stats::{Normal, SuffStats};
use nalgebra::{Cholesky, DMatrix, DVector, Dyn};
use rand::Rng;
use rand_distr::StandardNormal;

const LN_2PI: f64 = 1.837_877_066_409_345_3;

/// Normal prior of the coefficients in the internal parameterisation (standardised
/// covariates, centred response).
#[derive(Debug, Clone)]
pub(crate) struct BetaPrior {
    pub mean: Vec<f64>,
    pub prec: Vec<f64>,
}

/// A Cholesky factor of `M`, dense or sparse (`stats::NormalEquations`).
#[derive(Debug, Clone)]
pub(crate) enum Solver {
    Dense(Cholesky<f64, Dyn>),
    Sparse(SparseFactor),
}

impl Solver {
    /// `M^-1 r`.
    pub fn solve(&self, r: &DVector<f64>) -> DVector<f64> {
        match self {
            Solver::Dense(c) => c.solve(r),
            Solver::Sparse(f) => DVector::from_vec(f.solve(r.as_slice())),
        }
    }

    /// Columns `cols` of `M^-1`, one solve each.
    pub fn inverse_columns(&self, cols: std::ops::Range<usize>) -> DMatrix<f64> {
        let q = match self {
            Solver::Dense(c) => c.l_dirty().nrows(),
            Solver::Sparse(f) => f.dim(),
        };
        let mut out = DMatrix::zeros(q, cols.len());
        for (k, j) in cols.enumerate() {
            let mut e = DVector::zeros(q);
            e[j] = 1.0;
            out.set_column(k, &self.solve(&e));
        }
        out
    }
}

/// `r = lambda W'y + Lambda_u m_u - lambda^2 sum_k e_k / d_k` and the site part of
/// `mu' Q mu`, `lambda^2 sum_k f_k / d_k`.
fn rhs(
    stats: &SuffStats,
    lambda: f64,
    d: &[f64],
    beta_prior: Option<&BetaPrior>,
) -> (DVector<f64>, f64) {
    let lambda2 = lambda * lambda;
    let mut r = &stats.wty * lambda;
    let mut quad_sites = 0.0;
    for (class, &dk) in stats.classes.iter().zip(d) {
        let w = lambda2 / dk;
        r.axpy(-w, &class.e, 1.0);
        quad_sites += w * class.f;
    }
    if let Some(bp) = beta_prior {
        let off = stats.layout.fixed_offset;
        for j in 0..stats.layout.p {
            r[off + j] += bp.prec[j] * bp.mean[j];
        }
    }
    (r, quad_sites)
}

/// One factorisation at a given set of standard deviations.
#[derive(Debug, Clone)]
pub(crate) struct Factorised {
    /// residual, site, year, groups…
    pub sds: Vec<f64>,
    pub lambda: f64,
    /// Site precision per count class.
    pub d: Vec<f64>,
    pub chol: Solver,
    pub mean_u: DVector<f64>,
    pub log_det_q: f64,
    /// `log|X' V^-1 X|` in the standardised parameterisation (trailing block of `M`).
    pub log_det_schur_beta: f64,
    /// `mu' Q mu`.
    pub quad: f64,
    /// `log|Lambda_gamma|`: the prior precision of all random effects.
    pub log_det_prior_re: f64,
}

impl Factorised {
    /// Factorise at `sds` (all positive). `None` when the Schur complement is not
    /// numerically positive definite.
    pub fn new(stats: &SuffStats, sds: &[f64], beta_prior: Option<&BetaPrior>) -> Option<Self> {
        let lay = &stats.layout;
        let q = lay.q;
        let lambda = 1.0 / (sds[0] * sds[0]);
        let prec_site = 1.0 / (sds[1] * sds[1]);
        let d: Vec<f64> = stats
            .classes
            .iter()
            .map(|c| c.n * lambda + prec_site)
            .collect();

        let lambda2 = lambda * lambda;
        let prec_year = 1.0 / (sds[2] * sds[2]);
        let group_prec: Vec<f64> = (0..lay.group_sizes.len())
            .map(|k| 1.0 / (sds[3 + k] * sds[3 + k]))
            .collect();
        let (r, quad_sites) = rhs(stats, lambda, &d, beta_prior);
        let log_det_d: f64 = stats
            .classes
            .iter()
            .zip(&d)
            .map(|(class, &dk)| class.n_sites * dk.ln())
            .sum();
        let mut log_det_prior_re =
            -(stats.n_sites as f64) * 2.0 * sds[1].ln() - lay.n_years as f64 * 2.0 * sds[2].ln();
        for (k, &size) in lay.group_sizes.iter().enumerate() {
            log_det_prior_re -= size as f64 * 2.0 * sds[3 + k].ln();
        }
        // The prior precision of `u`, on the diagonal of `M`.
        let prior_diag = |j: usize| -> f64 {
            if j < lay.n_years {
                prec_year
            } else if j < lay.fixed_offset {
                let k = lay
                    .group_offsets
                    .iter()
                    .rposition(|&off| off <= j)
                    .unwrap_or(0);
                group_prec[k]
            } else {
                beta_prior.map_or(0.0, |bp| bp.prec[j - lay.fixed_offset])
            }
        };
        let (chol, diag, half, mean_u) = match stats.normal.as_ref() {
            Normal::Dense { wtw, c } => {
                let mut m = wtw * lambda;
                for (ck, &dk) in c.iter().zip(&d) {
                    let w = lambda2 / dk;
                    m.zip_apply(ck, |a, b| *a -= w * b);
                }
                for j in 0..q {
                    m[(j, j)] += prior_diag(j);
                }
                // Symmetrise against round-off before factorising.
                for i in 0..q {
                    for j in 0..i {
                        let v = 0.5 * (m[(i, j)] + m[(j, i)]);
                        m[(i, j)] = v;
                        m[(j, i)] = v;
                    }
                }
                let chol = Cholesky::new(m)?;
                let diag: Vec<f64> = chol.l_dirty().diagonal().iter().copied().collect();
                // r' M^-1 r = |L^-1 r|^2, from the triangular solve for stability.
                let half = chol.l_dirty().solve_lower_triangular(&r)?.norm_squared();
                let mean_u = chol.solve(&r);
                (Solver::Dense(chol), diag, half, mean_u)
            }
            Normal::Sparse(ss) => {
                let mut m: Vec<f64> = ss.wtw.iter().map(|v| v * lambda).collect();
                for (ck, &dk) in ss.classes.iter().zip(&d) {
                    ck.subtract_from(&mut m, lambda2 / dk);
                }
                for j in 0..q {
                    m[ss.plan.diag[ss.plan.pos[j] as usize]] += prior_diag(j);
                }
                let f = ss.plan.factorise(&m)?;
                // The diagonal of L back in u's order, so that the coefficients' entries
                // are the trailing ones in both cases.
                let by_pos = f.diagonal();
                let diag: Vec<f64> = ss.plan.pos.iter().map(|&p| by_pos[p as usize]).collect();
                let (half, mean_u) = f.half_and_solve(r.as_slice());
                (Solver::Sparse(f), diag, half, DVector::from_vec(mean_u))
            }
        };
        let mut log_det_m = 0.0;
        let mut log_det_schur_beta = 0.0;
        for (i, &li) in diag.iter().enumerate() {
            if li.is_nan() || li <= 0.0 || !li.is_finite() {
                return None;
            }
            log_det_m += 2.0 * li.ln();
            if i >= lay.fixed_offset {
                log_det_schur_beta += 2.0 * li.ln();
            }
        }
        let quad = quad_sites + half;
        Some(Factorised {
            sds: sds.to_vec(),
            lambda,
            d,
            chol,
            mean_u,
            log_det_q: log_det_d + log_det_m,
            log_det_schur_beta,
            quad,
            log_det_prior_re,
        })
    }

    /// Re-evaluate the parts that depend on the response (`r`, `mu' Q mu`, the mean of
    /// `u`) after censored values moved (`censored.rs`); the factor depends on the
    /// standard deviations alone and is kept.
    pub fn refresh(&mut self, stats: &SuffStats, beta_prior: Option<&BetaPrior>) {
        let (r, quad_sites) = rhs(stats, self.lambda, &self.d, beta_prior);
        let (half, mean_u) = match &self.chol {
            Solver::Dense(c) => {
                let half = c
                    .l_dirty()
                    .solve_lower_triangular(&r)
                    .map_or(f64::INFINITY, |z| z.norm_squared());
                (half, c.solve(&r))
            }
            Solver::Sparse(f) => {
                let (half, mean_u) = f.half_and_solve(r.as_slice());
                (half, DVector::from_vec(mean_u))
            }
        };
        self.quad = quad_sites + half;
        self.mean_u = mean_u;
    }

    /// `-2 log L_REML` in the standardised parameterisation (flat prior on `beta`).
    pub fn neg2_reml_loglik_std(&self, stats: &SuffStats) -> f64 {
        let n = stats.n_obs as f64;
        let p = stats.layout.p as f64;
        (n - p) * LN_2PI - n * self.lambda.ln() - self.log_det_prior_re
            + self.log_det_q
            + self.lambda * stats.yty
            - self.quad
    }

    /// `-2 log L_ML` (flat prior on `beta`, profiled at the GLS estimate).
    pub fn ml_criterion(&self, stats: &SuffStats) -> f64 {
        let p = stats.layout.p as f64;
        self.neg2_reml_loglik_std(stats) - self.log_det_schur_beta + p * LN_2PI
    }

    /// `log p(y | sds)` with the coefficients' proper normal prior integrated out too.
    pub fn log_marginal(&self, stats: &SuffStats, beta_prior: &BetaPrior) -> f64 {
        let n = stats.n_obs as f64;
        let mut log_det_prior_beta = 0.0;
        let mut prior_quad = 0.0;
        for (m, p) in beta_prior.mean.iter().zip(&beta_prior.prec) {
            log_det_prior_beta += p.ln();
            prior_quad += p * m * m;
        }
        -0.5 * n * LN_2PI
            + 0.5 * n * self.lambda.ln()
            + 0.5 * (self.log_det_prior_re + log_det_prior_beta)
            - 0.5 * self.log_det_q
            - 0.5 * (self.lambda * stats.yty + prior_quad - self.quad)
    }

    /// One exact draw of `u ~ N(M^-1 r, M^-1)`.
    pub fn draw_u<R: Rng + ?Sized>(&self, rng: &mut R) -> DVector<f64> {
        let q = self.mean_u.len();
        let mut z = DVector::from_fn(q, |_, _| rng.sample::<f64, _>(StandardNormal));
        // L' x = z gives x ~ N(0, (L L')^-1).
        let x = match &self.chol {
            Solver::Dense(c) => c
                .l_dirty()
                .tr_solve_lower_triangular(&z)
                .unwrap_or_else(|| DVector::zeros(q)),
            Solver::Sparse(f) => DVector::from_vec(f.noise(z.as_mut_slice())),
        };
        &self.mean_u + x
    }

    /// Draw every site effect given `u`, into `out`.
    pub fn draw_sites<R: Rng + ?Sized>(
        &self,
        stats: &SuffStats,
        u: &[f64],
        rng: &mut R,
        out: &mut [f64],
    ) {
        for (s, slot) in out.iter_mut().enumerate() {
            *slot = self.draw_site(stats, s, u, rng);
        }
    }

    /// One draw of site `s`'s effect given `u`.
    #[inline]
    pub fn draw_site<R: Rng + ?Sized>(
        &self,
        stats: &SuffStats,
        s: usize,
        u: &[f64],
        rng: &mut R,
    ) -> f64 {
        let dk = self.d[stats.site_class[s]];
        let mean = self.lambda * (stats.site_ysum[s] - stats.site_dot(s, u)) / dk;
        let z: f64 = rng.sample(StandardNormal);
        mean + z / dk.sqrt()
    }

    /// Conditional mean of the site effects given `u`.
    pub fn site_means(&self, stats: &SuffStats, u: &[f64]) -> Vec<f64> {
        (0..stats.n_sites)
            .map(|s| {
                self.lambda * (stats.site_ysum[s] - stats.site_dot(s, u))
                    / self.d[stats.site_class[s]]
            })
            .collect()
    }

    /// Dense conditional covariance of `(a, u)`: for tests and small problems only.
    pub fn dense_covariance(&self, stats: &SuffStats) -> DMatrix<f64> {
        let s_n = stats.n_sites;
        let q = stats.layout.q;
        let m_inv = self.chol.inverse_columns(0..q);
        // G = D^-1 B' (S x q): row s is lambda w_s' / d_s.
        let mut g = DMatrix::zeros(s_n, q);
        for s in 0..s_n {
            let dk = self.d[stats.site_class[s]];
            for x in stats.site_w_ptr[s]..stats.site_w_ptr[s + 1] {
                g[(s, stats.site_w_idx[x] as usize)] = self.lambda * stats.site_w_val[x] / dk;
            }
        }
        let cov_au = -(&g * &m_inv);
        let mut cov_aa = &g * &m_inv * g.transpose();
        for s in 0..s_n {
            cov_aa[(s, s)] += 1.0 / self.d[stats.site_class[s]];
        }
        let mut out = DMatrix::zeros(s_n + q, s_n + q);
        out.view_mut((0, 0), (s_n, s_n)).copy_from(&cov_aa);
        out.view_mut((0, s_n), (s_n, q)).copy_from(&cov_au);
        out.view_mut((s_n, 0), (q, s_n))
            .copy_from(&cov_au.transpose());
        out.view_mut((s_n, s_n), (q, q)).copy_from(&m_inv);
        out
    }
}
