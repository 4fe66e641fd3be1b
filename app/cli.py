"""The ``driftspec`` command line.

Subcommands: ``demo``, ``qc``, ``fit``, ``map``, ``serve``. Bad input prints one line naming the file (and
row/column where it applies) and exits with status 2; ``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
from pathlib import Path

EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error (the usage block is one ``--help`` away) and exit status 2."""

    def error(self, message):
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: {message} (see {self.prog} --help)\n")


def _positive(text: str) -> float:
    """An argparse type: a finite number above zero."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
    return value


def _port(text: str) -> int:
    """An argparse type: a TCP port number."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a port number: {text!r}") from None
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"a port number is 0 to 65535, got {value}")
    return value


def _add_prep_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("quality control and gridding")
    g.add_argument("--max-speed", type=_positive, default=3.0, metavar="M_S",
                   help="speed-spike ceiling, m/s (default 3, common practice for surface drifters)")
    g.add_argument("--step", default="1h", help="regular grid step (default 1h)")
    g.add_argument("--split-gap", default="3D", help="split tracks at gaps longer than this (default 3D)")
    g.add_argument("--mask-distance", default="auto",
                   help="grid samples further than this from any fix are missing (default auto: 3h for tracks with "
                        "regular fixes, 24h for tracks whose fixes are sparser than the grid, whose interpolation "
                        "the fit then models exactly)")
    g.add_argument("--velocity", choices=["central", "forward", "measured"], default="central",
                   help="velocities by central or forward differences of positions, or the input's u, v")


def _prep_options(args):
    from driftspec.analysis.tracks.pipeline import PrepOptions

    method = "central" if args.velocity == "measured" else args.velocity
    return PrepOptions(max_speed=args.max_speed, step=args.step, split_gap=args.split_gap,
                       mask_distance=args.mask_distance, velocity_method=method)


def _exclusions(text: str | None):
    if not text:
        return ()
    out = []
    for part in text.split(","):
        lo, _, hi = part.partition(":")
        try:
            out.append((float(lo), float(hi)))
        except ValueError as exc:
            raise SystemExit(f"driftspec: --exclude expects LOW:HIGH[,LOW:HIGH...] in cpd, got {text!r}") from exc
    return tuple(out)


def _add_window_options(p: argparse.ArgumentParser, default_days) -> None:
    if default_days is None:
        p.add_argument("--window-days", type=float, required=True)
    else:
        p.add_argument("--window-days", type=float, default=default_days)
    p.add_argument("--overlap", type=float, default=0.5, help="fraction, [0, 1)")
    p.add_argument("--min-coverage", type=float, default=0.8, help="minimum fraction of valid samples")


def _add_spec_options(p: argparse.ArgumentParser) -> None:
    """The options of the fit specification shared by ``fit`` and ``pool`` (see ``fit_spec_from_args``)."""
    p.add_argument("--max-freq", type=float, default=None,
                   help="fit |f| <= this, cpd (default, per window: a fraction of the grid's Nyquist frequency that "
                        "depends on the observation model, and at most 3/4 of the Nyquist frequency of the mean fix "
                        "interval)")
    p.add_argument("--observation", choices=["auto", "none", "differenced", "differenced+noise", "irregular"],
                   default="auto",
                   help="observation model (auto, the default, per window: irregular where the fixes are sparser "
                        "than the grid, differenced+noise for other velocities from positions, none for measured u, v)")
    p.add_argument("--position-noise", default="auto", metavar="auto|fit|input|METRES",
                   help="auto (default): the input's per-fix position_error_m with a fitted scale where fixes are "
                        "irregular, a fitted white noise otherwise; fit: always fitted; input: the input's errors; "
                        "or held at METRES")
    p.add_argument("--exclude", default=None, metavar="LOW:HIGH,...",
                   help="leave out bands of |f| (cpd), e.g. 1.85:2.05 around semidiurnal tides")
    p.add_argument("--taper", choices=["none", "hann", "dpss"], default="none")
    p.add_argument("--inertial-frequency", choices=["auto", "free", "follow-latitude"], default="auto",
                   help="inertial oscillation at a fitted constant frequency (free), following the local inertial "
                        "frequency with a fitted offset (follow-latitude), or following it where the window's "
                        "latitude span moves it by more than the frequency resolution (auto, default)")


