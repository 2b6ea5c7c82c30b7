"""Reference results for braid's cohort x wave mixed ANOVA, made with
pingouin's mixed_anova (F, df, p, partial eta squared, Greenhouse-Geisser
epsilon and corrected p, Mauchly's W and p on the pooled within-group
covariance) and box_m.

Files:
- tests/data/dental.csv: Potthoff & Roy (1964, Biometrika 51), sex between
  (11 girls, 16 boys) and age 8, 10, 12, 14 within;
- tests/data/anova_unequal.csv (written here, seeded): three invented
  cohorts of 9, 14 and 20 participants, four waves, errors with an
  autoregressive (non-spherical) covariance; cohort g enters at age
  10 + 2(g - 1), assessed yearly;
- tests/data/anova_spherical.csv (written here, seeded): four invented
  cohorts of 12 participants, three waves, compound-symmetric errors.

Run from the repository root: python3 tests/reference/anova_reference.py
It writes tests/reference/anova.json.
"""
import json

import numpy as np
import pandas as pd
import pingouin as pg
import scipy

OUT = "tests/reference/anova.json"


def simulate(path, sizes, waves, cov, seed):
    rng = np.random.default_rng(seed)
    rows = []
    pid = 0
    for g, n in enumerate(sizes):
        for _ in range(n):
            pid += 1
            e = rng.multivariate_normal(np.zeros(len(waves)), cov)
            for j, w in enumerate(waves):
                mean = 50 + 2.0 * g + 1.5 * j + (0.8 * j if g == 1 else 0.0)
                age = round(10 + 2 * g + (w - 1) + rng.uniform(-0.4, 0.4), 2)
                rows.append({"pupil": f"Q{pid:03d}", "cohort": f"C{g + 1}", "wave": w, "age": age,
                             "score": round(mean + e[j], 4)})
    d = pd.DataFrame(rows)
    d.to_csv(path, index=False)
    return d


def reference(d, dv, between, within, subject):
    aov = pg.mixed_anova(data=d, dv=dv, between=between, within=within, subject=subject,
                         correction=True, effsize="np2")
    rows = {}
    for _, r in aov.iterrows():
        name = {between: "cohort", within: "wave", "Interaction": "cohort × wave"}[r["Source"]]
        rows[name] = {
            "ss": float(r["SS"]),
            "df1": float(r["DF1"]),
            "df2": float(r["DF2"]),
            "f": float(r["F"]),
            "p": float(r["p_unc"]),
            "partial_eta2": float(r["np2"]),
        }
        if name != "cohort":
            rows[name]["epsilon_gg"] = float(r["eps"])
            rows[name]["p_gg"] = float(r["p_GG_corr"])
            sph = {"w": float(r["W_spher"]), "p": float(r["p_spher"])}
    wide = d.pivot(index=[subject, between], columns=within, values=dv).reset_index()
    waves = [c for c in wide.columns if c not in (subject, between)]
    wide.columns = [str(c) for c in wide.columns]
    bm = pg.box_m(wide, dvs=[str(w) for w in waves], group=between)
    return {
        "effects": rows,
        "sphericity": sph,
        "box_m": {"chi2": float(bm["Chi2"].iloc[0]), "df": float(bm["df"].iloc[0]), "p": float(bm["pval"].iloc[0])},
    }


def ar1(k, rho, sd):
    return np.array([[sd * sd * rho ** abs(i - j) for j in range(k)] for i in range(k)])


def cs(k, rho, sd):
    return np.array([[sd * sd * (1.0 if i == j else rho) for j in range(k)] for i in range(k)])


def main():
    out = {
        "source": "pingouin mixed_anova (correction=True, effsize np2) and box_m",
        "versions": {"pingouin": pg.__version__, "pandas": pd.__version__, "numpy": np.__version__,
                     "scipy": scipy.__version__},
    }
    dental = pd.read_csv("tests/data/dental.csv")
    out["dental"] = reference(dental, "distance", "Sex", "age", "Subject")
    unequal = simulate("tests/data/anova_unequal.csv", [9, 14, 20], [1, 2, 3, 4], ar1(4, 0.8, 3.0), 2026)
    out["anova_unequal"] = reference(unequal, "score", "cohort", "wave", "pupil")
    spherical = simulate("tests/data/anova_spherical.csv", [12, 12, 12, 12], [1, 2, 3], cs(3, 0.5, 2.0), 1964)
    out["anova_spherical"] = reference(spherical, "score", "cohort", "wave", "pupil")
    with open(OUT, "w") as fh:
        json.dump(out, fh, indent=2, sort_keys=True)
        fh.write("\n")
    print("wrote", OUT)


if __name__ == "__main__":
    main()
