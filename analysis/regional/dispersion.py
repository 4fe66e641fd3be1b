"""Single-particle dispersion observed from the tracks, and the diffusivity it implies.

For the tracks that start in a region, and for every start time ``t`` along every track, the
displacement over a lag ``tau`` with the region's mean velocity ``U`` removed is
``D(t, tau) = X(t + tau) - X(t) - U tau``, computed by summing the gridded velocity (m/s) over the lag.
Averaging over all starts gives the dispersion ``<D_x^2>``, ``<D_y^2>`` (m^2), and the diffusivity per
component is ``kappa_i(tau) = 1/2 d<D_i^2>/d tau`` (Davis 1991); ``kappa = (kappa_x + kappa_y) / 2`` is
compared with the model-based, per-component diffusivity of the fits. The long-lag plateau is the mean
of ``kappa(tau)`` over a lag range chosen by the analyst (default: 10-20 days). Intervals come from a
bootstrap over tracks (tracks resampled with replacement).

Whether ``kappa`` has levelled off over those lags is tested, not assumed: ``rise`` is the mean of ``kappa`` over
the second half of the plateau lags less its mean over the first half, with its bootstrap interval. An interval
above zero means ``kappa`` is still growing there (motion still correlated at those lags, or shear of a mean flow
that one mean velocity per region does not remove): the "plateau" is then only the mean of a growing curve, not
the diffusivity's long-lag limit (``levelled_off`` is False).

References
----------
Davis, R. E. (1991). Observing the general circulation with floats. Deep-Sea Research 38 (Suppl. 1),
S531-S571. doi:10.1016/S0198-0149(12)80023-9
Taylor, G. I. (1921). Diffusion by continuous movements. Proc. London Math. Soc. s2-20, 196-212.
LaCasce, J. H. (2008). Statistics from Lagrangian observations. Progress in Oceanography 77, 1-29.
doi:10.1016/j.pocean.2008.02.002
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .maps import is_selected


@dataclass
class DispersionResult:
    """Dispersion and diffusivity against lag for one region."""

    lag_days: np.ndarray
    dispersion_x: np.ndarray  # m^2
    dispersion_y: np.ndarray
    kappa: np.ndarray  # m^2/s, mean of the two components
    kappa_lower: np.ndarray
    kappa_upper: np.ndarray
    plateau: float
    plateau_lower: float
    plateau_upper: float
    plateau_lags: tuple[float, float]
    n_tracks: int
    mean_velocity: complex
    rise: float = np.nan  # kappa's mean over the second half of the plateau lags less the first half's, m^2/s
    rise_lower: float = np.nan
    rise_upper: float = np.nan

    @property
    def levelled_off(self) -> bool:
        """False where ``kappa`` is still rising over the plateau lags (the rise's bootstrap interval above zero)."""
        return not (np.isfinite(self.rise_lower) and self.rise_lower > 0)

    def plateau_note(self) -> str:
        """One sentence on whether the plateau is one (empty when ``kappa`` has levelled off)."""
        if self.levelled_off:
            return ""
        a, b = self.plateau_lags
        return (f"kappa is still rising over {a:g}-{b:g} days (second half less first half: {self.rise:.0f} m2/s "
                f"[{self.rise_lower:.0f}, {self.rise_upper:.0f}]): no plateau yet, so this is not the diffusivity's "
                "long-lag limit (motion still correlated, or shear of the mean flow; try a smaller region or "
                "longer lags)")

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame({"lag_days": self.lag_days, "dispersion_x_m2": self.dispersion_x,
                             "dispersion_y_m2": self.dispersion_y, "kappa_m2_s": self.kappa,
                             "kappa_lower": self.kappa_lower, "kappa_upper": self.kappa_upper})


def _in_region(lat, lon, region):
    if region is None:
        return np.ones(lat.shape, bool)
    lon0, lat0, lon1, lat1 = region
    lo = ((lon - lon0 + 180) % 360) - 180 + lon0
    return (lat >= min(lat0, lat1)) & (lat <= max(lat0, lat1)) & (lo >= min(lon0, lon1)) & (lo <= max(lon0, lon1))


def _track_sums(z, starts_ok, dt_s, lag_steps, mean_v):
    """Per-track sums of D_x^2, D_y^2 and counts at each lag (complete displacements only)."""
    zz = np.where(np.isfinite(z), z - mean_v, 0.0)
    good = np.isfinite(z).astype(np.int64)
    c = np.concatenate([[0], np.cumsum(zz)]) * dt_s
    g = np.concatenate([[0], np.cumsum(good)])
    n = z.size
    sx = np.zeros(len(lag_steps))
    sy = np.zeros(len(lag_steps))
    cnt = np.zeros(len(lag_steps))
    idx = np.flatnonzero(starts_ok)
    for k, m in enumerate(lag_steps):
        t = idx[idx + m <= n]
        if t.size == 0:
            continue
        complete = (g[t + m] - g[t]) == m
        t = t[complete]
        d = c[t + m] - c[t]
        sx[k] = np.sum(d.real**2)
        sy[k] = np.sum(d.imag**2)
        cnt[k] = t.size
    return sx, sy, cnt


def single_particle_dispersion(vel: pd.DataFrame, region=None, max_lag_days: float = 25.0,
                               lag_step_hours: float = 6.0, plateau_lags=(10.0, 20.0), n_boot: int = 200,
                               seed: int = 0) -> DispersionResult:
    """Observed single-particle dispersion and diffusivity for the tracks starting in ``region``.

    Parameters
    ----------
    vel : pandas.DataFrame
        Gridded velocities (``load_velocities`` output).
    region : (lon0, lat0, lon1, lat1), optional
        Start positions must lie in this box (default: everywhere).
    max_lag_days, lag_step_hours : float
        Lags evaluated.
    plateau_lags : (float, float)
        Lag range (days) averaged for the plateau.
    n_boot : int
        Bootstrap replicates over tracks.
    """
    v = vel.sort_values(["id", "segment", "time"], kind="stable")
    dt_s = float(np.median(np.diff(v["time"].to_numpy().astype("datetime64[ns]").astype(np.int64)[:1000]))) / 1e9
    z = v["u"].to_numpy(float) + 1j * v["v"].to_numpy(float)
    inside = _in_region(v["lat"].to_numpy(float), v["lon"].to_numpy(float), region)
    zin = z[inside & np.isfinite(z)]
    if zin.size == 0:
        raise ValueError("no valid velocity in the region")
    mean_v = complex(zin.mean())
    steps = np.unique(np.maximum(1, np.round(np.arange(lag_step_hours, max_lag_days * 24 + 1e-9,
                                                       lag_step_hours) * 3600 / dt_s).astype(int)))
    keys = v["id"].astype(str) + "#" + v["segment"].astype(str)
    sums = []
    for _, idx in v.groupby(keys.to_numpy(), sort=True).indices.items():
        if inside[idx].any():
            sums.append(_track_sums(z[idx], inside[idx], dt_s, steps, mean_v))
    if not sums:
        raise ValueError("no track starts in the region")
    sx = np.array([s[0] for s in sums])
    sy = np.array([s[1] for s in sums])
    cn = np.array([s[2] for s in sums])
    lag_s = steps * dt_s

    def curve(w):
        n = np.maximum((w[:, None] * cn).sum(0), 1)
        dx = (w[:, None] * sx).sum(0) / n
        dy = (w[:, None] * sy).sum(0) / n
        kap = 0.25 * np.gradient(dx + dy, lag_s)  # 1/2 d<D_i^2>/dt averaged over the two components
        return dx, dy, kap

    ones = np.ones(len(sums))
    dx, dy, kap = curve(ones)
    lag_days = lag_s / 86400.0
    sel = (lag_days >= plateau_lags[0]) & (lag_days <= plateau_lags[1])
    middle = 0.5 * (plateau_lags[0] + plateau_lags[1])
    first, second = sel & (lag_days < middle), sel & (lag_days > middle)

    def rise_of(k):
        return float(np.mean(k[second]) - np.mean(k[first])) if first.any() and second.any() else np.nan

    rng = np.random.default_rng(seed)
    boots, plats, rises = [], [], []
    for _ in range(n_boot):
        w = np.bincount(rng.integers(0, len(sums), len(sums)), minlength=len(sums)).astype(float)
        k = curve(w)[2]
        boots.append(k)
        plats.append(np.mean(k[sel]) if sel.any() else np.nan)
        rises.append(rise_of(k))
    boots = np.array(boots)
    lo, hi = np.nanpercentile(boots, [2.5, 97.5], axis=0) if n_boot else (kap * np.nan, kap * np.nan)
    plo, phi = np.nanpercentile(plats, [2.5, 97.5]) if n_boot else (np.nan, np.nan)
    rlo, rhi = np.nanpercentile(rises, [2.5, 97.5]) if n_boot and np.isfinite(rises).any() else (np.nan, np.nan)
    return DispersionResult(lag_days, dx, dy, kap, lo, hi, float(np.mean(kap[sel])) if sel.any() else np.nan,
                            float(plo), float(phi), tuple(plateau_lags), len(sums), mean_v, rise_of(kap), float(rlo),
                            float(rhi))


def model_diffusivity(fits: pd.DataFrame, region=None) -> tuple[float, int]:
    """Median fitted diffusivity (m^2/s) of the ok fits whose mean position is in ``region``, and their count."""
    ok = fits[(fits["status"] == "ok") & np.isfinite(fits["diffusivity"]) & is_selected(fits)]
    ok = ok[_in_region(ok["lat"].to_numpy(float), ok["lon"].to_numpy(float), region)]
    return (float(ok["diffusivity"].median()) if len(ok) else np.nan), len(ok)
