"""The model choice per window: the chi-bar-squared reference, resolvability of the inertial peak, and that a fit
at a bound is not chosen over a simpler one inside its bounds."""

import numpy as np
import pandas as pd
import pytest
from scipy.stats import chi2

from driftspec.analysis import FitSpec, Window, fit_window, simulate
from driftspec.analysis.conventions import inertial_frequency_cpd
from driftspec.analysis.fitting.result import FitResult
from driftspec.analysis.fitting.selection import chibar_pvalue, select

HOUR = 3600.0


def _window(z, lat):
    lat = np.broadcast_to(np.asarray(lat, float), z.shape).copy()
    t0 = pd.Timestamp("2031-01-01")
    return Window("SIM-0001", 0, 0, t0, t0 + pd.Timedelta(hours=z.size - 1), HOUR, z, lat, np.full(z.size, -140.0))


def test_chibar_squared_pvalue_matches_a_boundary_monte_carlo(rng):
    # the likelihood ratio for a normal mean constrained to mu >= 0, at mu = 0, is max(X, 0)^2: its law is
    # 1/2 chi2(0) + 1/2 chi2(1) (H. Chernoff, Ann. Math. Statist. 25, 573-578, 1954; Self and Liang 1987, case 1);
    # and with two more free parameters it is 1/2 chi2(2) + 1/2 chi2(3): X1^2 + X2^2 + max(X3, 0)^2
    x = rng.standard_normal((400_000, 3))
    lr1 = np.maximum(x[:, 0], 0) ** 2
    lr3 = x[:, 0] ** 2 + x[:, 1] ** 2 + np.maximum(x[:, 2], 0) ** 2
    for d in (0.5, 2.0, 5.4):
        assert chibar_pvalue(d, 1) == pytest.approx(np.mean(lr1 >= d), abs=3e-3)
        assert chibar_pvalue(d, 3) == pytest.approx(np.mean(lr3 >= d), abs=3e-3)
    assert chibar_pvalue(4.0, 1) == pytest.approx(0.5 * chi2.sf(4.0, 1))


def _fake(model, names, loglik, status="ok", max_freq=9.0, **params):
    p = {n: params.get(n, 1.0) for n in names}
    r = FitResult(model, "debiased", p, dict.fromkeys(names, 0.1), {}, loglik=loglik, status=status,
                  max_freq=max_freq)
    return r


MATERN = ["matern_variance", "matern_alpha", "matern_damping"]
RICH = MATERN + ["inertial_variance", "inertial_frequency", "inertial_damping"]


def test_a_candidate_at_a_bound_is_not_chosen_over_a_simpler_one_inside_its_bounds():
    simple = _fake("matern", MATERN, -100.0)
    rich = _fake("matern+inertial", RICH, -50.0, status="at_bound", inertial_frequency=-1.0, inertial_damping=0.2)
    rich.message = "at bound: inertial_damping"
    assert select([simple, rich], 30.0) == 0 and simple.selected and not rich.selected
    # and the reason says so (it used to call the Matérn "the simplest candidate")
    assert simple.selection == "matern: matern+inertial at_bound (at bound: inertial_damping)", simple.selection
    # the same likelihoods with the richer fit inside its bounds: kept (D = 100, a resolved peak)
    rich.status = "ok"
    assert select([simple, rich], 30.0) == 1 and "likelihood ratio" in rich.selection


def test_when_no_candidate_converges_the_likelihood_ratio_still_chooses():
    # both on a bound (a misspecified Matérn runs alpha to its upper bound; the oscillation's fit ends with alpha on
    # the lower): the richer one is kept when the likelihood supports it and its peak is resolved, as between fits
    # inside their bounds, and the reason says that none converged; D = 2 x 86 gives p far below 0.01
    # (chi-bar-squared with 3 extra parameters)
    simple = _fake("matern", MATERN, 954.5, status="at_bound", matern_alpha=4.99)
    simple.message = "at bound: matern_alpha"
    rich = _fake("matern+inertial", RICH, 1040.8, status="at_bound", inertial_frequency=-1.15, inertial_damping=0.3)
    rich.message = "at bound: matern_alpha"
    assert select([simple, rich], 30.0) == 1 and rich.selected and not simple.selected
    assert rich.selection.startswith("no candidate converged inside its bounds; matern+inertial: likelihood "
                                     "ratio p ="), rich.selection
    assert simple.selection == "not selected: matern+inertial chosen (this candidate at_bound)"
    # a small gain does not earn the extra parameters, bound or not: the simpler is reported
    rich.loglik = 955.0
    assert select([simple, rich], 30.0) == 0 and "not supported" in simple.selection
    # a richer fit inside its bounds over a simpler one on a bound: chosen by rule 1, the likelihood ratio on record
    rich.status, rich.loglik = "ok", 1040.8
    assert select([simple, rich], 30.0) == 1
    assert rich.selection.startswith("matern+inertial: matern at_bound (at bound: matern_alpha); likelihood ratio "
                                     "against matern p = "), rich.selection
    assert float(rich.selection.rsplit("p = ", 1)[1]) == pytest.approx(chibar_pvalue(2 * 86.3, 3), rel=0.05)


def test_an_unresolved_inertial_peak_is_not_kept_however_large_the_likelihood_gain():
    # |f| = 0.05 cpd with half-width 0.2/(2 pi) = 0.03 cpd sits within two Rayleigh bins (2/30 cpd) of zero
    simple = _fake("matern", MATERN, -100.0)
    rich = _fake("matern+inertial", RICH, -20.0, inertial_frequency=-0.05, inertial_damping=0.2)
    assert select([simple, rich], 30.0) == 0 and "not resolved" in simple.selection


@pytest.mark.parametrize("lat, expect", [(1.0, "matern"), (30.0, "matern+inertial")])
def test_defaults_keep_the_inertial_part_only_where_it_is_resolved(lat, expect):
    # a 30-day window with a clear inertial oscillation at the local frequency: kept at 30 N (peak at 1.0 cpd),
    # dropped at 1 N (peak at 0.035 cpd, less than a resolution bin from zero)
    fc = float(inertial_frequency_cpd(lat))
    z = simulate("matern+inertial", [0.02, 1.3, 1.0, 0.02, fc, 0.2], n=720, dt=HOUR, seed=4)
    spec = FitSpec(velocity="measured")
    results = fit_window(_window(z, lat), spec)
    chosen = [r for r in results if r.selected]
    assert len(chosen) == 1 and chosen[0].model == expect, [(r.model, r.status, r.selection) for r in results]


def test_inertial_part_follows_the_latitude_on_its_own_when_the_track_moves_fast():
    # 12 degrees north in 60 days moves the inertial frequency by ~0.3 cpd, far more than the resolution 1/60 cpd:
    # the default specification follows the latitude without being asked, and recovers the damping
    lat = np.linspace(20.0, 32.0, 1440)
    theta = [0.02, 1.2, 1.0, 0.02, 0.0, 0.2]
    z = simulate("matern+inertial", theta, n=1440, dt=HOUR, seed=8, latitude=lat, inertial_frequency="follow-latitude")
    results = fit_window(_window(z, lat), FitSpec(velocity="measured"))
    rich = next(r for r in results if r.model == "matern+inertial")
    assert "inertial_frequency_offset" in rich.params and rich.selected, rich.selection
    assert abs(rich.params["inertial_damping"] - 0.2) < 3 * rich.stderr["inertial_damping"]
    assert abs(rich.params["inertial_frequency_offset"]) < 3 * rich.stderr["inertial_frequency_offset"] + 0.01