def _add_run_options(p: argparse.ArgumentParser, resume_help: str) -> None:
    p.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="processes (default: all cores)")
    p.add_argument("--dask", metavar="ADDRESS", help="a Dask scheduler address, or 'local' for a LocalCluster")
    p.add_argument("--resume", action="store_true", help=resume_help)
    p.add_argument("--no-progress", action="store_true")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="driftspec",
        description="Rotary spectra, debiased-Whittle model fits and regional maps for drifting-float "
                    "trajectories. A statistical description of past currents, not a drift forecast.",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("demo", help="write the synthetic demo deployment (fixes and ground truth)")
    p.add_argument("outdir", type=Path)
    p.add_argument("--tracks", type=int, default=60)
    p.add_argument("--days", type=float, default=180.0)
    p.add_argument("--seed", type=int, default=2031)

    p = sub.add_parser("qc", help="quality-control fixes and account for every input row")
    p.add_argument("input", help="CSV, Parquet or CF trajectory netCDF")
    p.add_argument("--out", type=Path, required=True, help="cleaned fixes (.parquet, .csv or .nc)")
    p.add_argument("--report", type=Path, help="QC report (JSON)")
    p.add_argument("--max-speed", type=_positive, default=3.0, metavar="M_S",
                   help="speed-spike ceiling, m/s (default 3)")

    p = sub.add_parser("fit", help="fit a model to every window of every track")
    p.add_argument("input", help="CSV, Parquet or CF trajectory netCDF")
    p.add_argument("--out", type=Path, required=True, help="fits table (.parquet or .csv)")
    _add_window_options(p, default_days=60.0)
    p.add_argument("--model", default="auto",
                   help="auto (default: fit matern and matern+inertial to every window and write the one selected, "
                        "see the README), or model families separated by commas (matern, inertial, matern+inertial): "
                        "every candidate is written, the selected one marked in the column 'selected'")
    p.add_argument("--estimator", choices=["debiased", "whittle", "exact"], default="debiased")
    _add_spec_options(p)
    p.add_argument("--stderr", choices=("auto", "fisher", "sandwich"), default="auto",
                   help="standard errors: sandwich (score covariance simulated with the window's gaps, or from its "
                        "irregular fixes) or fisher (inflated Fisher information; faster); auto: sandwich for windows "
                        "with gaps or irregular fixes (default: %(default)s)")
    p.add_argument("--bootstrap", type=int, default=0, metavar="B",
                   help="also parametric-bootstrap standard errors from B refits of simulated replicates "
                        "(columns *_se_boot)")
    p.add_argument("--anisotropic", action="store_true",
                   help="also fit the anisotropic version of the selected model: isotropy test (isotropy_pvalue), "
                        "anisotropy and its angle, the diffusivity tensor (diffusivity_major/minor/angle_deg); "
                        "selected where isotropy is rejected at 1 %%")
    _add_run_options(p, "skip windows already in --out")
    p.add_argument("--chunk-size", type=int, default=64, help="windows per unit of work and per written part")
    _add_prep_options(p)

    p = sub.add_parser("map", help="grid fitted parameters into latitude-longitude bins (CF netCDF)")
    p.add_argument("fits", help="fits table from 'driftspec fit'")
    p.add_argument("--param", action="append", help="column to grid (repeatable; default: all parameters)")
    p.add_argument("--bin-deg", type=_positive, default=2.0)
    p.add_argument("--stat", choices=["median", "mean"], default="median")
    p.add_argument("--out", type=Path, required=True, help="output netCDF")
    p.add_argument("--png", type=Path, help="also write a quick-look map")

    p = sub.add_parser("pool", help="one model fitted to every window of each bin at once (pooled fits, CF netCDF)")
    p.add_argument("input", help="CSV, Parquet or CF trajectory netCDF")
    p.add_argument("--out", type=Path, required=True, help="pooled map (.nc)")
    _add_window_options(p, default_days=None)
    p.add_argument("--bin-deg", type=_positive, required=True, help="bin size, degrees")
    p.add_argument("--region", help="LON0,LAT0,LON1,LAT1 (default: everywhere; negative numbers need --region=...)")
    p.add_argument("--model", default="matern+inertial", help="the model family pooled (default %(default)s)")
    p.add_argument("--share", choices=["shape", "all"], default="shape",
                   help="share the spectral shape with per-window amplitudes (default), or every parameter")
    p.add_argument("--min-windows", type=int, default=2, help="fewest windows for a bin's fit (default 2)")
    p.add_argument("--anisotropic", action="store_true",
                   help="also fit every window and its anisotropic version, and map per bin the median anisotropy, "
                        "the axial mean angle, the share rejecting isotropy at 1 %% and the mean diffusivity tensor "
                        "(from the windows' own fits, not pooled)")
    _add_spec_options(p)
    _add_run_options(p, "keep the bins already fitted by an interrupted run")
    p.set_defaults(estimator="debiased", stderr="auto", bootstrap=0)
    _add_prep_options(p)

    p = sub.add_parser("dispersion", help="observed single-particle dispersion and diffusivity in a region")
    p.add_argument("input", help="CSV, Parquet or CF trajectory netCDF")
    p.add_argument("--region", help="LON0,LAT0,LON1,LAT1 (default: everywhere)")
    p.add_argument("--fits", help="fits table, for the model-based diffusivity of the same region")
    p.add_argument("--max-lag-days", type=float, default=25.0)
    p.add_argument("--plateau", default="10:20", metavar="FROM:TO", help="lags (days) of the plateau")
    p.add_argument("--bootstrap", type=int, default=200, help="bootstrap replicates over tracks")
    p.add_argument("--out", type=Path, help="kappa(tau) table (.csv)")
    p.add_argument("--png", type=Path, help="figure of kappa(tau) with the plateau")
    _add_prep_options(p)

    p = sub.add_parser("serve", help="open the dashboard in a browser (default: the bundled demo data)")
    p.add_argument("input", nargs="?", help="fixes to explore (default: demo data)")
    p.add_argument("--fits", help="fits table to map")
    p.add_argument("--port", type=_port, default=5006)
    p.add_argument("--address", default="127.0.0.1")
    p.add_argument("--show", action="store_true", help="open a browser window")
    p.add_argument("--allow-origin", action="append", default=[],
                   help="extra host:port allowed to open the page (for a shared screen over a network)")
    return parser


