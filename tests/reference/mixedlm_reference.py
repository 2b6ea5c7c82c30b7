"""Reference fits for braid's engine tests, made with statsmodels MixedLM.

Run from the repository root:  python3 tests/reference/mixedlm_reference.py
It (re)writes tests/data/sim_*.csv (invented, seeded cohort-sequential files)
and tests/reference/mixedlm.json (full-precision results, with versions).

Each model is fitted with several optimizers and several starts; the best
log-likelihood is kept and every attempt is recorded, because a `converged`
flag of True from a single optimizer is no proof of the optimum.
Fixed-effect SEs are recorded twice: statsmodels' own (`bse_fe`, from the
joint Hessian) and the GLS formula sqrt(diag(scale * (X'V^-1X)^-1)) evaluated
at the reference estimates (`se_gls`), which is what braid reports.
"""
import json
import warnings

import numpy as np
import pandas as pd
import scipy
import statsmodels
import statsmodels.formula.api as smf

warnings.simplefilter("ignore")
OUT = "tests/reference/mixedlm.json"


def simulate(seed, entry_ages, per_cohort, waves, sd_int, sd_slope, corr, sd_school, n_school, sd_res, dropout):
    """An invented cohort-sequential file: exact ages, dropout, optional schools."""
    rng = np.random.default_rng(seed)
    school_eff = sd_school * rng.standard_normal(max(n_school, 1))
    rows = []
    pid = 0
    for entry in entry_ages:
        for _ in range(per_cohort):
            pid += 1
            school = int(rng.integers(0, max(n_school, 1)))
            z1, z2 = rng.standard_normal(2)
            b0 = sd_int * z1
            b1 = sd_slope * (corr * z1 + np.sqrt(1 - corr**2) * z2)
            age0 = entry + rng.uniform(-0.5, 0.5)
            for w in range(waves):
                if w > 0 and rng.uniform() < dropout:
                    break
                age = age0 + w + rng.uniform(-0.1, 0.1)
                a = age - 16.0
                y = 50 + 1.6 * a - 0.12 * a * a + b0 + b1 * a + school_eff[school] + sd_res * rng.standard_normal()
                rows.append(dict(pupil=f"P{pid:04d}", school=f"S{school + 1:02d}", cohort=int(entry), wave=w + 1,
                                 age=round(age, 4), score=round(y, 4)))
    return pd.DataFrame(rows)


def simulate_crossed(seed, n, periods, cohorts, sd_period, sd_cohort, sd_res):
    """An invented repeated cross-section: each row a different person, with
    crossed period and cohort intercepts."""
    rng = np.random.default_rng(seed)
    pe = sd_period * rng.standard_normal(periods)
    ce = sd_cohort * rng.standard_normal(cohorts)
    rows = []
    for i in range(n):
        p = int(rng.integers(0, periods))
        c = int(rng.integers(0, cohorts))
        age = 10 + rng.uniform(0, 14)
        a = age - 16.0
        y = 50 + 1.6 * a - 0.12 * a * a + pe[p] + ce[c] + sd_res * rng.standard_normal()
        rows.append(dict(person=f"R{i + 1:05d}", period=2030 + p, cohort=1990 + c, age=round(age, 4), score=round(y, 4)))
    return pd.DataFrame(rows)


def gls_se(model, result):
    """sqrt(diag((X'V^-1X)^-1)) * sqrt(scale) at the fitted covariance parameters."""
    scale = result.scale
    cov_re = np.asarray(result.cov_re) / scale  # relative to scale
    vcomp = np.asarray(result.vcomp) / scale if model.k_vc > 0 else np.array([])
    X = model.exog
    p = X.shape[1]
    xvx = np.zeros((p, p))
    for g in range(model.n_groups):
        ix = model.row_indices[model.group_labels[g]]
        Xg = X[ix]
        Zg = model.exog_re_li[g]
        Vg = np.eye(len(ix)) + Zg @ cov_re @ Zg.T
        if model.k_vc > 0:
            vc_mats = model.exog_vc.mats
            for j in range(model.k_vc):
                m = np.asarray(vc_mats[j][g])
                Vg = Vg + vcomp[j] * (m @ m.T)
        xvx += Xg.T @ np.linalg.solve(Vg, Xg)
    return np.sqrt(np.diag(np.linalg.inv(xvx)) * scale).tolist()


