import numpy as np
import pytest

from driftspec.analysis.conventions import OMEGA_EARTH, inertial_frequency_cpd, tidal_frequencies_cpd


def test_earth_rotation_rate_matches_iers():
    # IERS Conventions (2010), IERS Technical Note 36: nominal mean angular velocity 7.292115e-5 rad/s
    assert OMEGA_EARTH == pytest.approx(7.292115e-5, rel=1e-6)


def test_inertial_period_at_30_degrees():
    # f = 2 Omega sin(phi): at 30 N the inertial period is one sidereal day / (2 sin 30) = 23.93 h
    period_h = 24.0 / abs(inertial_frequency_cpd(30.0))
    assert period_h == pytest.approx(23.93, abs=0.005)


def test_inertial_frequency_sign_convention():
    # clockwise (negative) in the northern hemisphere, counterclockwise in the southern, zero at the equator
    f = inertial_frequency_cpd(np.array([30.0, -30.0, 0.0]))
    assert f[0] < 0 < f[1] and f[2] == 0.0
    assert f[0] == pytest.approx(-1.0027, abs=1e-4)


def test_tidal_constituent_frequencies():
    # standard harmonic-constant tables: M2 12.4206 h, S2 12.0000 h, K1 23.9345 h, O1 25.8193 h
    f = tidal_frequencies_cpd()
    assert 24 / f["M2"] == pytest.approx(12.4206, abs=1e-4)
    assert 24 / f["S2"] == pytest.approx(12.0, abs=1e-4)
    assert 24 / f["K1"] == pytest.approx(23.9345, abs=1e-4)
    assert 24 / f["O1"] == pytest.approx(25.8193, abs=1e-4)