def cmd_demo(args):
    from driftspec.analysis.simulation.demo import write_demo

    info = write_demo(args.outdir, args.tracks, args.days, args.seed)
    print(f"wrote {info['n_fixes']} fixes of {info['n_tracks']} tracks to {info['fixes']}; "
          f"ground truth in {info['truth']}")
    return 0


#: the one-line message for an input with no data rows (its name, then what there is nothing to do)
_NO_ROWS = "driftspec: {}: no data rows (a header only), nothing to {}"


def cmd_qc(args):
    from driftspec.analysis.io import read_fixes, write_fixes
    from driftspec.analysis.tracks.qc import clean_fixes

    raw = read_fixes(args.input)
    if len(raw) == 0:
        raise SystemExit(_NO_ROWS.format(args.input, "check"))
    fixes, report = clean_fixes(raw, max_speed=args.max_speed, source=str(args.input))
    write_fixes(fixes, args.out, attrs={"history": f"driftspec qc {args.input}"})
    if args.report:
        tmp = args.report.with_name(args.report.name + ".tmp")
        tmp.write_text(json.dumps(report.to_dict(), indent=1, default=str))
        os.replace(tmp, args.report)
    print(report.summary())
    return 0


def fit_spec_from_args(args):
    """The :class:`~driftspec.analysis.fitting.spec.FitSpec` of a ``driftspec fit`` command line (a one-line
    ``SystemExit`` for invalid settings)."""
    from driftspec.analysis.fitting.spec import FitSpec

    models = tuple(m.strip() for m in args.model.split(",") if m.strip())
    noise = args.position_noise
    if noise not in ("auto", "fit", "input"):
        try:
            noise = float(noise)
        except ValueError:
            raise SystemExit(f"driftspec: --position-noise takes auto, fit, input or metres, got {noise!r}") from None
    try:
        return FitSpec(models=models, estimator=args.estimator,
                       band="auto" if args.max_freq is None else args.max_freq, velocity=args.velocity,
                       observation=args.observation or "auto", position_noise=noise,
                       inertial_frequency=args.inertial_frequency, taper=args.taper,
                       exclude=_exclusions(args.exclude), stderr=args.stderr, bootstrap=args.bootstrap,
                       anisotropic=getattr(args, "anisotropic", False))
    except ValueError as exc:
        raise SystemExit(f"driftspec: {exc}") from None