def fit_best(make, reml):
    attempts = []
    best = None
    for method in (["lbfgs"], ["bfgs"], ["powell"], ["nm", "lbfgs"]):
        for start in (None, "small"):
            model = make()
            kw = dict(reml=reml, method=method, maxiter=5000)
            if start == "small":
                k_re = model.k_re2 + model.k_vc
                kw["start_params"] = None
                try:
                    from statsmodels.regression.mixed_linear_model import MixedLMParams
                    sp = MixedLMParams.from_components(np.zeros(model.k_fe), cov_re=0.1 * np.eye(model.k_re),
                                                       vcomp=0.1 * np.ones(model.k_vc))
                    kw["start_params"] = sp
                except Exception:
                    pass
            try:
                r = model.fit(**kw)
            except Exception as e:  # record and move on
                attempts.append(dict(method="+".join(method), start=str(start), error=str(e)))
                continue
            attempts.append(dict(method="+".join(method), start=str(start), loglik=float(r.llf), converged=bool(r.converged)))
            if np.isfinite(r.llf) and (best is None or r.llf > best[1].llf):
                best = (model, r, "+".join(method), str(start))
    model, r, method, start = best
    out = dict(
        reml=reml,
        loglik=float(r.llf),
        converged=bool(r.converged),
        optimizer=method,
        start=start,
        fe_names=list(r.fe_params.index),
        fe=[float(v) for v in r.fe_params],
        bse_fe=[float(v) for v in r.bse_fe],
        se_gls=gls_se(model, r),
        scale=float(r.scale),
        cov_re=np.asarray(r.cov_re).tolist(),
        cov_re_names=list(r.cov_re.index) if hasattr(r.cov_re, "index") else [],
        vcomp=[float(v) for v in np.atleast_1d(r.vcomp)] if model.k_vc > 0 else [],
        vc_names=list(model.exog_vc.names) if model.k_vc > 0 else [],
        attempts=attempts,
    )
    return out


def main():
    dental = pd.read_csv("tests/data/dental.csv")
    dental["a"] = dental["age"] - 11.0
    oxboys = pd.read_csv("tests/data/oxboys.csv")
    sim_plain = simulate(11, [10, 12, 14, 16, 18], 60, 3, 4.0, 0.5, 0.2, 0.0, 1, 2.5, 0.1)
    sim_school = simulate(12, [10, 12, 14, 16, 18], 50, 3, 4.0, 0.5, 0.0, 2.0, 12, 2.5, 0.1)
    sim_zero = simulate(13, [10, 12, 14, 16, 18], 60, 3, 4.0, 0.0, 0.0, 0.0, 1, 2.5, 0.1)
    sim_plain.to_csv("tests/data/sim_plain.csv", index=False)
    sim_school.to_csv("tests/data/sim_school.csv", index=False)
    sim_zero.to_csv("tests/data/sim_zero_slope.csv", index=False)
    sim_crossed = simulate_crossed(14, 1500, 8, 12, 1.5, 2.0, 3.0)
    sim_crossed.to_csv("tests/data/sim_crossed.csv", index=False)
    sim_crossed["a"] = sim_crossed["age"] - 16.0
    sim_crossed["a2"] = sim_crossed["a"] ** 2
    sim_crossed["one"] = 1
    for d in (sim_plain, sim_school, sim_zero):
        d["a"] = d["age"] - 16.0
        d["a2"] = d["a"] ** 2
    oxboys["age2"] = oxboys["age"] ** 2

    cases = {
        "dental": lambda: smf.mixedlm("distance ~ a", dental, groups="Subject", re_formula="~a"),
        "oxboys": lambda: smf.mixedlm("height ~ age + age2", oxboys, groups="Subject", re_formula="~age"),
        "sim_plain": lambda: smf.mixedlm("score ~ a + a2", sim_plain, groups="pupil", re_formula="~a"),
        "sim_school": lambda: smf.mixedlm("score ~ a + a2", sim_school, groups="school", re_formula="1",
                                          vc_formula={"pupil": "0 + C(pupil)", "pupil_age": "0 + C(pupil):a"}),
        "sim_zero_slope": lambda: smf.mixedlm("score ~ a + a2", sim_zero, groups="pupil", re_formula="~a"),
        "sim_crossed": lambda: smf.mixedlm("score ~ a + a2", sim_crossed, groups="one", re_formula="0",
                                           vc_formula={"cohort": "0 + C(cohort)", "period": "0 + C(period)"}),
    }
    result = dict(
        source="statsmodels MixedLM",
        versions=dict(statsmodels=statsmodels.__version__, numpy=np.__version__, scipy=scipy.__version__,
                      pandas=pd.__version__),
        cases={},
    )
    for name, make in cases.items():
        result["cases"][name] = dict(REML=fit_best(make, True), ML=fit_best(make, False))
        print(name, result["cases"][name]["REML"]["loglik"], result["cases"][name]["ML"]["loglik"])
    with open(OUT, "w") as f:
        json.dump(result, f, indent=1)
        f.write("\n")


if __name__ == "__main__":
    main()
