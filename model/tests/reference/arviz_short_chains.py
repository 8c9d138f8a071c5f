"""Convergence-diagnostic references for short and antithetic chains, where Geyer's
initial positive sequence has no pair of lags to add (too few draws per split chain, or
a first pair sum already <= 0).

Produces:
  model/tests/data/short_chains_draws.csv  seeded draws (quantity, chain, draw, value)
  model/tests/data/arviz_short_chains.json per quantity: n_chains, n_draws, rhat_rank,
                                           ess_bulk, ess_tail (null where ArviZ gives NaN)

Quantities:
  iid_c4_len{L}   4 chains of independent N(0,1) draws, every length L = 1..64
  iid_c1_len{L}   1 chain of independent N(0,1) draws, L = 4..16
  alternating_c1_len12, alternating_c4_len12
                  perfectly alternating 0, 1, 0, 1, ... (exact ties, no jitter)
  alternating_jitter_c4_len12
                  alternating 0/1 plus N(0, 0.001^2) jitter (no ties)
  ar1_neg_c4_len{L}  stationary AR(1) with rho = -0.9 (antithetic), L = 8, 9, 12, 20

Method: Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), "Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC", Bayesian
Analysis 16(2). Reference implementation: the ArviZ library (version in the JSON), run
offline on the stored draws. The draws are INVENTED test data from numpy's seeded PCG64
generator.
Rerun (from the repository root):
    python3 -m venv /tmp/venv-ref
    /tmp/venv-ref/bin/pip install numpy pandas arviz
    /tmp/venv-ref/bin/python model/tests/reference/arviz_short_chains.py
"""

import datetime
import json
import math
import os
import warnings

import arviz as az
import numpy as np
import pandas as pd

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "..", "data")
SEED = 20261202


def ar1(rng, rho, n_chains, n_draws):
    out = np.empty((n_chains, n_draws))
    innov_sd = math.sqrt(1.0 - rho ** 2)
    for c in range(n_chains):
        x = rng.normal()
        for t in range(n_draws):
            x = rho * x + innov_sd * rng.normal() if t > 0 else x
            out[c, t] = x
    return out


def generate():
    rng = np.random.default_rng(SEED)
    draws = {}
    for length in range(1, 65):
        draws[f"iid_c4_len{length}"] = (
            rng.normal(size=(4, length)), f"4 chains x {length} iid N(0,1)")
    for length in range(4, 17):
        draws[f"iid_c1_len{length}"] = (
            rng.normal(size=(1, length)), f"1 chain x {length} iid N(0,1)")
    alternating = np.tile([0.0, 1.0], 6)
    draws["alternating_c1_len12"] = (
        alternating[None, :].copy(), "1 chain: 0, 1, 0, 1, ... (12 draws, exact ties)")
    draws["alternating_c4_len12"] = (
        np.repeat(alternating[None, :], 4, axis=0), "4 identical chains 0, 1, 0, 1, ...")
    draws["alternating_jitter_c4_len12"] = (
        np.repeat(alternating[None, :], 4, axis=0) + 1e-3 * rng.normal(size=(4, 12)),
        "4 chains 0, 1, 0, 1, ... plus N(0, 0.001^2) jitter")
    for length in (8, 9, 12, 20):
        draws[f"ar1_neg_c4_len{length}"] = (
            ar1(rng, -0.9, 4, length), f"4 chains x {length} AR(1), rho = -0.9")
    return draws


def finite_or_none(v):
    v = float(v)
    return v if math.isfinite(v) else None


def main():
    draws = generate()
    rows = []
    for name, (arr, _) in draws.items():
        for c in range(arr.shape[0]):
            for t in range(arr.shape[1]):
                rows.append((name, c, t, repr(float(arr[c, t]))))
    path = os.path.join(DATA, "short_chains_draws.csv")
    pd.DataFrame(rows, columns=["quantity", "chain", "draw", "value"]).to_csv(path, index=False)

    # Compute from the stored text, so the Rust side reads exactly these numbers.
    stored = pd.read_csv(path)
    results = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name, (arr, description) in draws.items():
            sub = stored[stored["quantity"] == name].sort_values(["chain", "draw"])
            back = sub["value"].to_numpy(float).reshape(arr.shape)
            results[name] = {
                "description": description,
                "n_chains": int(arr.shape[0]),
                "n_draws": int(arr.shape[1]),
                "rhat_rank": finite_or_none(az.rhat(back, method="rank")),
                "ess_bulk": finite_or_none(az.ess(back, method="bulk")),
                "ess_tail": finite_or_none(az.ess(back, method="tail")),
            }
    out = {
        "source": {
            "library": f"arviz {az.__version__} (numpy {np.__version__}, pandas "
                       f"{pd.__version__})",
            "method": "Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021): "
                      "az.rhat(method='rank'), az.ess(method='bulk'|'tail')",
            "date": datetime.date.today().isoformat(),
            "script": "model/tests/reference/arviz_short_chains.py",
        },
        "notes": [
            "short_chains_draws.csv is INVENTED test data (seeded numpy generator "
            f"default_rng({SEED})): columns quantity, chain (0-based), draw (0-based), "
            "value.",
            "null means ArviZ returned NaN (fewer than 4 draws per chain, or R-hat of "
            "identical chains).",
            "When Geyer's initial positive sequence adds no pair of lags, ArviZ's "
            "autocorrelation time is -1 + rho_0 = 0, raised to its floor 1 / log10(N): "
            "ESS = N log10(N), N = all split draws.",
        ],
        "quantities": results,
    }
    with open(os.path.join(DATA, "arviz_short_chains.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")


if __name__ == "__main__":
    main()