def _windowing(args) -> dict:
    """The window and preparation settings of ``driftspec fit``, checked (a one-line ``SystemExit`` if not)."""
    import pandas as pd

    if not args.window_days > 0:
        raise SystemExit(f"driftspec: --window-days must be positive, got {args.window_days:g}")
    if not 0 <= args.overlap < 1:
        raise SystemExit("driftspec: --overlap must be in [0, 1)")
    if not 0 < args.min_coverage <= 1:
        raise SystemExit(f"driftspec: --min-coverage must be in (0, 1], got {args.min_coverage:g}")
    for flag, text in (("--step", args.step), ("--split-gap", args.split_gap), ("--mask-distance", args.mask_distance)):
        if flag == "--mask-distance" and text == "auto":
            continue
        try:
            ok = pd.Timedelta(text) > pd.Timedelta(0)
        except ValueError:
            ok = False
        if not ok:
            raise SystemExit(f"driftspec: {flag} must be a positive duration such as 1h or 3D, got {text!r}")
    if args.window_days * 86400 < 2 * pd.Timedelta(args.step).total_seconds():
        raise SystemExit(f"driftspec: --window-days {args.window_days:g} is shorter than two grid steps ({args.step})")
    nyquist = 0.5 * 86400 / pd.Timedelta(args.step).total_seconds()
    if getattr(args, "max_freq", None) is not None and args.max_freq > nyquist * (1 + 1e-9):
        raise SystemExit(f"driftspec: --max-freq {args.max_freq:g} cpd is above the grid's Nyquist frequency "
                         f"({nyquist:g} cpd for --step {args.step})")
    from driftspec.analysis.regional.maps import file_digest

    # the input's content, by its digest (not its name: the same file moved still resumes; another file of the
    # same name does not); a missing input is reported by its reader
    digest = file_digest(args.input) if Path(args.input).is_file() else None
    return {"window_days": args.window_days, "overlap": args.overlap, "min_coverage": args.min_coverage,
            **_prep_options(args).to_dict(), "input_sha256": digest}


def _window_stream(args, reader, reports: list, census):
    """Windows of the input, read, cleaned, gridded and cut a few hundred tracks at a time (``fit`` and ``pool``);
    QC reports are appended to ``reports``, window counts go into ``census``."""
    from driftspec.analysis.tracks.pipeline import iter_velocity_batches
    from driftspec.analysis.tracks.qc import clean_fixes_in_batches
    from driftspec.analysis.tracks.windows import iter_windows

    prep = _prep_options(args)
    for raw in reader:
        for fixes, report in clean_fixes_in_batches(raw, max_speed=prep.max_speed, source=str(args.input)):
            reports.append(report)
            for vel in iter_velocity_batches(fixes, prep):
                yield from iter_windows(vel, args.window_days, args.overlap, args.min_coverage,
                                        use_measured=args.velocity == "measured", census=census)


