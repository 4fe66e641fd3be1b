"""Statistical behaviour on simulations with known parameters (hourly, 60-day windows): bias relative to
the standard error and the coverage of standard-error-based 95 % intervals, for the debiased and the
standard Whittle estimators side by side, with and without 20 % of samples missing in gaps (with gaps,
the default sandwich standard errors and the inflated Fisher information ones).

    python benchmarks/bench_coverage.py [--replicates 300]
"""

import argparse

import numpy as np

from driftspec.analysis import fit_series, simulate

HOUR = 3600.0
CASES = {"alpha 1.2, lambda 1/day": [0.02, 1.2, 1.0], "alpha 1.0, lambda 2/day": [0.02, 1.0, 2.0]}


def gaps(rng, n=1440):
    m = np.zeros(n, bool)
    for s in rng.choice(np.arange(0, n - 48, 60), 6, replace=False):
        m[s:s + 48] = True
    return m


def study(theta, reps, estimator, missing, stderr="auto"):
    rows = []
    for k in range(reps):
        rng = np.random.default_rng(1000 + k)
        z = simulate("matern", theta, n=1440, dt=HOUR, seed=rng)
        if missing:
            z = z.copy()
            z[gaps(rng)] = np.nan
        r = fit_series(z, HOUR, model="matern", estimator=estimator, stderr=stderr)
        if r.ok:
            rows.append([r.params["matern_alpha"], r.stderr["matern_alpha"], r.params["matern_damping"],
                         r.stderr["matern_damping"]])
    return np.array(rows)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--replicates", type=int, default=300)
    n = ap.parse_args().replicates
    print(f"{n} replicates per line; bias in units of the mean standard error; coverage of +-1.96 se")
    # debiased: with gaps, the default (sandwich) errors and the inflated Fisher ones side by side
    runs = [("debiased", False, "auto"), ("debiased", True, "auto"), ("debiased", True, "fisher"),
            ("whittle", False, "auto"), ("whittle", True, "auto")]
    for name, theta in CASES.items():
        for estimator, missing, stderr in runs:
            r = study(theta, n, estimator, missing, stderr)
            a, sa, lam, sl = r.T
            label = f"{estimator} {'fisher' if stderr == 'fisher' else ''}".strip()
            print(f"  {name:24s} {label:15s} {'20% gaps' if missing else 'complete':8s} ok {len(r):4d}  "
                  f"alpha: bias {(a.mean() - theta[1]) / sa.mean():+.2f} se, "
                  f"cover {np.mean(np.abs(a - theta[1]) < 1.96 * sa):.3f}"
                  f"  lambda: bias {(lam.mean() - theta[2]) / sl.mean():+.2f} se, "
                  f"cover {np.mean(np.abs(lam - theta[2]) < 1.96 * sl):.3f}")


if __name__ == "__main__":
    main()
