"""driftspec.analysis: from position fixes to rotary spectra, model fits and regional products.

The pipeline, one subpackage per stage:

``io``           1  read/write fixes (one reader per format behind a registry) and result tables
``tracks``       2  quality control, regular grid, velocities on the sphere, analysis windows
``models``       3  model families (Matérn, inertial, ...) and the observation model
``spectral``     4  rotary periodogram and multitaper; expected periodogram; Whittle, debiased and exact likelihoods
``simulation``   5  circulant-embedding simulation, the synthetic demo
``fitting``      6  the fit specification, estimators as objects, one window (:func:`fit_window`), every window
``regional``     7  parameter maps, observed dispersion

``conventions``, ``errors`` and ``runs`` (track runs, longitudes) sit below every stage. No module imports a
later stage (``tests/test_layout.py``).

This package depends on numpy, scipy, pandas and xarray only.
"""

from .conventions import OMEGA_EARTH, inertial_frequency_cpd, tidal_frequencies_cpd
from .errors import InputError
from .fitting import FitResult, FitSpec, fit_series, fit_window
from .io import read_fixes, write_fixes
from .models import FAMILIES, get_family
from .simulation.simulate import simulate
from .spectral.periodogram import RotarySpectrum, multitaper_spectrum, rotary_periodogram
from .tracks.qc import QCReport, clean_fixes
from .tracks.resample import regular_grid
from .tracks.velocity import add_velocity
from .tracks.windows import Window, iter_windows

__all__ = [
    "FAMILIES", "FitResult", "FitSpec", "InputError", "OMEGA_EARTH", "QCReport", "RotarySpectrum", "Window",
    "add_velocity", "clean_fixes", "fit_series", "fit_window", "get_family", "inertial_frequency_cpd", "iter_windows",
    "multitaper_spectrum", "read_fixes", "regular_grid", "rotary_periodogram", "simulate",
    "tidal_frequencies_cpd", "write_fixes",
]
