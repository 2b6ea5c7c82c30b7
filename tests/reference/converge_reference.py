"""Reference log-likelihoods for braid's convergence tests, made with
statsmodels MixedLM (ML): the nested models M0 (common quadratic age curve),
M1 (+ a level per cohort) and M2 (+ cohort differences in both age terms),
each with a random intercept and age slope per pupil, on the invented file
tests/data/sim_plain.csv (written by mixedlm_reference.py).

Run from the repository root:  python3 tests/reference/converge_reference.py
It writes tests/reference/converge.json. ML log-likelihoods do not depend on
where age is centred, so braid's reference age need not be matched here.
"""
import json
import sys
import warnings

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.formula.api as smf

sys.path.insert(0, "tests/reference")
from mixedlm_reference import fit_best  # noqa: E402

warnings.simplefilter("ignore")
OUT = "tests/reference/converge.json"


def main():
    d = pd.read_csv("tests/data/sim_plain.csv")
    d["a"] = d["age"] - 16.0
    d["a2"] = d["a"] ** 2
    models = {
        "M0": lambda: smf.mixedlm("score ~ a + a2", d, groups="pupil", re_formula="~a"),
        "M1": lambda: smf.mixedlm("score ~ a + a2 + C(cohort)", d, groups="pupil", re_formula="~a"),
        "M2": lambda: smf.mixedlm("score ~ (a + a2) * C(cohort)", d, groups="pupil", re_formula="~a"),
    }
    result = dict(
        source="statsmodels MixedLM, ML",
        file="tests/data/sim_plain.csv",
        versions=dict(statsmodels=statsmodels.__version__, numpy=np.__version__, scipy=scipy.__version__,
                      pandas=pd.__version__),
        models={},
    )
    for name, make in models.items():
        fit = fit_best(make, False)
        result["models"][name] = dict(loglik=fit["loglik"], n_fixed=len(fit["fe"]), converged=fit["converged"],
                                      optimizer=fit["optimizer"], attempts=fit["attempts"])
        print(name, fit["loglik"])
    with open(OUT, "w") as f:
        json.dump(result, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
