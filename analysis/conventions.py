"""Physical constants, units and sign conventions used everywhere in driftspec.

Conventions, stated once:

* Complex velocity ``z = u + i v`` in m/s, ``u`` eastward and ``v`` northward.
* Rotary frequency ``f`` in cycles per day (cpd). Positive frequencies rotate
  counterclockwise, negative frequencies clockwise (seen from above).
* Spectral densities are two-sided over ``-f_N <= f < f_N`` in (m/s)^2 per cpd, normalised so
  that their integral over frequency is the variance ``E|z|^2``.
* Autocovariance ``R(tau) = E[z(t + tau) conj(z(t))]``, so ``R(tau) = int S(f) exp(2 pi i f tau) df``
  with ``tau`` in days.
* The inertial frequency is ``f_c = -2 Omega sin(latitude)`` in this rotary convention: inertial
  oscillations turn clockwise (negative frequency) in the northern hemisphere.
"""

from __future__ import annotations

import numpy as np

#: Nominal mean angular velocity of the Earth, rad/s (IERS Conventions 2010, IERS Technical Note 36,
#: section 1.2, "Omega = 7.292115e-5 rad/s"; the value 7.2921159e-5 is the one given for the
#: sidereal rotation rate in geodesy references).
OMEGA_EARTH = 7.2921159e-5
#: Mean Earth radius, m (IUGG mean radius R1 of the GRS80/WGS84 ellipsoid).
EARTH_RADIUS_M = 6_371_008.8
SECONDS_PER_DAY = 86_400.0

#: Tidal constituent periods in hours (standard harmonic-constant tables), used for plot markers and
#: optional exclusion bands.
TIDAL_PERIODS_H = {
    "M2": 12.4206012,
    "S2": 12.0,
    "N2": 12.65834751,
    "K1": 23.93447213,
    "O1": 25.81933871,
}


def tidal_frequencies_cpd(names=("M2", "S2", "K1", "O1")) -> dict[str, float]:
    """Frequencies (cpd, positive) of the named tidal constituents."""
    return {n: 24.0 / TIDAL_PERIODS_H[n] for n in names}


def inertial_frequency_cpd(latitude_deg):
    """Local inertial frequency in cpd, signed in the rotary convention.

    Parameters
    ----------
    latitude_deg : float or array_like
        Latitude in degrees north.

    Returns
    -------
    float or ndarray
        ``-2 Omega sin(latitude)`` converted to cycles per day: negative (clockwise) in the
        northern hemisphere, positive in the southern.

    Examples
    --------
    >>> round(24 / abs(inertial_frequency_cpd(30.0)), 2)  # inertial period at 30 N, hours
    23.93
    """
    lat = np.asarray(latitude_deg, dtype=float)
    f_rad_s = -2.0 * OMEGA_EARTH * np.sin(np.deg2rad(lat))
    out = f_rad_s * SECONDS_PER_DAY / (2.0 * np.pi)
    return float(out) if out.ndim == 0 else out


def parse_timedelta_seconds(dt) -> float:
    """Sampling interval in seconds from a pandas/numpy/datetime timedelta or a float (seconds)."""
    import datetime

    import pandas as pd

    if isinstance(dt, (pd.Timedelta, datetime.timedelta, np.timedelta64)):
        seconds = pd.Timedelta(dt).total_seconds()
    elif isinstance(dt, str):
        seconds = pd.Timedelta(dt).total_seconds()
    else:
        seconds = float(dt)
    if not np.isfinite(seconds) or seconds <= 0:
        raise ValueError(f"sampling interval must be positive, got {dt!r}")
    return seconds