def cmd_fit(args):
    from driftspec.analysis.fitting.batch import NoWindows, describe_choices, run_fits, summarise
    from driftspec.analysis.io import FixReader
    from driftspec.analysis.tracks.pipeline import estimate_windows
    from driftspec.analysis.tracks.qc import merge_reports
    from driftspec.analysis.tracks.windows import WindowCensus

    spec = fit_spec_from_args(args)
    windowing = _windowing(args)
    if args.workers < 1:
        raise SystemExit(f"driftspec: --workers must be at least 1, got {args.workers}")
    if args.chunk_size < 1:
        raise SystemExit(f"driftspec: --chunk-size must be at least 1, got {args.chunk_size}")
    out_dir = args.out.resolve().parent
    if not out_dir.is_dir() or not os.access(out_dir, os.W_OK):
        raise SystemExit(f"driftspec: cannot write {args.out}: {out_dir} is not a writable folder")
    reader = FixReader(args.input)  # track-contiguous Parquet: read a million rows at a time
    if reader.empty:  # before anything is written: an existing table at --out stays as it is
        raise SystemExit(_NO_ROWS.format(args.input, "fit"))
    total = estimate_windows(reader.spans(), args.window_days, args.overlap)
    reports = []
    census = WindowCensus()
    try:
        df = run_fits(_window_stream(args, reader, reports, census), args.out, spec, workers=args.workers,
                      dask_address=args.dask, resume=args.resume,
                      progress=not args.no_progress, total=total, chunk_size=args.chunk_size, windowing=windowing)
    except NoWindows as exc:  # why, with numbers, then one line; whatever was at --out stays
        print(merge_reports(reports, str(args.input)).summary(), file=sys.stderr)
        print(census.explain(args.min_coverage), file=sys.stderr)
        raise SystemExit(f"driftspec: {exc}") from None
    except ValueError as exc:
        if args.debug:
            raise
        raise SystemExit(f"driftspec: {exc}") from None
    print(merge_reports(reports, str(args.input)).summary(), file=sys.stderr)
    print(summarise(df))
    if choices := describe_choices(df):
        print(choices)
    if len(df) == 0 or census.kept < census.candidates or census.short_segments:
        print(census.explain(args.min_coverage), file=sys.stderr)  # windows not fitted are accounted for
    print(f"wrote {args.out}")
    return 0


def cmd_map(args):
    from driftspec.analysis.regional import grid_fits_file

    ds = grid_fits_file(args.fits, params=args.param, bin_deg=args.bin_deg, stat=args.stat, out=args.out,
                        command=" ".join(["driftspec", *sys.argv[1:]]))
    if args.png:
        from driftspec.app.figures import quicklook_map

        quicklook_map(ds, args.png)
    shown = (v for v in ds.data_vars if not v.endswith(("_count", "_spread", "_concentration")))
    print(f"wrote {args.out} ({', '.join(shown)})")
    return 0


