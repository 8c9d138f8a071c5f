"""Dense exact formulas for the crossed random-intercept model, for stored test references.

What it provides: the marginal covariance
    V = sd_residual^2 I + sum_k sd_k^2 Z_k Z_k'
(Z_k the 0/1 indicator matrix of grouping factor k), the GLS fit at given sds, the
conventional coefficient standard errors sqrt(diag((X' V^-1 X)^-1)), the −2 REML log-likelihood
    log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi)
and minus twice the ML log-likelihood
    log|V| + r' V^-1 r + n log(2 pi)
with r = y - X beta_hat the GLS residuals. Everything is a plain Cholesky computation on
the n x n matrix V, so it is exact up to rounding and only meant for small n (a few
hundred rows).

Library: numpy + scipy only (versions are recorded by the scripts that import this).
Rerun: nothing to run; it is imported by the other scripts in this folder, e.g.
    /work/.venv-ref/bin/python model/tests/reference/penicillin_reml.py
"""

import numpy as np
from scipy.linalg import cho_factor, cho_solve
from scipy.optimize import minimize

LOG_2PI = float(np.log(2.0 * np.pi))


def indicator(codes):
    """0/1 indicator matrix (n x levels) of a grouping factor given as any labels."""
    codes = np.asarray(codes)
    levels, idx = np.unique(codes, return_inverse=True)
    z = np.zeros((codes.shape[0], levels.shape[0]))
    z[np.arange(codes.shape[0]), idx] = 1.0
    return z


def marginal_cov(sd_residual, sds, zs):
    """V = sd_residual^2 I + sum_k sds[k]^2 Z_k Z_k'."""
    n = zs[0].shape[0]
    v = (sd_residual ** 2) * np.eye(n)
    for sd, z in zip(sds, zs):
        v += (sd ** 2) * (z @ z.T)
    return v


def gls(v, x, y):
    """GLS at a fixed V.

    Returns a dict with beta, cov_beta = (X' V^-1 X)^-1, residuals r, the quadratic form
    r' V^-1 r, log|V| and log|X' V^-1 X|. Log-determinants come from Cholesky diagonals
    (2 * sum log diag) so they never overflow the way det() would.
    """
    cv = cho_factor(v, lower=True)
    vinv_x = cho_solve(cv, x)
    vinv_y = cho_solve(cv, y)
    xtvx = x.T @ vinv_x
    cx = cho_factor(xtvx, lower=True)
    beta = cho_solve(cx, x.T @ vinv_y)
    r = y - x @ beta
    quad = float(r @ cho_solve(cv, r))
    logdet_v = 2.0 * float(np.sum(np.log(np.diag(cv[0]))))
    logdet_xtvx = 2.0 * float(np.sum(np.log(np.diag(cx[0]))))
    cov_beta = cho_solve(cx, np.eye(x.shape[1]))
    return {
        "beta": beta,
        "cov_beta": cov_beta,
        "se_beta": np.sqrt(np.diag(cov_beta)),
        "residuals": r,
        "quad": quad,
        "logdet_v": logdet_v,
        "logdet_xtvx": logdet_xtvx,
    }


def neg2_reml_loglik(sd_residual, sds, zs, x, y):
    """log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi)."""
    g = gls(marginal_cov(sd_residual, sds, zs), x, y)
    n, p = x.shape
    return g["logdet_v"] + g["logdet_xtvx"] + g["quad"] + (n - p) * LOG_2PI


def neg2_ml_loglik(sd_residual, sds, zs, x, y):
    """-2 log L = log|V| + r' V^-1 r + n log(2 pi), r the GLS residuals at these sds."""
    g = gls(marginal_cov(sd_residual, sds, zs), x, y)
    n = x.shape[0]
    return g["logdet_v"] + g["quad"] + n * LOG_2PI


def criterion(kind, all_sds, zs, x, y):
    """kind 'reml' or 'ml'; all_sds = (sd_residual, sd_1, ..., sd_K)."""
    f = neg2_reml_loglik if kind == "reml" else neg2_ml_loglik
    return f(all_sds[0], list(all_sds[1:]), zs, x, y)


def optimise(kind, start_sds, zs, x, y):
    """Minimise the dense criterion over log-sds (Nelder-Mead, then BFGS polish).

    An independent optimiser, used only to confirm that a reference library converged.
    """
    def obj(log_sds):
        return criterion(kind, np.exp(log_sds), zs, x, y)

    res = minimize(obj, np.log(start_sds), method="Nelder-Mead",
                   options={"xatol": 1e-12, "fatol": 1e-13, "maxiter": 20000, "maxfev": 40000})
    res2 = minimize(obj, res.x, method="BFGS", options={"gtol": 1e-10})
    best = res2 if res2.fun <= res.fun else res
    return np.exp(best.x), float(best.fun)


def stationarity_check(kind, all_sds, zs, x, y, rel_steps=(1e-3, 1e-4)):
    """Evaluate the criterion at relative perturbations +-h of each sd.

    At a true interior minimum both one-sided changes are >= 0 (up to rounding) and the
    central-difference gradient is ~0 compared with the curvature. Returns a list of
    dicts, one per (parameter, step).
    """
    base = criterion(kind, all_sds, zs, x, y)
    out = []
    for j in range(len(all_sds)):
        for h in rel_steps:
            up = np.array(all_sds, dtype=float)
            dn = np.array(all_sds, dtype=float)
            up[j] *= 1.0 + h
            dn[j] *= 1.0 - h
            f_up = criterion(kind, up, zs, x, y)
            f_dn = criterion(kind, dn, zs, x, y)
            out.append({
                "param_index": j,
                "rel_step": h,
                "delta_up": f_up - base,
                "delta_down": f_dn - base,
                # derivative wrt log(sd), central difference
                "grad_log_sd": (f_up - f_dn) / (2.0 * h),
            })
    return base, out
