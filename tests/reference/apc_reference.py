"""Reference Poisson deviances for braid's age-period-cohort models, made with
statsmodels GLM (Poisson, log link, log-population offset) on Holford (1983,
Biometrics 39, Table 2), tests/data/holford_prostate.csv.

Run from the repository root:  python3 tests/reference/apc_reference.py
It writes tests/reference/apc.json. Design matrices are built here with plain
indicator columns (no model-formula strings); a deviance does not depend on
the coding of a factor.
"""
import json

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.api as sm

OUT = "tests/reference/apc.json"


def dummies(index, levels):
    """Indicator columns for levels 2..L (level 1 is the reference)."""
    return np.column_stack([(index == l).astype(float) for l in range(2, levels + 1)])


def main():
    d = pd.read_csv("tests/data/holford_prostate.csv")
    ages = sorted(d["age"].unique())
    periods = sorted(d["period"].unique())
    a, p = len(ages), len(periods)
    i = d["age"].map({v: k + 1 for k, v in enumerate(ages)}).to_numpy()
    j = d["period"].map({v: k + 1 for k, v in enumerate(periods)}).to_numpy()
    k = a - i + j  # cohort index, 1..a+p-1 (Holford 1983; Kupper et al. 1985)
    one = np.ones((len(d), 1))
    A, P, C = dummies(i, a), dummies(j, p), dummies(k, a + p - 1)
    drift = (j - (p + 1) / 2.0).reshape(-1, 1)
    designs = {
        "A": np.hstack([one, A]),
        "A+P": np.hstack([one, A, P]),
        "A+C": np.hstack([one, A, C]),
        "P+C": np.hstack([one, P, C]),
        "A+drift": np.hstack([one, A, drift]),
        "APC": np.hstack([one, A, P, C]),
    }
    offset = np.log(d["population"].to_numpy(dtype=float))
    y = d["deaths"].to_numpy(dtype=float)
    out = dict(
        source="statsmodels GLM, Poisson family, log link, offset log(population)",
        data="tests/data/holford_prostate.csv (Holford 1983, Table 2)",
        versions=dict(statsmodels=statsmodels.__version__, numpy=np.__version__, scipy=scipy.__version__,
                      pandas=pd.__version__),
        models={},
    )
    for name, X in designs.items():
        r = sm.GLM(y, X, family=sm.families.Poisson(), offset=offset).fit(tol=1e-14, maxiter=200)
        rank = int(np.linalg.matrix_rank(X))
        out["models"][name] = dict(deviance=float(r.deviance), df=int(len(y) - rank), rank=rank,
                                   fitted=[float(v) for v in r.fittedvalues])
        print(name, r.deviance, len(y) - rank)
    with open(OUT, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