def cmd_pool(args):
    from driftspec.analysis.fitting.batch import NoWindows
    from driftspec.analysis.io import FixReader
    from driftspec.analysis.regional.maps import file_digest
    from driftspec.analysis.regional.pooled import pool_map
    from driftspec.analysis.tracks.qc import merge_reports
    from driftspec.analysis.tracks.windows import WindowCensus
    from driftspec.analysis.wording import counted

    spec = fit_spec_from_args(args)
    windowing = _windowing(args)
    if not args.bin_deg > 0:
        raise SystemExit(f"driftspec: --bin-deg must be positive, got {args.bin_deg:g}")
    if args.workers < 1:
        raise SystemExit(f"driftspec: --workers must be at least 1, got {args.workers}")
    if args.min_windows < 1:
        raise SystemExit(f"driftspec: --min-windows must be at least 1, got {args.min_windows}")
    if args.out.suffix.lower() != ".nc":
        raise SystemExit(f"driftspec: --out must be a netCDF file (.nc), got {args.out}")
    region = _floats(args.region, 4, "--region") if args.region else None
    reader = FixReader(args.input)
    if reader.empty:
        raise SystemExit(_NO_ROWS.format(args.input, "pool"))
    reports, census = [], WindowCensus()

    path = Path(args.input)
    source = f"{path.name} (sha256 {file_digest(path)})" if path.is_file() else str(args.input)
    try:
        ds = pool_map(_window_stream(args, reader, reports, census), spec, bin_deg=args.bin_deg, region=region,
                      out=args.out, share=args.share,
                      min_windows=args.min_windows, workers=args.workers, dask_address=args.dask,
                      resume=args.resume, progress=not args.no_progress, windowing=windowing, source=source,
                      command=" ".join(["driftspec", *sys.argv[1:]]))
    except NoWindows as exc:  # why, with numbers, then one line; whatever was at --out stays
        print(merge_reports(reports, str(args.input)).summary(), file=sys.stderr)
        print(census.explain(args.min_coverage), file=sys.stderr)
        raise SystemExit(f"driftspec: {exc}") from None
    except ValueError as exc:
        if args.debug:
            raise
        raise SystemExit(f"driftspec: {exc}") from None
    print(merge_reports(reports, str(args.input)).summary(), file=sys.stderr)
    n_windows = int(ds["n_windows"].sum())
    if n_windows == 0:
        print(census.explain(args.min_coverage), file=sys.stderr)
    print(f"pooled fits in {ds.attrs['pooled_cells']} of {counted(int((ds['n_windows'] > 0).sum()), 'cell')} "
          f"({counted(n_windows, 'window')}); wrote {args.out}")
    return 0


def _floats(text, n, what):
    try:
        vals = [float(x) for x in text.replace(":", ",").split(",")]
    except ValueError:
        vals = []
    if len(vals) != n:
        raise SystemExit(f"driftspec: {what} expects {n} numbers, got {text!r}")
    return vals


def cmd_dispersion(args):
    from driftspec.analysis.io.tables import read_table
    from driftspec.analysis.regional.dispersion import model_diffusivity, single_particle_dispersion
    from driftspec.analysis.tracks.pipeline import load_velocities

    region = _floats(args.region, 4, "--region") if args.region else None
    plateau = tuple(_floats(args.plateau, 2, "--plateau"))
    vel, report, _ = load_velocities(args.input, _prep_options(args))
    try:
        res = single_particle_dispersion(vel, region, args.max_lag_days, plateau_lags=plateau,
                                         n_boot=args.bootstrap)
    except ValueError as exc:
        raise SystemExit(f"driftspec: {exc}") from exc
    model_k = None
    line = (f"observed plateau ({plateau[0]:g}-{plateau[1]:g} days): {res.plateau:.0f} m2/s "
            f"[{res.plateau_lower:.0f}, {res.plateau_upper:.0f}] from {res.n_tracks} track segments")
    if args.fits:
        model_k, n = model_diffusivity(read_table(args.fits), region)
        line += f"; model-based (median of {n} ok fits): {model_k:.0f} m2/s"
    print(line)
    if note := res.plateau_note():
        print(note)
    if args.out:
        res.to_frame().to_csv(args.out, index=False)
    if args.png:
        from driftspec.app.figures import dispersion_figure

        dispersion_figure(res, args.png, model_k)
    return 0


def cmd_serve(args):
    from driftspec.app.server import serve

    return serve(args.input, fits=args.fits, port=args.port, address=args.address, show=args.show,
                 extra_origins=args.allow_origin)


COMMANDS = {"demo": cmd_demo, "qc": cmd_qc, "fit": cmd_fit, "map": cmd_map, "pool": cmd_pool,
            "dispersion": cmd_dispersion, "serve": cmd_serve}


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 0
    from driftspec.analysis.errors import InputError

    try:
        return COMMANDS[args.command](args) or 0
    except InputError as exc:
        if args.debug:
            raise
        print(f"driftspec: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except SystemExit as exc:
        if isinstance(exc.code, str):
            print(exc.code, file=sys.stderr)
            return EXIT_BAD_INPUT
        raise
    except KeyboardInterrupt:
        print("driftspec: interrupted; rerun with --resume to continue", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
