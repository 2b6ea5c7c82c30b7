"""Reference least-squares fit of braid's exact-value APC model, made with
statsmodels OLS on the model columns that braid writes for
tests/data/hapc_cross_section.csv (an invented repeated cross-section).

Run from the repository root:
  cargo run --release --example apc_exact_basis -- tests/data/hapc_cross_section.csv age year score target/exact_basis.csv
  python3 tests/reference/apc_exact_reference.py target/exact_basis.csv
It writes tests/reference/apc_exact.json: the residual sum of squares, the
coefficient and SE of the period column (the drift), the F test of each time
scale's curve columns and of the drift, and a fingerprint of each model
column (so the test can confirm that braid's columns are the ones fitted
here).
"""
import json
import sys

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.api as sm

OUT = "tests/reference/apc_exact.json"


def main(path):
    d = pd.read_csv(path)
    cols = [c for c in d.columns if c not in ("age", "period", "outcome")]
    x = d[cols].to_numpy()
    y = d["outcome"].to_numpy()
    fit = sm.OLS(y, x).fit()
    tests = {}
    for name, members in [
        ("drift", ["period_linear"]),
        ("age", [c for c in cols if c.startswith("age_curve")]),
        ("period", [c for c in cols if c.startswith("period_curve")]),
        ("cohort", [c for c in cols if c.startswith("cohort_curve")]),
    ]:
        r = np.zeros((len(members), len(cols)))
        for i, m in enumerate(members):
            r[i, cols.index(m)] = 1.0
        f = fit.f_test(r)
        tests[name] = {
            "f": float(np.squeeze(f.fvalue)),
            "df": int(f.df_num),
            "df_denominator": float(f.df_denom),
            "p": float(f.pvalue),
        }
    k = cols.index("period_linear")
    out = {
        "source": "statsmodels OLS on braid's exact-value model columns for tests/data/hapc_cross_section.csv",
        "versions": {
            "statsmodels": statsmodels.__version__,
            "numpy": np.__version__,
            "scipy": scipy.__version__,
            "pandas": pd.__version__,
        },
        "n": int(len(y)),
        "columns": cols,
        # A fingerprint of each column (most sum to zero by construction):
        # its sum of squares and its sum weighted by row position 0..1.
        "column_squares": [float(v) for v in (x * x).sum(axis=0)],
        "column_ramps": [float(v) for v in x.T @ np.linspace(0.0, 1.0, len(y))],
        "rss": float(fit.ssr),
        "drift": float(fit.params[k]),
        "drift_se": float(fit.bse[k]),
        "tests": tests,
    }
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=2, sort_keys=True)
        fh.write("\n")
    print("wrote", OUT)


if __name__ == "__main__":
    main(sys.argv[1])
