"""Reference quantiles and lower tails of Student's t distribution, made with
scipy.stats.t.ppf and scipy.stats.t.cdf.

braid's intervals use t quantiles at Satterthwaite df, which reach millions
on large files. The grid covers small df (where the quantile is far from the
normal's), the range where statrs 0.19.1's inverse drifts (from about
6.7e4), a df of 5,117,930.95 where its 97.5% point was off by 0.24 in
probability, and df just below braid's switch to the normal at 1e7.

The lower tails at -x (braid's two-sided p-values are twice these) cover
p-values down to 1e-89 at the same df.

Run from the repository root: python3 tests/reference/t_quantile_reference.py
(needs scipy). It writes tests/reference/t_quantiles.json.
"""
import json

import scipy
from scipy import stats

DF = [1.0, 2.0, 3.0, 4.5, 10.0, 30.0, 49.03687330065462, 120.0, 999.0, 1000.0,
      2483.3442468126827, 28513.52, 67297.31342689898, 286797.5796871477,
      1.0e6, 5117930.953492405, 9.9e6]
PROB = [0.975, 0.995, 0.9, 0.025, 0.5, 0.99995]

X = [1.0, 2.0, 4.0, 6.0, 10.0, 20.0]

cases = [dict(df=df, prob=p, quantile=float(stats.t.ppf(p, df))) for df in DF for p in PROB]
tails = [dict(df=df, x=x, lower_tail=float(stats.t.cdf(-x, df))) for df in DF for x in X]
with open("tests/reference/t_quantiles.json", "w") as f:
    json.dump(dict(versions=dict(scipy=scipy.__version__), cases=cases, tails=tails), f, indent=1)
    f.write("\n")
