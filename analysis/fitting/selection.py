"""An honest model choice per window: which candidate's fit describes the window.

The rule, in order:

1. A candidate that did not converge inside its bounds (``at_bound``, ``no_convergence``, ``failed``) is not
   chosen over one that did: a fit that ends on a bound has not found the likelihood's maximum in the model's
   interior, and a simpler model that does is the better description. When none converged, rule 2 and 3 choose
   among those that produced numbers (the chosen fit keeps its status, and the reason says none converged).
2. Of two nested candidates (the simpler one's parameters are a subset of the richer one's, as ``matern`` in
   ``matern+inertial``), the richer one is kept only if

   * its extra part is **resolved**: for an inertial oscillation, the half-power band of its peak,
     ``|f_peak| -+ gamma / (2 pi)`` (``gamma`` the damping), lies at least two Rayleigh bins ``2 / T`` away from
     zero and inside the fitted band. Near the equator the inertial frequency goes to zero and the peak merges
     with the red background; there the likelihood can prefer the richer model by fitting background structure
     with the oscillation, and its parameters no longer mean what their names say;
   * and the **likelihood supports it**: the likelihood-ratio statistic ``D = 2 (l_rich - l_simple)`` against the
     chi-bar-squared reference ``1/2 chi2(k - 1) + 1/2 chi2(k)`` (``k`` extra parameters, one of them, the
     oscillation's variance, on the boundary of its space under the simpler model) gives ``p < 0.01``.

   (S. G. Self, K.-Y. Liang, "Asymptotic properties of maximum likelihood estimators and likelihood ratio tests
   under nonstandard conditions", Journal of the American Statistical Association 82, 605-610, 1987,
   doi:10.1080/01621459.1987.10478472. Under the simpler model the oscillation's frequency and damping are not
   identified, so the mixture is an approximation, and the Whittle likelihoods are pseudo-likelihoods; the strict
   level 0.01 allows for both.)
3. Candidates that are not nested are compared by AIC.

Every result gets ``selected`` (True on the chosen one) and ``selection``, a short reason.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import chi2

#: level of the likelihood-ratio test for keeping a richer candidate
LRT_LEVEL = 0.01
#: Rayleigh bins (1/T) between zero frequency and the inertial peak's half-power band for it to be resolved
RESOLUTION_BINS = 2.0


def chibar_pvalue(statistic: float, k: int) -> float:
    """p-value of a likelihood-ratio statistic against ``1/2 chi2(k-1) + 1/2 chi2(k)`` (``chi2(0)`` a point mass
    at zero), the reference when one of ``k`` extra parameters is on its boundary (Self and Liang 1987)."""
    d = max(float(statistic), 0.0)
    upper = chi2.sf(d, k)
    lower = chi2.sf(d, k - 1) if k > 1 else float(d <= 0)
    return float(0.5 * lower + 0.5 * upper)


def inertial_resolution(result, window_days: float) -> tuple[bool, str]:
    """Whether the inertial peak of a fitted result is resolved from zero and inside the band, and why (not)."""
    p = result.params
    if "inertial_damping" not in p:
        return True, ""
    if "inertial_frequency" in p:
        f_peak = p["inertial_frequency"]
    else:
        fc = result.context.inertial_frequency_cpd if result.context is not None else None
        f_peak = (fc or 0.0) + p.get("inertial_frequency_offset", 0.0)
    half = p["inertial_damping"] / (2 * np.pi)
    need = RESOLUTION_BINS / window_days
    if abs(f_peak) - half < need:
        return False, (f"inertial peak not resolved from zero (|f| {abs(f_peak):.3f} cpd, half-width {half:.3f}, "
                       f"resolution {1 / window_days:.3f} cpd)")
    if abs(f_peak) + half > result.max_freq:
        return False, f"inertial peak beyond the fitted band ({abs(f_peak):.2f} > {result.max_freq:.2f} cpd)"
    return True, f"inertial peak resolved (|f| {abs(f_peak):.2f} cpd, half-width {half:.3f})"


def select(results, window_days: float) -> int:
    """Mark the selected result among one window's candidates (see the module docstring); returns its index."""
    if not results:
        return -1
    converged = [r.status == "ok" for r in results]
    order = sorted(range(len(results)), key=lambda i: len(results[i].params))
    pool = [i for i in order if converged[i]]
    prefix = ""
    if not pool:  # nothing converged inside its bounds: the same rule among the candidates that produced numbers
        pool = [i for i in order if np.isfinite(results[i].loglik)] or order[:1]
        prefix = "no candidate converged inside its bounds; "
    best = pool[0]
    # the candidates left out for not converging inside their bounds, whether simpler or richer: say so
    skipped = [results[i] for i in order if i not in pool]
    reason = (f"{results[best].model}: " + "; ".join(f"{r.model} {r.status} ({r.message})" for r in skipped)
              if skipped else f"{results[best].model}: the simplest candidate")
    for i in pool[1:]:
        cur, new = results[best], results[i]
        if set(cur.params) < set(new.params):  # nested: the richer model must earn its extra parameters
            resolved, why = inertial_resolution(new, window_days)
            k = len(new.params) - len(cur.params)
            pval = chibar_pvalue(2 * (new.loglik - cur.loglik), k)
            if not resolved:
                reason = f"{cur.model}: {why}"
            elif pval >= LRT_LEVEL:
                reason = f"{cur.model}: {new.model} not supported (likelihood ratio p = {pval:.2g})"
            else:
                best, reason = i, f"{new.model}: likelihood ratio p = {pval:.2g}; {why}".rstrip("; ")
        elif new.aic < cur.aic:
            best, reason = i, f"{new.model}: lower AIC than {cur.model} ({new.aic:.1f} < {cur.aic:.1f})"
    chosen = results[best]
    # a simpler candidate left out for its bound: the likelihood ratio too, for the record (it did not decide)
    for r in skipped:
        if set(r.params) < set(chosen.params) and np.isfinite(r.loglik) and np.isfinite(chosen.loglik):
            pval = chibar_pvalue(2 * (chosen.loglik - r.loglik), len(chosen.params) - len(r.params))
            reason += f"; likelihood ratio against {r.model} p = {pval:.2g}"
    reason = prefix + reason
    for j, r in enumerate(results):
        r.selected = j == best
        r.selection = reason if j == best else f"not selected: {chosen.model} chosen"
        if not converged[j] and j != best:
            r.selection += f" (this candidate {r.status})"
    return best


__all__ = ["LRT_LEVEL", "RESOLUTION_BINS", "chibar_pvalue", "inertial_resolution", "select"]
