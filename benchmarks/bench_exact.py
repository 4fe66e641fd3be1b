"""The exact Gaussian likelihood: the dense Cholesky reference (``likelihood.exact_negloglik``) against the O(N^2)
Levinson/Gohberg-Semencul one (``spectral.exact``), per evaluation and with its analytic gradient, at N = 720,
1440, 2880 (matern+inertial, hourly); then a whole exact fit of 1440-sample windows (L-BFGS-B with the analytic
gradient from the debiased estimate, plus the observed information) against one debiased fit, with both
estimates side by side.

    python benchmarks/bench_exact.py [--windows 3] [--sizes 720 1440 2880]
"""

import argparse
import os
import sys
import time

import numpy as np
import scipy.optimize

sys.path.insert(0, os.path.dirname(__file__))
from _common import median_time  # noqa: E402

from driftspec.analysis import fit_series, simulate  # noqa: E402
from driftspec.analysis.models import FitContext, get_family  # noqa: E402
from driftspec.analysis.spectral import likelihood  # noqa: E402
from driftspec.analysis.spectral.exact import (  # noqa: E402
    exact_negloglik,
    exact_negloglik_grad,
    exact_observed_information,
)

HOUR = 3600.0
THETA = [0.02, 1.2, 1.0, 0.01, -1.0027, 0.2]


def per_evaluation(sizes):
    fam = get_family("matern+inertial")
    print("per evaluation, matern+inertial, complete hourly window (medians, ms)")
    print(f"{'N':>6} {'dense (old)':>12} {'O(N^2) value':>13} {'value+grad':>11} {'old/new':>8} {'old/(v+g)':>10}")
    for n in sizes:
        z = simulate("matern+inertial", THETA, n=n, dt=HOUR, seed=n)
        prep = likelihood.prepare_window(z, 1 / 24)
        ctx = FitContext(dt_days=1 / 24, latitude=30.0)
        old_val = likelihood.exact_negloglik(fam, THETA, prep, ctx)
        new_val = exact_negloglik(fam, THETA, prep, ctx)
        assert abs(old_val - new_val) <= 1e-8 * abs(old_val), (old_val, new_val)
        t_old = median_time(lambda p=prep, c=ctx: likelihood.exact_negloglik(fam, THETA, p, c),
                            repeat=3 if n > 2000 else 5)
        t_new = median_time(lambda p=prep, c=ctx: exact_negloglik(fam, THETA, p, c), repeat=9)
        t_grad = median_time(lambda p=prep, c=ctx: exact_negloglik_grad(fam, THETA, p, c), repeat=9)
        print(f"{n:>6} {1e3 * t_old:>12.1f} {1e3 * t_new:>13.1f} {1e3 * t_grad:>11.1f} {t_old / t_new:>8.1f} "
              f"{t_old / t_grad:>10.1f}")


def _to_x(theta, fam):
    return np.array([np.log(t) if p.scale == "log" else t for t, p in zip(theta, fam.parameters)])


def _from_x(x, fam):
    return np.array([np.exp(v) if p.scale == "log" else v for v, p in zip(x, fam.parameters)])


def exact_fit(res):
    """L-BFGS-B on the exact likelihood with its analytic gradient from the debiased estimate, then the observed
    information; returns (theta, stderr, evaluations, seconds for the optimisation, seconds for the information)."""
    fam, prep, ctx = res.family, res.prepared, res.context
    scale = 1.0 / prep.n_valid  # O(1) per sample, as the fitting driver scales it
    xb = [(np.log(lo), np.log(hi)) if p.scale == "log" else (lo, hi)
          for (lo, hi), p in zip(fam.bounds(ctx), fam.parameters)]
    count = [0]

    def fun(x):
        count[0] += 1
        v, g = exact_negloglik_grad(fam, _from_x(x, fam), prep, ctx)
        if not np.isfinite(v):
            return 1e300, np.zeros_like(x)
        return scale * v, scale * g

    t0 = time.perf_counter()
    out = scipy.optimize.minimize(fun, _to_x(res.theta, fam), jac=True, method="L-BFGS-B", bounds=xb,
                                  options={"maxiter": 200, "ftol": 1e-13, "gtol": 1e-7})
    t_opt = time.perf_counter() - t0
    theta = _from_x(out.x, fam)
    t0 = time.perf_counter()
    info = exact_observed_information(fam, theta, prep, ctx)
    t_info = time.perf_counter() - t0
    se_x = np.sqrt(np.diag(np.linalg.inv(info)))
    se = np.array([s * t if p.scale == "log" else s for s, t, p in zip(se_x, theta, fam.parameters)])
    return theta, se, count[0], t_opt, t_info, out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=3)
    ap.add_argument("--sizes", type=int, nargs="+", default=[720, 1440, 2880])
    a = ap.parse_args()
    per_evaluation(a.sizes)

    zs = [simulate("matern+inertial", THETA, n=1440, dt=HOUR, seed=100 + i) for i in range(a.windows)]
    fit_series(zs[0], HOUR, model="matern+inertial", latitude=30.0)  # warm the Matérn table
    t_deb = median_time(lambda: fit_series(zs[0], HOUR, model="matern+inertial", latitude=30.0), repeat=5)
    fam = get_family("matern+inertial")
    z0 = zs[0]
    res0 = fit_series(z0, HOUR, model="matern+inertial", latitude=30.0)
    t_vg = median_time(lambda: exact_negloglik_grad(fam, res0.theta, res0.prepared, res0.context), repeat=9)
    print()
    print(f"1440-sample windows: one debiased fit {1e3 * t_deb:.1f} ms (median); exact value+grad {1e3 * t_vg:.1f} ms")
    print(f"{'window':>6} {'evals':>6} {'estimate (evals x v+g + info)':>30} {'measured exact fit':>19} "
          f"{'/debiased fit':>14} {'target <= 1000':>15}")
    rows = []
    for i, z in enumerate(zs):
        res = fit_series(z, HOUR, model="matern+inertial", latitude=30.0)
        theta, se, nev, t_opt, t_info, out = exact_fit(res)
        est = nev * t_vg + t_info
        meas = t_opt + t_info
        print(f"{i:>6} {nev:>6} {est:>28.2f} s {meas:>17.2f} s {meas / t_deb:>14.0f} "
              f"{'met' if meas / t_deb <= 1000 else 'missed':>15}   ({out.message})")
        rows.append((res, theta, se))
    print()
    print("estimates: debiased (SE) | exact (observed-information SE) | difference in debiased SEs")
    for i, (res, theta, se) in enumerate(rows):
        print(f"window {i}")
        for k, name in enumerate(res.family.names):
            d, s = res.theta[k], res.stderr[name]
            print(f"  {name:>18} {d:>10.4g} ({s:.2g}) | {theta[k]:>10.4g} ({se[k]:.2g}) | {(theta[k] - d) / s:+.2f}")


if __name__ == "__main__":
    main()
