"""The ``cabletree`` command line.

Subcommands
-----------
``cabletree run SCENARIO --out DIR``
    Run a scenario file; write ``results.nc``, feature tables (CSV, units in the
    headers) and figures into DIR.
``cabletree check FILE``
    Check an SWC morphology or a scenario file (by suffix: ``.toml`` is a scenario);
    print what is wrong (line or key path) or a summary of the cell.
``cabletree plot RESULTS.nc --out DIR``
    Draw the figures again from a saved result (its stored scenario text says which).

Exit codes: 0 success, 1 invalid input or other user error (a message, no
traceback), 2 wrong usage (argparse), 3 numerical failure of a run.

Each subcommand is registered by a small ``_add_<name>(subparsers)`` function that
sets ``func``; :data:`SUBCOMMANDS` lists them, so another subcommand is one more
function in that tuple.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path
from typing import Sequence

from .errors import CableTreeError, NumericalInstabilityError, SolverError
from .sweep import register_sweep

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_INVALID", "EXIT_USAGE", "EXIT_NUMERICAL"]

EXIT_OK = 0
EXIT_INVALID = 1
EXIT_USAGE = 2
EXIT_NUMERICAL = 3


def _say(message: str) -> None:
    print(message, flush=True)


def _progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def _run_progress(min_interval_s: float = 2.0):
    """A ``progress(fraction, time_ms)`` callback printing at most every ``min_interval_s``."""
    start = time.perf_counter()
    last = [start]
    clock = [start]  # when stepping began

    def report(fraction: float, time_ms: float) -> None:
        now = time.perf_counter()
        if fraction == 0.0:  # the backend is ready: time left is timed from here
            if now - start > 1.0:
                _progress(f"  ready after {now - start:.1f} s (a new channel set's kernel is "
                          "compiled once, then cached)")
            last[0] = now
            clock[0] = now
            return
        if now - last[0] < min_interval_s and fraction < 1.0:
            return
        last[0] = now
        elapsed = now - start
        stepping = now - clock[0]
        left = stepping * (1.0 - fraction) / fraction
        _progress(f"  {100 * fraction:5.1f} %  t = {time_ms:.1f} ms  "
                  f"({elapsed:.1f} s elapsed, about {left:.1f} s left)")

    return report


# --------------------------------------------------------------------------------------------
# run
# --------------------------------------------------------------------------------------------

def _cmd_run(args) -> int:
    from . import report
    from .results import save_dataset
    from .scenario import load_scenario, run_scenario, with_overrides

    scenario = load_scenario(args.scenario)
    if args.threads is not None:
        scenario = with_overrides(scenario, {"run.threads": args.threads})
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    analysis = scenario.analysis_spec
    t0 = time.perf_counter()
    if "threshold" in analysis:
        from .threshold import scenario_threshold

        th = analysis["threshold"]
        _progress(f"searching the threshold of {', '.join(th['keys'])} in "
                  f"[{th['low']:g}, {th['high']:g}] ...")
        result, ds = scenario_threshold(scenario, th["keys"], th["low"], th["high"],
                                        th["tolerance"], analysis["dendritic_spike"],
                                        th.get("factors"), th.get("max_runs", 20), args.backend,
                                        progress=_progress)
        ds.attrs["threshold"] = float(result.threshold)
        ds.attrs["threshold_keys"] = ", ".join(th["keys"])
        _write_threshold_table(result, th["keys"], out / "threshold.csv")
        _say(f"threshold: {result.threshold:.4g} (bracket [{result.low:.4g}, "
             f"{result.high:.4g}], {result.n_runs} runs) -> {out / 'threshold.csv'}")
    else:
        _progress(f"running {args.scenario} (run.t_stop_ms = "
                  f"{scenario.data['run']['t_stop_ms']:g} ms) ...")
        ds = run_scenario(scenario, backend=args.backend, progress=_run_progress())
    _progress(f"simulated in {time.perf_counter() - t0:.1f} s")
    save_dataset(ds, out / "results.nc")
    _say(f"results: {out / 'results.nc'}")
    features = report.compute_features(ds, analysis)
    for path in report.write_feature_tables(features, out):
        _say(f"table:   {path}")
    for path in report.draw_figures(ds, features, analysis, out, args.format):
        _say(f"figure:  {path}")
    return EXIT_OK


def _write_threshold_table(result, keys, path: Path) -> None:
    from .fileio import write_atomically

    rows = ["tested_value,criterion_met"] + [f"{x!r},{int(ok)}" for x, ok in result.history]
    rows.append(f"# threshold = {result.threshold!r} (keys: {' '.join(keys)})")
    write_atomically(path, lambda tmp: tmp.write_text("\n".join(rows) + "\n", encoding="utf-8"))


def _add_run(sub) -> None:
    p = sub.add_parser("run", help="run a scenario file and write results, tables and figures",
                       description="Run a scenario (TOML) and write results.nc, feature tables "
                                   "(CSV) and figures into --out.")
    p.add_argument("scenario", help="scenario file (.toml)")
    p.add_argument("--out", required=True, help="output folder (created if needed)")
    p.add_argument("--format", action="append", choices=("png", "svg", "pdf"),
                   help="figure format (repeat for several; default from the scenario, else png)")
    p.add_argument("--backend", default="auto", choices=("auto", "reference", "compiled"),
                   help="solver backend (default: auto = the scenario's run.backend)")
    p.add_argument("--threads", type=int, default=None, metavar="N",
                   help="threads for the compiled backend, each updating and solving its part "
                        "of the tree, used where they pay off (default: the scenario's "
                        "run.threads, else 1)")
    p.set_defaults(func=_cmd_run)


# --------------------------------------------------------------------------------------------
# check
# --------------------------------------------------------------------------------------------

def _cmd_check(args) -> int:
    path = args.file
    if str(path).lower().endswith(".toml"):
        from .scenario import build_cell_model, load_scenario

        scenario = load_scenario(path)
        cell, settings = build_cell_model(scenario)
        _say(f"{path}: valid scenario")
        _say(_cell_report(cell, settings))
        return EXIT_OK
    import warnings

    from .errors import MorphologyError
    from .morphology import Repairs, format_summary, read_swc, summarize

    repairs = Repairs(min_radius_um=args.min_radius_um, soma_radius_um=args.soma_radius_um,
                      infer_soma_radius=args.infer_soma_radius,
                      merge_zero_length=args.merge_zero_length,
                      radius_is_diameter=args.radius_is_diameter)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            morph = read_swc(path, repairs=repairs)
        except MorphologyError as exc:
            if "Repairs(" not in str(exc):
                raise
            raise MorphologyError(
                f"{exc}\n(here: the check options --soma-radius-um, --infer-soma-radius, "
                "--min-radius-um, --merge-zero-length, --radius-is-diameter; in a scenario "
                "file: a [morphology.repairs] table with the same names, e.g. "
                "soma_radius_um = 10.0)") from None
    _say(f"{path}: valid SWC morphology")
    _say(format_summary(summarize(morph)))
    for w in caught:
        _say(f"warning: {w.message}")
    return EXIT_OK


def _cell_report(cell, settings) -> str:
    import numpy as np

    g = cell.grid
    lines = [f"morphology: {g.source}",
             f"compartments: {g.n_compartments} on {g.n_branches} branches, max path distance "
             f"{g.path_distance_um.max():.1f} µm, membrane area {g.area_um2.sum():.0f} µm²",
             f"temperature: {cell.celsius:g} °C; run {settings.t_stop_ms:g} ms, dt "
             f"{settings.dt_ms:g} ms, {settings.method}"]
    for b in cell.channels:
        gm = b.gmax_S_per_cm2
        lines.append(f"channel {b.channel.name}: {b.index.size} compartments, gmax "
                     f"{gm.min():.4g}-{gm.max():.4g} S/cm²")
    for inj in cell.injections:
        lines.append(f"current injection at {inj.site.name}: {type(inj.waveform).__name__}")
    for grp in cell.synapses:
        lines.append(f"synapses {grp.kinetics.name}: {grp.compartment.size} synapses, "
                     f"{grp.event_times_ms.size} events, weight {np.max(grp.weight_nS):g} nS")
    lines.append("recording sites: " + ", ".join(
        f"{s.name} ({g.path_distance_um[s.compartment]:.0f} µm)" for s in cell.recording_sites))
    return "\n".join(lines)


def _add_check(sub) -> None:
    p = sub.add_parser("check", help="check an SWC morphology or a scenario file",
                       description="Check an SWC file or a scenario (.toml) and print a report; "
                                   "exit status 1 when the file is invalid.")
    p.add_argument("file", help="SWC file or scenario file (.toml)")
    rep = p.add_argument_group("repairs of an SWC file (off unless given; each is reported)")
    rep.add_argument("--soma-radius-um", type=float, default=None, metavar="R",
                     help="use this soma radius, µm (e.g. for a zero-radius single-point soma)")
    rep.add_argument("--infer-soma-radius", action="store_true",
                     help="infer a missing soma radius from the stems (capped)")
    rep.add_argument("--min-radius-um", type=float, default=None, metavar="R",
                     help="raise every neurite radius below R to R, µm")
    rep.add_argument("--merge-zero-length", action="store_true",
                     help="merge samples that coincide with their parent")
    rep.add_argument("--radius-is-diameter", action="store_true",
                     help="the radius column holds diameters: halve it")
    p.set_defaults(func=_cmd_check)


# --------------------------------------------------------------------------------------------
# plot
# --------------------------------------------------------------------------------------------

def _cmd_plot(args) -> int:
    from . import report
    from .results import load_dataset

    try:
        import tomllib as toml
    except ModuleNotFoundError:  # pragma: no cover
        import tomli as toml
    ds = load_dataset(args.results)
    text = str(ds.attrs.get("scenario", ""))
    analysis = toml.loads(text).get("analysis", {}) if text else {}
    features = report.compute_features(ds, analysis)
    out = Path(args.out)
    for path in report.draw_figures(ds, features, analysis, out, args.format):
        _say(f"figure:  {path}")
    return EXIT_OK


def _add_plot(sub) -> None:
    p = sub.add_parser("plot", help="draw the figures again from a saved results file",
                       description="Draw the figures of a saved result (results.nc) again.")
    p.add_argument("results", help="results file written by 'cabletree run'")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--format", action="append", choices=("png", "svg", "pdf"),
                   help="figure format (repeat for several; default png)")
    p.set_defaults(func=_cmd_plot)


#: Subcommand registration functions, in help order.  Add a subcommand by adding a
#: function ``_add_<name>(subparsers)`` that calls ``set_defaults(func=...)``.
SUBCOMMANDS = [_add_run, _add_check, _add_plot, register_sweep]


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand."""
    from .results import package_version

    parser = argparse.ArgumentParser(
        prog="cabletree",
        description="Multi-compartment dendritic simulations driven by scenario files.",
        epilog="Exit status: 0 ok, 1 invalid input, 2 usage error, 3 numerical failure.")
    parser.add_argument("--version", action="version", version=f"cabletree {package_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for add in SUBCOMMANDS:
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments (default ``sys.argv[1:]``).

    Returns
    -------
    int
        0 ok, 1 invalid input, 2 usage (argparse exits itself), 3 numerical failure.
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    try:
        return int(args.func(args))
    except NumericalInstabilityError as exc:
        print(f"cabletree: numerical failure: {exc}", file=sys.stderr)
        return EXIT_NUMERICAL
    except SolverError as exc:
        print(f"cabletree: {exc}", file=sys.stderr)
        return EXIT_INVALID
    except CableTreeError as exc:
        print(f"cabletree: error: {exc}", file=sys.stderr)
        return EXIT_INVALID
    except OSError as exc:
        print(f"cabletree: error: {exc}", file=sys.stderr)
        return EXIT_INVALID
    except KeyboardInterrupt:
        print("cabletree: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
