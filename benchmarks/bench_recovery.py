"""Recovery of known parameters on hard data, with default options: regular hourly, satellite-like, equatorial and
fast-moving tracks (the project's scenario simulator, analysis/simulation/scenarios.py).

For every scenario the fixes go through the same path as ``driftspec fit`` (quality control, grid, velocities,
windows, FitSpec defaults) and the selected fit of each window is compared with its track's truth. Printed: the
share of windows ok, the median of every parameter against the truth (difference for the slope, ratio for the
rest), the diffusivity ratio, 95 % interval coverage of the slope, seconds per window, and the targets.

    python benchmarks/bench_recovery.py [--tracks 8] [--seed 1]
"""

import argparse
import time

import numpy as np
import pandas as pd

from driftspec.analysis import FitSpec, fit_window, read_fixes
from driftspec.analysis.conventions import SECONDS_PER_DAY, inertial_frequency_cpd
from driftspec.analysis.models import FitContext, get_family
from driftspec.analysis.simulation.scenarios import generate_scenario
from driftspec.analysis.tracks.pipeline import grid_velocities
from driftspec.analysis.tracks.qc import clean_fixes
from driftspec.analysis.tracks.windows import iter_windows

#: (label, scenario kind, sampling, days per track, window days, targets)
CASES = [
    ("regular hourly", "satellite", "hourly", 120, 60, {}),
    ("satellite-like", "satellite", "satellite", 120, 60,
     {"ok": 0.90, "alpha": 0.1, "matern_damping": 1.5, "matern_variance": 1.3, "inertial_variance": 1.4,
      "diffusivity": 1.5}),
    ("equatorial 1-6 N", "equatorial", None, 120, 30, {"ok": 0.95, "alpha": 0.15, "diffusivity": 1.5}),
    ("12 deg in 60 days", "meridional", None, 60, 60, {"alpha": 0.1, "inertial_damping": 1.3}),
]


def true_diffusivity(row) -> float:
    """``S(0)/4`` of the generating model (Matérn plus the inertial oscillation at the mean inertial frequency)."""
    fc = float(inertial_frequency_cpd(row["mean_lat"]))
    fam = get_family("matern+inertial")
    theta = [row["matern_variance"], row["matern_alpha"], row["matern_damping"], row["inertial_variance"], fc,
             row["inertial_damping"]]
    return fam.zero_frequency_density(theta, FitContext(dt_days=1 / 24, inertial_frequency_cpd=fc)) * \
        SECONDS_PER_DAY / 4


def run_case(label, kind, sampling, days, window_days, targets, tracks, seed):
    fixes, truth = generate_scenario(kind, n_tracks=tracks, days=days, seed=seed, sampling=sampling)
    truth = truth.set_index("id")
    clean, _ = clean_fixes(read_fixes(fixes))  # through the reader, as a file or DataFrame would go
    vel = grid_velocities(clean)
    windows = list(iter_windows(vel, window_days=window_days, overlap=0.5))
    spec = FitSpec()
    t0 = time.perf_counter()
    rows = []
    for w in windows:
        r = next(r for r in fit_window(w, spec) if r.selected)
        t = truth.loc[w.track_id]
        p, se = r.params, r.stderr
        rows.append({
            "ok": r.status == "ok", "model": r.model, "irregular": w.irregular,
            "alpha": p.get("matern_alpha", np.nan) - t["matern_alpha"],
            "alpha_covered": abs(p.get("matern_alpha", np.nan) - t["matern_alpha"]) <= 1.96 * se.get("matern_alpha",
                                                                                                    np.nan),
            "matern_damping": p.get("matern_damping", np.nan) / t["matern_damping"],
            "matern_variance": p.get("matern_variance", np.nan) / t["matern_variance"],
            "inertial_variance": p.get("inertial_variance", np.nan) / t["inertial_variance"],
            "inertial_damping": p.get("inertial_damping", np.nan) / t["inertial_damping"],
            "diffusivity": r.diffusivity / true_diffusivity(t),
        })
    seconds = (time.perf_counter() - t0) / max(len(windows), 1)
    df = pd.DataFrame(rows)
    ok = df[df["ok"]]
    print(f"\n{label}: {len(df)} windows of {window_days} days ({int(df['irregular'].sum())} modelled as irregular), "
          f"{seconds:.2f} s per window; selected: {df['model'].value_counts().to_dict()}")
    share = df["ok"].mean()
    print(f"  {'windows ok':<22} {share:>8.2f}   target {'>= ' + str(targets['ok']) if 'ok' in targets else '-'}")
    for col, how in (("alpha", "difference"), ("matern_damping", "ratio"), ("matern_variance", "ratio"),
                     ("inertial_variance", "ratio"), ("inertial_damping", "ratio"), ("diffusivity", "ratio")):
        med = float(np.nanmedian(ok[col])) if len(ok) and ok[col].notna().any() else np.nan
        tgt = targets.get(col)
        verdict = ""
        if tgt is not None and np.isfinite(med):
            good = abs(med) <= tgt if how == "difference" else 1 / tgt <= med <= tgt
            verdict = "met" if good else "missed"
        target_text = (f"within {tgt}" if how == "difference" else f"within x{tgt}") if tgt else "-"
        print(f"  median {col + ' ' + how:<34} {med:>8.3f}   target {target_text:<12} {verdict}")
    if len(ok):
        print(f"  95 % interval covers the slope in {ok['alpha_covered'].mean():.2f} of ok windows")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--tracks", type=int, default=8)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--only", help="run only the case whose label starts with this")
    a = ap.parse_args()
    for case in CASES:
        if a.only is None or case[0].startswith(a.only):
            run_case(*case, tracks=a.tracks, seed=a.seed)


if __name__ == "__main__":
    main()
