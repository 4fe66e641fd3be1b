"""The exact Gaussian likelihood: the dense Cholesky factorisation (the module's own fallback, forced) against
the O(N^2) Levinson/Gohberg-Semencul path (``spectral.exact``), per evaluation and with its analytic gradient, at
N = 720, 1440, 2880 (matern+inertial, hourly); then whole fits of 1440-sample windows through ``fit_series``
(the ExactEstimator estimator: L-BFGS-B with the analytic gradient from the debiased estimate, plus the observed
information) against one debiased fit, with both estimates side by side.

    python benchmarks/bench_exact.py [--windows 3] [--sizes 720 1440 2880]
"""

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))
from _common import median_time  # noqa: E402

from driftspec.analysis import fit_series, simulate  # noqa: E402
from driftspec.analysis.models import FitContext, get_family  # noqa: E402
from driftspec.analysis.spectral import likelihood  # noqa: E402
from driftspec.analysis.spectral.exact import _dense_path, exact_negloglik, exact_negloglik_grad  # noqa: E402


def _dense(fam, theta, prep, ctx):
    """The dense factorisation on a complete window (what every evaluation cost before the O(N^2) path)."""
    return _dense_path(fam, np.asarray(theta, float), prep, ctx, False)[0]

HOUR = 3600.0
THETA = [0.02, 1.2, 1.0, 0.01, -1.0027, 0.2]


def per_evaluation(sizes):
    fam = get_family("matern+inertial")
    print("per evaluation, matern+inertial, complete hourly window (medians, ms)")
    print(f"{'N':>6} {'dense':>12} {'O(N^2) value':>13} {'value+grad':>11} {'old/new':>8} {'old/(v+g)':>10}")
    for n in sizes:
        z = simulate("matern+inertial", THETA, n=n, dt=HOUR, seed=n)
        prep = likelihood.prepare_window(z, 1 / 24)
        ctx = FitContext(dt_days=1 / 24, latitude=30.0)
        old_val = _dense(fam, THETA, prep, ctx)
        new_val = exact_negloglik(fam, THETA, prep, ctx)
        assert abs(old_val - new_val) <= 1e-8 * abs(old_val), (old_val, new_val)
        t_old = median_time(lambda p=prep, c=ctx: _dense(fam, THETA, p, c),
                            repeat=3 if n > 2000 else 5)
        t_new = median_time(lambda p=prep, c=ctx: exact_negloglik(fam, THETA, p, c), repeat=9)
        t_grad = median_time(lambda p=prep, c=ctx: exact_negloglik_grad(fam, THETA, p, c), repeat=9)
        print(f"{n:>6} {1e3 * t_old:>12.1f} {1e3 * t_new:>13.1f} {1e3 * t_grad:>11.1f} {t_old / t_new:>8.1f} "
              f"{t_old / t_grad:>10.1f}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=3)
    ap.add_argument("--sizes", type=int, nargs="+", default=[720, 1440, 2880])
    a = ap.parse_args()
    per_evaluation(a.sizes)

    zs = [simulate("matern+inertial", THETA, n=1440, dt=HOUR, seed=100 + i) for i in range(a.windows)]
    fit_series(zs[0], HOUR, model="matern+inertial", latitude=30.0)  # warm the Matérn table
    print()
    print("whole fits through fit_series (the estimator objects), 1440-sample matern+inertial windows")
    print(f"{'window':>6} {'debiased (ms)':>14} {'exact (s)':>10} {'exact/debiased':>15} {'target <= 1000':>15}")
    rows = []
    for i, z in enumerate(zs):
        t_deb = median_time(lambda z=z: fit_series(z, HOUR, model="matern+inertial", latitude=30.0), repeat=5)
        t0 = time.perf_counter()
        ex = fit_series(z, HOUR, model="matern+inertial", latitude=30.0, estimator="exact")
        t_ex = time.perf_counter() - t0
        res = fit_series(z, HOUR, model="matern+inertial", latitude=30.0)
        print(f"{i:>6} {1e3 * t_deb:>14.1f} {t_ex:>10.2f} {t_ex / t_deb:>15.0f} "
              f"{'met' if t_ex / t_deb <= 1000 else 'missed':>15}   ({ex.status}, {ex.n_evaluations} evaluations)")
        rows.append((res, ex))
    print()
    print("estimates: debiased (SE) | exact (observed-information SE) | difference in debiased SEs")
    for i, (res, ex) in enumerate(rows):
        print(f"window {i}")
        for name in res.family.names:
            d, s, e = res.params[name], res.stderr[name], ex.params[name]
            print(f"  {name:>18} {d:>10.4g} ({s:.2g}) | {e:>10.4g} ({ex.stderr[name]:.2g}) | {(e - d) / s:+.2f}")


if __name__ == "__main__":
    main()
