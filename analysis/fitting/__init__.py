"""Stage 6, fitting. :class:`FitSpec` says what a window's fit depends on; :func:`fit_window` fits one window
under it (every candidate model), :func:`fit_series` fits arrays through the same path; the estimators are
objects (:mod:`.estimators`); :mod:`.batch` fits every window of a data set.

Modules: ``spec`` (the fit specification and the band rule), ``estimators`` (debiased Whittle, standard Whittle,
exact), ``core`` (the driver), ``result`` (FitResult, goodness of fit), ``uncertainty`` (sandwich and bootstrap
simulation), ``batch`` (serial, process pool or Dask; resumable).
"""

from .core import fit_prepared, fit_series, fit_window
from .estimators import ESTIMATORS, DebiasedEstimator, Estimator, ExactEstimator, WhittleEstimator, get_estimator
from .result import STATUSES, FitResult, ks_exponential_pvalue
from .spec import FitSpec, WindowPlan
from .uncertainty import score_covariance

__all__ = ["ESTIMATORS", "STATUSES", "DebiasedEstimator", "Estimator", "ExactEstimator", "FitResult", "FitSpec",
           "WhittleEstimator", "WindowPlan", "fit_prepared", "fit_series", "fit_window", "get_estimator",
           "ks_exponential_pvalue", "score_covariance"]
