"""Reference Poisson deviances for braid's age-period-cohort models, made with
statsmodels GLM (Poisson, log link, log-population offset) on Holford (1983,
Biometrics 39, Table 2), tests/data/holford_prostate.csv.

Run from the repository root:  python3 tests/reference/apc_reference.py
It writes tests/reference/apc.json, and also fits the hierarchical APC model
(crossed period and cohort intercepts, MixedLM variance components, REML) on
the invented repeated cross-section it writes to
tests/data/hapc_cross_section.csv. Design matrices are built here with plain
indicator columns (no model-formula strings); a deviance does not depend on
the coding of a factor.
"""
import json

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.api as sm
import statsmodels.formula.api as smf
import sys

sys.path.insert(0, "tests/reference")
from mixedlm_reference import fit_best  # noqa: E402

OUT = "tests/reference/apc.json"


def dummies(index, levels):
    """Indicator columns for levels 2..L (level 1 is the reference)."""
    return np.column_stack([(index == l).astype(float) for l in range(2, levels + 1)])


def hapc_file():
    """An invented repeated cross-section (one row per person): exact ages 20-69,
    assessment years 2000-2029, 5-year groups, crossed period and cohort
    intercepts where cohort group k = a - i + j. Written to
    tests/data/hapc_cross_section.csv; the groups are recomputed here the way
    braid computes them (from the floor of the youngest age and earliest year)."""
    rng = np.random.default_rng(2026)
    n = 3000
    age = np.round(rng.uniform(20, 70, n), 3)
    year = np.round(rng.uniform(2000, 2030, n), 3)
    a0, p0, w = np.floor(age.min()), np.floor(year.min()), 5.0
    i = np.floor((age - a0) / w).astype(int) + 1
    j = np.floor((year - p0) / w).astype(int) + 1
    a_groups = int(np.floor((age.max() - a0) / w)) + 1
    k = a_groups - i + j
    pe = 1.5 * rng.standard_normal(j.max() + 1)
    ce = 2.0 * rng.standard_normal(k.max() + 1)
    c = age - 45.0
    y = 30 + 0.2 * c - 0.004 * c * c + pe[j] + ce[k] + 3.0 * rng.standard_normal(n)
    d = pd.DataFrame(dict(age=age, year=year, score=np.round(y, 4)))
    d.to_csv("tests/data/hapc_cross_section.csv", index=False)
    d = pd.read_csv("tests/data/hapc_cross_section.csv")
    d["pg"], d["cg"], d["one"] = j, k, 1
    d["a"] = d["age"] - d["age"].mean()
    d["a2"] = d["a"] ** 2
    return d


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
    d = hapc_file()
    make = lambda: smf.mixedlm("score ~ a + a2", d, groups="one", re_formula="0",
                               vc_formula={"period": "0 + C(pg)", "cohort": "0 + C(cg)"})
    out["hierarchical"] = fit_best(make, True)
    print("hierarchical", out["hierarchical"]["loglik"], out["hierarchical"]["vcomp"], out["hierarchical"]["vc_names"])
    with open(OUT, "w") as f:
        json.dump(out, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
