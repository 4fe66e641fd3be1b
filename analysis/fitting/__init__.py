"""Stage 6, fitting: one window (:func:`fit_series`), every window of a data set (:mod:`.batch`)."""

from .core import FitResult, bootstrap_stderr, fit_series, ks_exponential_pvalue, score_covariance

__all__ = ["FitResult", "bootstrap_stderr", "fit_series", "ks_exponential_pvalue", "score_covariance"]
