"""Time statsmodels MixedLM on one file, for examples/bench.rs.

Usage: python3 examples/bench_mixedlm.py FILE [CENTER [OPTIMIZER...]]
Fits score ~ a + a^2 (a = age - CENTER) with a random intercept and slope on a
per pupil, by REML, with each optimizer in turn (all five when none are named;
one named twice is timed twice); prints one JSON object with the library
version and, per run, the optimizer, wall time, log-likelihood and flag.
"""
import json
import sys
import time
import warnings

import numpy as np
import pandas as pd
import statsmodels
import statsmodels.formula.api as smf

warnings.simplefilter("ignore")


def main():
    path = sys.argv[1]
    center = float(sys.argv[2]) if len(sys.argv) > 2 else 16.0
    t0 = time.perf_counter()
    d = pd.read_csv(path)
    read_s = time.perf_counter() - t0
    d["a"] = d["age"] - center
    d["a2"] = d["a"] ** 2
    out = dict(statsmodels=statsmodels.__version__, numpy=np.__version__, read_seconds=read_s, fits=[])
    methods = sys.argv[3:] or ["lbfgs", "bfgs", "cg", "powell", "nm"]
    for method in methods:
        t0 = time.perf_counter()
        try:
            m = smf.mixedlm("score ~ a + a2", d, groups="pupil", re_formula="~a")
            r = m.fit(reml=True, method=[method], maxiter=20000)
            secs = time.perf_counter() - t0
            out["fits"].append(dict(method=method, seconds=secs, loglik=float(r.llf), converged=bool(r.converged),
                                    fe=[float(v) for v in r.fe_params]))
        except Exception as e:
            out["fits"].append(dict(method=method, seconds=time.perf_counter() - t0, error=str(e)))
    print(json.dumps(out))


if __name__ == "__main__":
    main()
