"""Cost of the irregular-fix observation model against a regular window, medians side by side in one run.

For 60-day hourly windows of satellite-like fixes (``analysis/simulation/scenarios.py``): the build of
:class:`~driftspec.analysis.spectral.irregular.IrregularObservation` per window, one evaluation of
``expected_in_band`` (with derivatives) of ``matern+inertial``, and a whole debiased-Whittle fit with it
(L-BFGS-B from the true parameters perturbed, analytic gradient), next to the same for a regular hourly
window through the regular observation model (``likelihood.expected_in_band`` of the observed family).
Target: an irregular window's fit (build included) at most 20 times a regular one.

    python benchmarks/bench_irregular.py [--windows 4]

BLAS runs on one thread (as in the batch, one fit per core): with threads on a busy 2-core machine the
kernel's matrix product took 8-12 ms instead of 1.4 ms.
"""

import argparse
import os
import sys
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import scipy.optimize  # noqa: E402

sys.path.insert(0, os.path.dirname(__file__))
from _common import median_time  # noqa: E402

from driftspec.analysis import simulate  # noqa: E402
from driftspec.analysis.models import FitContext, get_family  # noqa: E402
from driftspec.analysis.models.observation import observed  # noqa: E402
from driftspec.analysis.simulation.scenarios import satellite_fix_times  # noqa: E402
from driftspec.analysis.spectral.irregular import IrregularObservation  # noqa: E402
from driftspec.analysis.spectral.likelihood import expected_in_band, prepare_window  # noqa: E402

DT = 1 / 24
N = 1440
THETA = np.array([0.02, 1.2, 1.0, 0.01, -1.0, 0.3])
CTX = FitContext(dt_days=DT, latitude=30.0, inertial_frequency_cpd=-1.0)
MAX_FREQ = 9.0


def irregular_window(rng):
    """Fix times (days from the first grid sample), validity (3 h mask), per-fix errors, periodogram."""
    t = satellite_fix_times(rng, 60.6) - 0.3
    t_pos = np.arange(-1, N + 1) * DT
    near = np.min(np.abs(t_pos[:, None] - t[None, :]), axis=1) <= 0.125
    near &= (t_pos >= t[0]) & (t_pos <= t[-1])
    valid = near[:-2] & near[1:-1] & near[2:]
    sigma = rng.choice([250.0, 500.0, 1000.0], t.size)
    v = simulate("matern+inertial", THETA, n=int(round((t[-1] - t[0]) * 288)) + 1, dt=300.0, seed=rng)
    x = np.concatenate([[0], np.cumsum(0.5 * (v[1:] + v[:-1]) * 300.0)])
    xf = x[np.round((t - t[0]) * 288).astype(int)] + sigma * (rng.standard_normal(t.size)
                                                                + 1j * rng.standard_normal(t.size))
    xg = np.interp(np.clip(t_pos, t[0], t[-1]), t, xf.real) + 1j * np.interp(np.clip(t_pos, t[0], t[-1]), t, xf.imag)
    z = np.where(valid, (xg[2:] - xg[:-2]) / (2 * DT * 86400.0), np.nan)
    return t, valid, sigma, z


def fit(expect, pgram, x0, bounds):
    """L-BFGS-B on sum log E + I/E in the optimiser's coordinates (log scale except alpha and f0)."""
    logs = np.array([True, False, True, True, False, True])

    def to_theta(x):
        return np.where(logs, np.exp(x), x)

    def f(x):
        e, de = expect(to_theta(x))
        e = np.maximum(e, 1e-300)
        return float(np.sum(np.log(e) + pgram / e)), de @ ((e - pgram) / e**2)

    xb = [(np.log(lo), np.log(hi)) if lg else (lo, hi) for (lo, hi), lg in zip(bounds, logs)]
    r = scipy.optimize.minimize(f, np.where(logs, np.log(np.abs(x0)), x0), jac=True, method="L-BFGS-B", bounds=xb)
    return to_theta(r.x), r.nfev


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=4)
    a = ap.parse_args()
    rng = np.random.default_rng(7)
    fam = get_family("matern+inertial")
    ofam = observed(fam, "differenced+noise", "central")
    bounds = fam.bounds(CTX)
    x0 = THETA * np.array([1.3, 1.0, 0.7, 0.7, 1.02, 1.5]) + np.array([0, 0.15, 0, 0, 0, 0])
    builds, evals_i, fits_i, evals_r, fits_r, fixes, alphas = [], [], [], [], [], [], []
    for _ in range(a.windows):
        t, valid, sigma, z = irregular_window(rng)
        fixes.append(t.size)
        prep = prepare_window(z, DT, mask=valid, taper="hann", max_freq=MAX_FREQ)
        t0 = time.perf_counter()
        obs = IrregularObservation(t, DT, N, prep.valid, "central", "hann", position_error_m=sigma,
                                   band_index=prep.band_index, inertial_frequency_cpd=-1.0)
        builds.append(time.perf_counter() - t0)
        evals_i.append(median_time(lambda o=obs: o.expected_in_band(fam, THETA, CTX), repeat=20))
        pg = prep.periodogram[prep.band_index]
        t0 = time.perf_counter()
        th, _ = fit(lambda th, o=obs: o.expected_in_band(fam, th, CTX), pg, x0, bounds)
        fits_i.append(time.perf_counter() - t0 + builds[-1])
        alphas.append(th[1])
        # a regular hourly window (positions every hour with 50 m noise) through the regular observation model
        vr = simulate("matern+inertial", THETA, n=N + 2, dt=3600.0, seed=rng)
        prep_r = prepare_window(vr[1:-1], DT, taper="hann", max_freq=MAX_FREQ)
        theta_r = np.r_[THETA, 50.0]
        evals_r.append(median_time(lambda p=prep_r, th=theta_r: expected_in_band(ofam, th, p, CTX), repeat=20))
        pg_r = prep_r.periodogram[prep_r.band_index]

        def expect_r(th, p=prep_r):
            e, de = expected_in_band(ofam, np.r_[th, 50.0], p, CTX)
            return e, de[:-1]

        t0 = time.perf_counter()
        fit(expect_r, pg_r, x0, bounds)
        fits_r.append(time.perf_counter() - t0)
    med = np.median
    print(f"matern+inertial, 60-day hourly windows (N = {N}), band |f| <= {MAX_FREQ} cpd, {a.windows} windows; "
          f"satellite-like fixes: median {med(fixes):.0f} per window, kernel {obs.kernel.shape[0]} x "
          f"{obs.kernel.shape[1]}")
    print(f"{'':34s}{'irregular':>12s}{'regular':>12s}{'ratio':>8s}")
    print(f"{'build per window (ms)':34s}{1e3 * med(builds):12.1f}{'-':>12s}")
    print(f"{'expected_in_band + gradient (ms)':34s}{1e3 * med(evals_i):12.2f}{1e3 * med(evals_r):12.2f}"
          f"{med(evals_i) / med(evals_r):8.1f}")
    print(f"{'fit incl. build (ms)':34s}{1e3 * med(fits_i):12.1f}{1e3 * med(fits_r):12.1f}"
          f"{med(fits_i) / med(fits_r):8.1f}   (target <= 20)")
    print(f"alpha from the irregular fits (true 1.2): {np.round(alphas, 3)}")


if __name__ == "__main__":
    main()
