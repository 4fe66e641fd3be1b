"""driftspec.analysis: from position fixes to rotary spectra, model fits and regional products.

The pipeline, one module per stage:

``io``           read/write fixes (CSV, Parquet, CF trajectory netCDF, DataFrame, Dataset)
``qc``           quality control with an accounting of every input row
``resample``     split at gaps, interpolate onto a regular grid, validity mask
``velocity``     finite-difference velocities on the sphere
``windows``      analysis windows
``spectra``      rotary periodogram and multitaper spectra
``models``       model families (Matérn, inertial, ...)
``likelihood``   debiased Whittle, Whittle and exact likelihoods
``fitting``      :func:`fit_series` for one window
``batch``        fits for every window of a data set (process pool or Dask)
``simulate``     simulation by circulant embedding

This package depends on numpy, scipy, pandas and xarray only.
"""

from .conventions import OMEGA_EARTH, inertial_frequency_cpd, tidal_frequencies_cpd
from .errors import InputError
from .fitting import FitResult, fit_series
from .io import read_fixes, write_fixes
from .models import FAMILIES, get_family
from .simulation.simulate import simulate
from .spectral.periodogram import RotarySpectrum, multitaper_spectrum, rotary_periodogram
from .tracks.qc import QCReport, clean_fixes
from .tracks.resample import regular_grid
from .tracks.velocity import add_velocity
from .tracks.windows import Window, iter_windows

__all__ = [
    "FAMILIES", "FitResult", "InputError", "OMEGA_EARTH", "QCReport", "RotarySpectrum", "Window",
    "add_velocity", "clean_fixes", "fit_series", "get_family", "inertial_frequency_cpd", "iter_windows",
    "multitaper_spectrum", "read_fixes", "regular_grid", "rotary_periodogram", "simulate",
    "tidal_frequencies_cpd", "write_fixes",
]
