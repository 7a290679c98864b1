"""Sweeps: many scenarios, one labelled Dataset.

A sweep varies scenario values addressed by dotted key paths (``run.seed``,
``channels.ka_gradient.gmax.slope_per_um``, ``morphology.file``) and returns one
:class:`xarray.Dataset` with one dimension per swept value.  The stages are small and
separate:

1. :func:`parse_sweep_spec` validates the scenario's ``[sweep]`` table into a
   :class:`SweepSpec`; :func:`override_spec` applies command-line grids, zips and repeats.
2. :func:`expand_runs` turns (scenario, spec) into :class:`Run` objects, a pure function:
   each run has its parameters, its effective scenario, a seed derived from the sweep seed
   and the parameters, and the hash of the full effective scenario text.
3. An engine executes the pending runs: in this process (``"serial"``), on local worker
   processes (``"processes"``, :class:`concurrent.futures.ProcessPoolExecutor`, the
   default) or on an existing Dask cluster (``"dask"``, :class:`dask.distributed.Client`).
   Workers receive the scenario as plain data (not solver state) and return a small
   Dataset (:func:`reduce_run`) or an error record.
4. The store keeps one NetCDF file per finished run (``<out>/runs/<hash>.nc``, written
   atomically) and one JSON record per failed run (``<out>/runs/<hash>.error.json``); a
   restarted sweep skips runs whose file exists, and a changed scenario changes only the
   hashes of the runs it changes.
5. :func:`combine_runs` builds the swept Dataset (failed runs as NaN, with ``run_status``
   and ``error``), written to ``<out>/sweep.nc``; :func:`feature_tables` writes one CSV per
   feature kind with the swept values as columns.

The ``[sweep]`` table::

    [sweep]
    seed = 7                       # sweep seed (default: run.seed of the scenario, else 0)
    repeats = 3                    # repeats with different derived seeds (default 1)
    morphologies = ["a.swc", "b.swc"]   # swept as the key "morphology.file"
    traces = true                  # keep v over time x site in the result (default true)
    [sweep.grid]                   # cartesian product
    "channels.ka_gradient.gmax.slope_per_um" = [0.0, 0.01]
    [sweep.zip]                    # values taken together, one dimension "zip"
    "inputs.step.amplitude_nA" = [0.5, 1.0]
    "inputs.step.duration_ms" = [2.0, 1.0]

Every run also computes the features its ``[analysis]`` table asks for
(:func:`cabletree.report.compute_features`); they appear as ``<kind>_<feature>``
(``bap_amplitude_mV``) over the swept dimensions and ``site``.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import hashlib
import itertools
import json
import math
import multiprocessing
import os
import re
import sys
import threading
import time
import traceback
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping, Sequence

import numpy as np
import xarray as xr

from . import analysis
from .fileio import remove_stale_temporaries, write_atomically
from .errors import CableTreeError, ScenarioError, SweepError
from .results import load_dataset, package_version, save_dataset

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = [
    "Axis", "SweepSpec", "Run", "RunTask", "RunOutcome", "SweepReport", "DryRunEstimate",
    "ENGINES", "EXIT_RUNS_FAILED",
    "key_units", "parse_sweep_spec", "parse_assignment", "override_spec", "expand_runs",
    "derive_seed", "scenario_hash", "reduce_run", "execute_task", "pending_runs",
    "combine_runs", "feature_tables", "run_sweep", "dry_run", "plot_sweep_feature",
    "register_sweep", "main_sweep", "main",
]

#: Exit code of ``cabletree sweep`` when some runs failed.
EXIT_RUNS_FAILED = 4

#: Engines that execute the runs of a sweep.
ENGINES = ("serial", "processes", "dask")

_SPEC_KEYS = ("grid", "zip", "repeats", "seed", "morphologies", "traces")
_MORPHOLOGY_KEY = "morphology.file"
_RESERVED_DIMS = ("time", "site", "compartment", "zip", "repeat")

# Unit symbols that may end a key name ("_ms", "_S_per_cm2", "_per_um"); an optional power digit.
_UNIT_SYMBOL = re.compile(r"^(um|mm|cm|ms|mV|V|nA|pA|uA|nS|uS|pS|mS|S|nF|pF|uF|Hz|ohm|MOhm|mM|degC)(\d?)$")
_DIMENSIONLESS_NAMES = ("fraction", "ratio", "factor", "q10", "seed", "count", "repeats")
# Fields of a profile table that carry the profiled quantity's own units (see cabletree.profiles).
_PROFILE_VALUE_NAMES = ("value", "value_at_zero", "baseline", "low", "high", "below", "above",
                        "floor", "ceiling", "values")


# --------------------------------------------------------------------------------------------
# Sweep specification
# --------------------------------------------------------------------------------------------

def _suffix_units(name: str) -> str | None:
    """CF units spelt by the tail of a name (``amplitude_nA`` -> ``nA``, ``g_S_per_cm2`` ->
    ``S cm-2``, ``slope_per_um`` -> ``um-1``), None if it spells none."""
    tokens = name.split("_")
    n = 0
    while n < len(tokens) - 1 and (tokens[-1 - n] == "per" or _UNIT_SYMBOL.match(tokens[-1 - n])):
        n += 1
    suffix = tokens[len(tokens) - n:]
    if not suffix or suffix[-1] == "per":
        return None
    parts, sign = [], 1
    for token in suffix:
        if token == "per":
            sign = -1
            continue
        symbol, power = _UNIT_SYMBOL.match(token).groups()
        p = sign * int(power or 1)
        parts.append(symbol + ("" if p == 1 else str(p)))
    return " ".join(parts)


def key_units(key: str) -> str | None:
    """Units of a swept value, from its key path.

    The last component's suffix gives the units (``run.t_stop_ms`` -> ``ms``,
    ``inputs.step.amplitude_nA`` -> ``nA``).  Fields of a profile table take the units of the
    profiled quantity (``gmax`` is S/cm² in scenarios, or a parent name with a unit suffix):
    ``channels.ka.gmax.value_at_zero`` -> ``S cm-2``, ``channels.ka.gmax.slope_per_um`` ->
    ``S cm-2 um-1``.

    Parameters
    ----------
    key : str
        Dotted key path.

    Returns
    -------
    str or None
        CF-style units, ``"1"`` for names that say they are dimensionless (``..._fraction``,
        ``..._ratio``, ``seed``), None if unknown.
    """
    parts = key.split(".")
    leaf = parts[-1]
    if leaf == "gmax":
        return "S cm-2"
    base = None
    for part in parts[:-1]:
        base = "S cm-2" if part == "gmax" else (_suffix_units(part) or base)
    if base is not None and leaf in _PROFILE_VALUE_NAMES:
        return base
    if base is not None and leaf.endswith("_per_um") and _suffix_units(leaf[:-7]) is None:
        return f"{base} um-1"
    own = _suffix_units(leaf)
    if own is not None:
        return own
    if leaf.split("_")[-1].lower() in _DIMENSIONLESS_NAMES:
        return "1"
    return None


@dataclass(frozen=True)
class Axis:
    """One dimension of a sweep.

    Attributes
    ----------
    dim : str
        Dimension name in the combined Dataset.
    keys : tuple of str
        Key paths set along this dimension (one for a grid axis, several for a zip).
    points : tuple of tuple
        For each index along the dimension, the values of ``keys`` (same order).
    """

    dim: str
    keys: tuple[str, ...]
    points: tuple[tuple[Any, ...], ...]

    @property
    def size(self) -> int:
        """Number of values along the axis."""
        return len(self.points)


@dataclass(frozen=True)
class SweepSpec:
    """A validated sweep.

    Attributes
    ----------
    grid : tuple of (key, values)
        Cartesian product axes, in order (morphologies first, as ``morphology.file``).
    zip : tuple of (key, values)
        Values taken together along one dimension ``zip`` (all lists equally long).
    repeats : int
        Repeats of every combination with different derived seeds (dimension ``repeat`` if > 1).
    seed : int
        Sweep seed from which every run's seed is derived.
    traces : bool
        Keep ``v`` over time and site in the results (else features only).
    """

    grid: tuple[tuple[str, tuple[Any, ...]], ...] = ()
    zip: tuple[tuple[str, tuple[Any, ...]], ...] = ()
    repeats: int = 1
    seed: int = 0
    traces: bool = True

    def axes(self) -> tuple[Axis, ...]:
        """The dimensions of the sweep, in order: grid keys, ``zip``, ``repeat``."""
        keys = [k for k, _ in self.grid] + [k for k, _ in self.zip]
        names = _short_names(keys)
        out = [Axis(names[k], (k,), tuple((v,) for v in vals)) for k, vals in self.grid]
        if self.zip:
            zkeys = tuple(k for k, _ in self.zip)
            out.append(Axis("zip", zkeys, tuple(zip(*(vals for _, vals in self.zip)))))
        if self.repeats > 1:
            out.append(Axis("repeat", (), tuple(() for _ in range(self.repeats))))
        return tuple(out)

    def short_names(self) -> dict[str, str]:
        """Coordinate name of every swept key in the combined Dataset."""
        return _short_names([k for k, _ in self.grid] + [k for k, _ in self.zip])

    def n_runs(self) -> int:
        """Number of runs of the sweep."""
        return int(np.prod([a.size for a in self.axes()], dtype=np.int64))


def _short_names(keys: Sequence[str]) -> dict[str, str]:
    """Shortest unique trailing part of each dotted key, joined by "_" (a dot in a variable
    name means an attribute to xarray): ``channels.ka.gmax.slope_per_um`` -> ``slope_per_um``,
    or ``ka_gmax_slope_per_um`` if another key also ends in ``slope_per_um``;
    ``morphology.file`` -> ``morphology``."""
    parts = {k: (["morphology"] if k == _MORPHOLOGY_KEY else k.split(".")) for k in keys}
    out: dict[str, str] = {}
    for k, p in parts.items():
        for n in range(1, len(p) + 1):
            name = "_".join(p[-n:])
            clash = any("_".join(q[-n:]) == name for j, q in parts.items() if j != k)
            if not clash and name not in _RESERVED_DIMS:
                break
        out[k] = name if name not in _RESERVED_DIMS else "_".join(p)
    return out


def _scalar(value: Any, where: str) -> Any:
    if isinstance(value, bool) or isinstance(value, (int, float, str)):
        return value
    raise ScenarioError(f"{where}: swept values must be numbers, booleans or strings, "
                        f"got {value!r}")


def _value_list(values: Any, where: str) -> tuple[Any, ...]:
    if not isinstance(values, (list, tuple)) or not values:
        raise ScenarioError(f"{where}: expected a non-empty list of values, got {values!r}")
    out = tuple(_scalar(v, where) for v in values)
    if len(set(map(repr, out))) != len(out):
        raise ScenarioError(f"{where}: values must be distinct, got {list(values)!r}")
    return out


def _key_table(table: Any, where: str) -> tuple[tuple[str, tuple[Any, ...]], ...]:
    if not isinstance(table, Mapping):
        raise ScenarioError(f"{where}: expected a table of key path = [values], got {table!r}")
    out = []
    for key, values in table.items():
        if not isinstance(key, str) or not key or any(not p for p in key.split(".")):
            raise ScenarioError(f"{where}: bad key path {key!r}; expected e.g. 'run.seed'")
        out.append((key, _value_list(values, f"{where}.{key}")))
    return tuple(out)


def _whole(value: Any, where: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ScenarioError(f"{where}: expected a whole number >= {minimum}, got {value!r}")
    return int(value)


def parse_sweep_spec(raw: Mapping[str, Any] | None, *, default_seed: int = 0,
                     where: str = "[sweep]") -> SweepSpec:
    """Validate a ``[sweep]`` table (see the module docstring for its keys).

    Parameters
    ----------
    raw : mapping or None
        The raw table (None or empty: a sweep of one run).
    default_seed : int
        Sweep seed when the table gives none (the scenario's ``run.seed``).
    where : str
        Location for error messages (file and table).

    Returns
    -------
    SweepSpec

    Raises
    ------
    ScenarioError
        On unknown keys, empty or mismatched value lists, bad repeats/seed, or a key swept
        twice.
    """
    raw = dict(raw or {})
    unknown = sorted(set(raw) - set(_SPEC_KEYS))
    if unknown:
        raise ScenarioError(f"{where}: unknown key(s) {unknown}; expected some of {list(_SPEC_KEYS)}")
    grid = _key_table(raw.get("grid", {}), f"{where}.grid")
    zipped = _key_table(raw.get("zip", {}), f"{where}.zip")
    if "morphologies" in raw:
        files = _value_list(raw["morphologies"], f"{where}.morphologies")
        if not all(isinstance(f, str) for f in files):
            raise ScenarioError(f"{where}.morphologies: expected a list of file names, got {files!r}")
        grid = ((_MORPHOLOGY_KEY, files),) + grid
    lengths = {k: len(v) for k, v in zipped}
    if len(set(lengths.values())) > 1:
        raise ScenarioError(f"{where}.zip: all lists must have the same length, got {lengths}")
    keys = [k for k, _ in grid] + [k for k, _ in zipped]
    twice = sorted({k for k in keys if keys.count(k) > 1})
    if twice:
        raise ScenarioError(f"{where}: key(s) {twice} swept more than once (grid, zip, morphologies)")
    repeats = _whole(raw.get("repeats", 1), f"{where}.repeats", 1)
    seed = _whole(raw.get("seed", default_seed), f"{where}.seed", 0)
    traces = raw.get("traces", True)
    if not isinstance(traces, bool):
        raise ScenarioError(f"{where}.traces: expected true or false, got {traces!r}")
    return SweepSpec(grid=grid, zip=zipped, repeats=repeats, seed=seed, traces=traces)


def _split_values(text: str) -> list[str]:
    """Split on commas outside brackets and quotes."""
    out, depth, quote, start = [], 0, "", 0
    for i, ch in enumerate(text):
        if quote:
            quote = "" if ch == quote else quote
        elif ch in "\"'":
            quote = ch
        elif ch in "[{":
            depth += 1
        elif ch in "]}":
            depth -= 1
        elif ch == "," and depth == 0:
            out.append(text[start:i])
            start = i + 1
    out.append(text[start:])
    return [p.strip() for p in out]


def _parse_value(text: str) -> Any:
    """A TOML literal (number, boolean, quoted string) or else the text itself as a string."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_assignment(text: str) -> tuple[str, tuple[Any, ...]]:
    """Parse a command-line ``KEY=V1,V2,...`` into a key path and its values.

    Values are read as TOML literals (``0.5``, ``3``, ``true``, ``"x"``); anything else is a
    string (so file names need no quotes).

    Raises
    ------
    ScenarioError
        If there is no ``=``, the key is empty or a value is empty.
    """
    key, sep, values = text.partition("=")
    key = key.strip()
    if not sep or not key:
        raise ScenarioError(f"command line: expected KEY=V1,V2,... got {text!r}")
    parts = _split_values(values)
    if any(not p for p in parts):
        raise ScenarioError(f"command line: empty value in {text!r}")
    return key, _value_list([_parse_value(p) for p in parts], f"command line {key}")


def override_spec(spec: SweepSpec, *, grid: Sequence[str] = (), zip: Sequence[str] = (),
                  repeats: int | None = None) -> SweepSpec:
    """Apply command-line sweep values to a spec.

    A key given on the command line replaces the same key wherever the scenario swept it
    (grid, zip or morphologies) and is added otherwise; ``--zip`` keys given on the command
    line replace the scenario's whole zip group.

    Parameters
    ----------
    spec : SweepSpec
    grid, zip : sequence of str
        ``KEY=V1,V2,...`` assignments (see :func:`parse_assignment`).
    repeats : int, optional

    Returns
    -------
    SweepSpec
    """
    g = [parse_assignment(a) for a in grid]
    z = [parse_assignment(a) for a in zip]
    given = {k for k, _ in g + z}
    new_grid = tuple((k, v) for k, v in spec.grid if k not in given) + tuple(g)
    new_zip = tuple(z) if z else tuple((k, v) for k, v in spec.zip if k not in given)
    raw = {"grid": dict(new_grid), "zip": dict(new_zip),
           "repeats": spec.repeats if repeats is None else repeats, "seed": spec.seed,
           "traces": spec.traces}
    out = parse_sweep_spec(raw, where="command line")
    return replace(out, grid=new_grid)


# --------------------------------------------------------------------------------------------
# Expansion into runs
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Run:
    """One run of a sweep.

    Attributes
    ----------
    index : tuple of int
        Position along each axis of the sweep.
    parameters : dict
        Swept key path -> value (plus ``repeat`` when repeats > 1).
    scenario : Scenario or None
        The effective scenario (base with the overrides and the derived seed); None when the
        combination is not a valid scenario.
    seed : int
        Derived seed, set as ``run.seed``.
    run_hash : str
        Hash of the full effective scenario text (:func:`scenario_hash`); for an invalid
        combination, of the base text and the overrides.
    invalid : dict or None
        Error record (``error_type``, ``message``) of an invalid combination.
    """

    index: tuple[int, ...]
    parameters: dict
    scenario: Any
    seed: int
    run_hash: str
    invalid: dict | None = None


def derive_seed(sweep_seed: int, parameters: Mapping[str, Any]) -> int:
    """Seed of one run from the sweep seed and the run's parameters (SHA-256 based).

    Returns
    -------
    int
        In ``[0, 2**31 - 1)``; the same parameters give the same seed in any order.
    """
    text = json.dumps({"seed": int(sweep_seed), "parameters": dict(sorted(parameters.items()))},
                      sort_keys=True, default=str)
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "big") % (2**31 - 1)


def scenario_hash(text: str) -> str:
    """Hex SHA-256 (first 20 characters) of a scenario's full text."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:20]


def _base_scenario(scenario):
    """The scenario without its [sweep] table (so sweep edits do not change run hashes)."""
    from .scenario import scenario_from_dict
    data = {k: v for k, v in scenario.data.items() if k != "sweep"}
    return scenario_from_dict(data, scenario.base_dir, scenario.source_path)


def expand_runs(scenario, spec: SweepSpec) -> tuple[Run, ...]:
    """All runs of a sweep, in C order over :meth:`SweepSpec.axes`.

    Parameters
    ----------
    scenario : cabletree.scenario.Scenario
        The base scenario (its ``[sweep]`` table is ignored here).
    spec : SweepSpec

    Returns
    -------
    tuple of Run
        A combination that is not a valid scenario (say a block fraction above 1) gives a
        run with ``scenario=None`` and the validation error in ``invalid``; the other runs
        are unaffected.
    """
    from .scenario import dump_scenario, with_overrides
    base = _base_scenario(scenario)
    base_text = dump_scenario(base)
    axes = spec.axes()
    runs = []
    for index in itertools.product(*(range(a.size) for a in axes)):
        params: dict[str, Any] = {}
        for axis, i in zip(axes, index):
            if axis.dim == "repeat":
                params["repeat"] = i
            params.update(zip(axis.keys, axis.points[i]))
        seed = derive_seed(spec.seed, params)
        overrides = {k: v for k, v in params.items() if k != "repeat"}
        overrides["run.seed"] = seed
        try:
            effective = with_overrides(base, overrides)
        except CableTreeError as exc:
            key = base_text + json.dumps(overrides, sort_keys=True, default=str)
            runs.append(Run(tuple(index), params, None, seed, scenario_hash(key),
                            _error_record(exc)))
            continue
        runs.append(Run(tuple(index), params, effective, seed,
                        scenario_hash(dump_scenario(effective))))
    return tuple(runs)


# --------------------------------------------------------------------------------------------
# Executing one run (runs in a worker)
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class RunTask:
    """What a worker needs to execute one run: plain data, no solver state.

    Attributes
    ----------
    run_hash : str
    data : dict
        The effective scenario as plain TOML data.
    base_dir, source : str or None
        Where relative paths of the scenario are resolved, and its source file.
    parameters : dict
    seed : int
    traces : bool
    backend : str
        Solver backend.
    """

    run_hash: str
    data: dict
    base_dir: Any
    source: Any
    parameters: dict
    seed: int
    traces: bool = True
    backend: str = "auto"


@dataclass(frozen=True)
class RunOutcome:
    """What a worker returns.

    Attributes
    ----------
    run_hash : str
    dataset : xarray.Dataset or None
        The reduced results (:func:`reduce_run`), None if the run failed.
    error : dict or None
        ``error_type``, ``message``, ``traceback`` of a failed run.
    wall_time_s : float
    """

    run_hash: str
    dataset: xr.Dataset | None
    error: dict | None
    wall_time_s: float


def reduce_run(ds: xr.Dataset, analysis_spec: Mapping | None = None,
               traces: bool = True) -> xr.Dataset:
    """The small Dataset a sweep keeps of one run.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run (:func:`cabletree.scenario.run_scenario`).
    analysis_spec : mapping, optional
        The scenario's ``[analysis]`` table; the features it asks for
        (:func:`cabletree.report.compute_features`) are added as ``<kind>_<feature>`` over
        ``site`` (attribute ``feature_kind``).
    traces : bool
        Keep ``v`` (mV) over time and site.

    Returns
    -------
    xarray.Dataset
        Per-compartment maps dropped, site coordinates kept, attrs of ``ds`` kept.
    """
    from .report import compute_features
    out = ds[["v"]]  # keeps the site and time coordinates, not the per-compartment maps
    if not traces:
        out = out.drop_vars("v").drop_dims("time")
    for kind, feats in compute_features(ds, dict(analysis_spec or {})).items():
        feats = feats.rename({v: f"{kind}_{v}" for v in feats.data_vars})
        for v in feats.data_vars:
            feats[v].attrs["feature_kind"] = kind
        feats.attrs = {}
        out = out.merge(feats, compat="override", join="outer")
    out.attrs = dict(ds.attrs)
    return out


def execute_task(task: RunTask) -> RunOutcome:
    """Run one scenario and reduce it; any error is caught and returned as a record.

    This is the function sent to workers (local processes or Dask workers).
    """
    start = time.perf_counter()
    try:
        from .scenario import run_scenario, scenario_from_dict
        scenario = scenario_from_dict(task.data, task.base_dir, task.source)
        ds = run_scenario(scenario, backend=task.backend, threads=1)  # runs go in parallel
        small = reduce_run(ds, scenario.analysis_spec, task.traces)
        return RunOutcome(task.run_hash, small, None, time.perf_counter() - start)
    except Exception as exc:  # recorded, the sweep goes on
        return RunOutcome(task.run_hash, None, _error_record(exc), time.perf_counter() - start)


def _error_record(exc: BaseException) -> dict:
    return {"error_type": type(exc).__name__, "message": str(exc),
            "traceback": "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))}


def _task(run: Run, spec: SweepSpec, backend: str) -> RunTask:
    s = run.scenario
    return RunTask(run.run_hash, s.data, str(s.base_dir), str(s.source_path),
                   dict(run.parameters), run.seed, spec.traces, backend)


# --------------------------------------------------------------------------------------------
# Engines: each yields outcomes as runs finish
# --------------------------------------------------------------------------------------------

def _serial(tasks: Sequence[RunTask], execute: Callable, **_) -> Iterator[RunOutcome]:
    for t in tasks:
        yield execute(t)


def _processes(tasks: Sequence[RunTask], execute: Callable, workers: int | None = None,
               **_) -> Iterator[RunOutcome]:
    n = workers or os.cpu_count() or 1
    with cf.ProcessPoolExecutor(max_workers=n, mp_context=_process_context()) as pool:
        futures = {pool.submit(execute, t): t for t in tasks}
        try:
            for fut in cf.as_completed(futures):
                yield _outcome(fut, futures[fut])
        finally:
            for fut in futures:
                fut.cancel()


def _process_context():
    """Start method of local workers: fork on Linux when this process has no other threads
    (workers then start at once, with the package already imported), else spawn."""
    if sys.platform.startswith("linux") and threading.active_count() == 1:
        return multiprocessing.get_context("fork")
    return multiprocessing.get_context("spawn")


def _dask(tasks: Sequence[RunTask], execute: Callable, scheduler: Any = None,
          **_) -> Iterator[RunOutcome]:
    try:
        from dask.distributed import Client, as_completed
    except ImportError as exc:
        raise SweepError("the dask engine needs dask.distributed: pip install "
                         "'cabletree[distributed]'") from exc
    if scheduler is None:
        raise SweepError("the dask engine needs a scheduler address (--scheduler tcp://host:8786)")
    own = not isinstance(scheduler, Client)
    client = Client(scheduler) if own else scheduler
    try:
        futures = {}
        for t in tasks:
            futures[client.submit(execute, t, key=f"cabletree-run-{t.run_hash}", pure=False)] = t
        for fut in as_completed(list(futures)):
            yield _outcome(fut, futures[fut])
    finally:
        if own:
            client.close()


def _outcome(fut, task: RunTask) -> RunOutcome:
    """The result of a future; a crashed worker becomes an error record of that run."""
    try:
        return fut.result()
    except Exception as exc:
        return RunOutcome(task.run_hash, None, _error_record(exc), float("nan"))


_ENGINE_FUNCTIONS = {"serial": _serial, "processes": _processes, "dask": _dask}


# --------------------------------------------------------------------------------------------
# Store
# --------------------------------------------------------------------------------------------

def _run_file(out_dir: Path, run_hash: str) -> Path:
    return out_dir / "runs" / f"{run_hash}.nc"


def _error_file(out_dir: Path, run_hash: str) -> Path:
    return out_dir / "runs" / f"{run_hash}.error.json"


def _write_text_atomically(path: Path, text: str) -> None:
    # one atomic-write helper for the package lives in analysis
    write_atomically(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def _store(out_dir: Path, run: Run, outcome: RunOutcome) -> None:
    if outcome.dataset is not None:
        ds = outcome.dataset.copy()
        ds.attrs.update({"run_hash": run.run_hash, "run_seed": run.seed,
                         "run_parameters": json.dumps(run.parameters, default=str)})
        save_dataset(ds, _run_file(out_dir, run.run_hash))
        _error_file(out_dir, run.run_hash).unlink(missing_ok=True)
    else:
        record = dict(outcome.error or {}, parameters=run.parameters, seed=run.seed,
                      run_hash=run.run_hash)
        _error_file(out_dir, run.run_hash).parent.mkdir(parents=True, exist_ok=True)
        _write_text_atomically(_error_file(out_dir, run.run_hash),
                               json.dumps(record, indent=2, default=str))


def pending_runs(runs: Sequence[Run], out_dir: str | os.PathLike) -> tuple[Run, ...]:
    """Runs whose results file is not yet in the store (failed runs are retried)."""
    out = Path(out_dir)
    return tuple(r for r in runs if not _run_file(out, r.run_hash).exists())


# --------------------------------------------------------------------------------------------
# Combine
# --------------------------------------------------------------------------------------------

def _nan_like(template: xr.Dataset) -> xr.Dataset:
    out = template.copy()
    for name, var in template.data_vars.items():
        if var.dtype.kind in "fiub":
            out[name] = xr.full_like(var, np.nan, dtype=float)
        else:
            out[name] = xr.full_like(var, "", dtype=var.dtype)
    return out


def _nested(axes: Sequence[Axis], prefix: tuple, lookup: Mapping[tuple, xr.Dataset]):
    if len(prefix) == len(axes):
        return lookup[prefix]
    return [_nested(axes, prefix + (i,), lookup) for i in range(axes[len(prefix)].size)]


def combine_runs(runs: Sequence[Run], spec: SweepSpec, datasets: Mapping[str, xr.Dataset],
                 errors: Mapping[str, dict]) -> xr.Dataset:
    """One Dataset over the swept dimensions from the per-run results.

    Parameters
    ----------
    runs : sequence of Run
        All runs of the sweep (from :func:`expand_runs`).
    spec : SweepSpec
    datasets : mapping run_hash -> Dataset
        Results of the finished runs.
    errors : mapping run_hash -> error record
        Failed runs (missing from ``datasets``).

    Returns
    -------
    xarray.Dataset
        Dimensions: one per grid key (named by :meth:`SweepSpec.short_names`; coordinate
        values with ``units`` from :func:`key_units` and ``key_path``), ``zip`` (zipped keys as
        coordinates on it), ``repeat``, then the per-run dimensions (``time``, ``site``).
        Site coordinates that differ between runs (several morphologies) become variables
        over the swept dimensions.  Per run: ``run_status`` ("ok", "failed" or "missing"),
        ``error``, ``seed``, ``run_hash``.  Failed runs are NaN.
    """
    axes = spec.axes()
    shape = tuple(a.size for a in axes)
    dims = tuple(a.dim for a in axes)
    ok = [datasets[r.run_hash] for r in runs if r.run_hash in datasets]
    if ok:
        template = ok[0]
        extra = [c for c in template.coords if c not in template.dims]
        constant = [c for c in extra
                    if all(c in d.coords and d[c].equals(template[c]) for d in ok)]
        lookup = {}
        blank = _nan_like(template.drop_vars(constant).reset_coords())
        for r in runs:
            d = datasets.get(r.run_hash)
            lookup[r.index] = (blank if d is None else d.drop_vars(constant).reset_coords())
        combined = xr.combine_nested(_nested(axes, (), lookup), concat_dim=list(dims),
                                     join="outer", combine_attrs="drop_conflicts",
                                     compat="no_conflicts") if dims else lookup[()]
        combined = combined.assign_coords({c: template[c] for c in constant})
        combined = combined.transpose(*dims, ...)
        for var in combined.variables.values():
            var.encoding = {}  # integer encodings read from run files do not hold NaN
    else:
        combined = xr.Dataset()
    status = np.empty(shape, dtype=object)
    message = np.empty(shape, dtype=object)
    seeds = np.zeros(shape, dtype=np.int32)
    hashes = np.empty(shape, dtype=object)
    for r in runs:
        status[r.index] = ("ok" if r.run_hash in datasets else
                           "failed" if r.run_hash in errors else "missing")
        err = errors.get(r.run_hash)
        message[r.index] = "" if err is None else f"{err.get('error_type')}: {err.get('message')}"
        seeds[r.index] = r.seed
        hashes[r.index] = r.run_hash
    combined["run_status"] = (dims, status.astype(str), {"long_name": "run status", "units": "1"})
    combined["error"] = (dims, message.astype(str), {"long_name": "error of a failed run"})
    combined["seed"] = (dims, seeds, {"long_name": "derived seed of the run", "units": "1"})
    combined["run_hash"] = (dims, hashes.astype(str),
                            {"long_name": "hash of the effective scenario text"})
    names = spec.short_names()
    coords = {}
    for axis in axes:
        if axis.dim == "repeat":
            coords["repeat"] = ("repeat", np.arange(axis.size, dtype=np.int32),
                                {"long_name": "repeat", "units": "1"})
            continue
        if axis.dim == "zip":
            coords["zip"] = ("zip", np.arange(axis.size, dtype=np.int32),
                             {"long_name": "index of the zipped values", "units": "1"})
        for j, key in enumerate(axis.keys):
            attrs = {"long_name": key, "key_path": key}
            units = key_units(key)
            if units is not None:
                attrs["units"] = units
            coords[names[key]] = (axis.dim, np.asarray([p[j] for p in axis.points]), attrs)
    combined = combined.assign_coords(coords)
    combined.attrs = {"cabletree_version": package_version(), "Conventions": "CF-1.8",
                      "sweep_spec": json.dumps(_spec_json(spec), default=str),
                      "sweep_seed": int(spec.seed), "n_runs": len(runs),
                      "n_failed": int(sum(1 for r in runs if r.run_hash in errors))}
    return combined


def _spec_json(spec: SweepSpec) -> dict:
    return {"grid": {k: list(v) for k, v in spec.grid}, "zip": {k: list(v) for k, v in spec.zip},
            "repeats": spec.repeats, "seed": spec.seed, "traces": spec.traces}


def feature_tables(combined: xr.Dataset) -> dict[str, str]:
    """CSV tables, one per feature kind: one row per run and site.

    Columns: the swept values (same names as the Dataset coordinates, units appended),
    ``site`` and its coordinates, the features of that kind (variables with attribute
    ``feature_kind``), ``run_status``.

    Returns
    -------
    dict
        Feature kind -> CSV text (see :func:`cabletree.analysis.features_table`).
    """
    kinds: dict[str, list[str]] = {}
    for name, var in combined.data_vars.items():
        if "feature_kind" in var.attrs:
            kinds.setdefault(str(var.attrs["feature_kind"]), []).append(str(name))
    swept = [d for d in combined["run_status"].dims] if "run_status" in combined else []
    swept_coords = [c for c in combined.coords if combined[c].dims and set(combined[c].dims) <= set(swept)]
    site_coords = [c for c in combined.coords if combined[c].dims == ("site",)]
    out = {}
    for kind, names in kinds.items():
        sub = combined[names + ["run_status"]].reset_coords(drop=True)
        sub = sub.assign_coords({c: combined[c] for c in swept_coords + site_coords})
        flat = sub.stack(row=swept + ["site"]).reset_index("row")
        order = swept_coords + [c for c in site_coords if c in flat.coords]
        flat = xr.Dataset({n: ("row", flat[n].values, flat[n].attrs) for n in names + ["run_status"]},
                          coords={"row": np.arange(flat.sizes["row"]),
                                  **{c: ("row", flat[c].values, flat[c].attrs) for c in order}})
        out[kind] = analysis.features_table(flat)
    return out


# --------------------------------------------------------------------------------------------
# Progress
# --------------------------------------------------------------------------------------------

def _clock(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "?"
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


class _Progress:
    """Plain-text progress bar with time left, on a stream (stderr)."""

    def __init__(self, total: int, skipped: int, stream=None, width: int = 30):
        self.total, self.skipped, self.width = total, skipped, width
        self.done = self.failed = 0
        self.stream = stream
        self.start = time.perf_counter()
        self.tty = bool(stream is not None and getattr(stream, "isatty", lambda: False)())
        self.last = -math.inf

    def update(self, failed: bool) -> None:
        """Count one finished run; redraw (on a non-terminal: one line at most every 5 s)."""
        self.done += 1
        self.failed += int(failed)
        now = time.perf_counter()
        if self.stream is None or (not self.tty and now - self.last < 5.0 and self.done < self.total):
            return
        self.last = now
        elapsed = now - self.start
        left = elapsed / self.done * (self.total - self.done)
        filled = int(self.width * self.done / max(self.total, 1))
        line = (f"[{'#' * filled}{'.' * (self.width - filled)}] {self.done}/{self.total} runs"
                f" ({self.skipped} already done, {self.failed} failed) elapsed {_clock(elapsed)}"
                f" left ~{_clock(left)}")
        end = "" if self.tty and self.done < self.total else "\n"
        self.stream.write(("\r" if self.tty else "") + line + end)
        self.stream.flush()


# --------------------------------------------------------------------------------------------
# The sweep
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class SweepReport:
    """What :func:`run_sweep` did.

    Attributes
    ----------
    dataset : xarray.Dataset
        The combined result (also in ``<out>/sweep.nc``).
    n_runs, n_computed, n_skipped : int
        Runs in the sweep, computed now, found finished in the store.
    failures : tuple of dict
        Error records of the failed runs (error_type, message, parameters, seed, run_hash).
    out_dir : Path
    """

    dataset: xr.Dataset
    n_runs: int
    n_computed: int
    n_skipped: int
    failures: tuple
    out_dir: Path


def _spec_of(scenario) -> SweepSpec:
    seed = scenario.data.get("run", {}).get("seed", 0) if isinstance(scenario.data.get("run"), Mapping) else 0
    where = f"{scenario.source_path or '<scenario>'}: [sweep]"
    return parse_sweep_spec(getattr(scenario, "sweep_spec", None), default_seed=int(seed), where=where)


def run_sweep(scenario, out_dir: str | os.PathLike, *, spec: SweepSpec | None = None,
              engine: str = "processes", workers: int | None = None, scheduler: Any = None,
              backend: str = "auto", progress=sys.stderr,
              execute: Callable[[RunTask], RunOutcome] = execute_task) -> SweepReport:
    """Run (or finish) a sweep and combine it.

    Parameters
    ----------
    scenario : cabletree.scenario.Scenario
        Base scenario; its ``[sweep]`` table is used unless ``spec`` is given.
    out_dir : path
        Output folder: ``runs/`` (the store), ``sweep.nc``, ``features_<kind>.csv``.
    spec : SweepSpec, optional
    engine : {"processes", "serial", "dask"}
        ``"dask"`` is implied by ``scheduler``.
    workers : int, optional
        Local worker processes (default: the number of cores).
    scheduler : str or dask.distributed.Client, optional
        Address of an existing Dask scheduler (or a connected client).
    backend : str
        Solver backend for every run.
    progress : stream or None
        Where the progress bar goes (None: silent).
    execute : callable
        The worker function (module level, picklable); :func:`execute_task` by default.

    Returns
    -------
    SweepReport
    """
    if scheduler is not None:
        engine = "dask"
    if engine not in ENGINES:
        raise SweepError(f"unknown engine {engine!r}; expected one of {list(ENGINES)}")
    spec = _spec_of(scenario) if spec is None else spec
    out = Path(out_dir)
    (out / "runs").mkdir(parents=True, exist_ok=True)
    remove_stale_temporaries(out / "runs")  # left by a sweep killed mid-write
    runs = expand_runs(scenario, spec)
    todo = pending_runs(runs, out)
    by_hash = {r.run_hash: r for r in runs}
    bar = _Progress(len(todo), len(runs) - len(todo), progress)
    for r in todo:
        if r.invalid is not None:
            _store(out, r, RunOutcome(r.run_hash, None, r.invalid, 0.0))
            bar.update(True)
    tasks = [_task(r, spec, backend) for r in todo if r.invalid is None]
    for outcome in _ENGINE_FUNCTIONS[engine](tasks, execute, workers=workers, scheduler=scheduler):
        _store(out, by_hash[outcome.run_hash], outcome)
        bar.update(outcome.dataset is None)
    return _finish(runs, spec, out, len(todo))


def _finish(runs: Sequence[Run], spec: SweepSpec, out: Path, n_computed: int) -> SweepReport:
    datasets, errors = {}, {}
    for r in runs:
        path, err = _run_file(out, r.run_hash), _error_file(out, r.run_hash)
        if path.exists():
            datasets[r.run_hash] = load_dataset(path)
        elif err.exists():
            errors[r.run_hash] = json.loads(err.read_text(encoding="utf-8"))
    combined = combine_runs(runs, spec, datasets, errors)
    save_dataset(combined, out / "sweep.nc")
    for name, text in feature_tables(combined).items():
        _write_text_atomically(out / f"features_{name}.csv", text)
    failures = tuple(errors[r.run_hash] for r in runs if r.run_hash in errors)
    return SweepReport(combined, len(runs), n_computed, len(runs) - n_computed, failures, out)


@dataclass(frozen=True)
class DryRunEstimate:
    """What a sweep would cost.

    Attributes
    ----------
    n_runs, n_pending : int
        Runs in the sweep, and those not yet in the store.
    calibration_s : float
        Wall time of the shortened calibration run (in this process), s.
    estimated_s : float
        Estimated time for the pending runs on ``workers`` workers, s.
    run_bytes : int
        Size of one reduced run Dataset, bytes.
    output_bytes : int
        Estimated size of the combined Dataset, bytes.
    workers : int
    """

    n_runs: int
    n_pending: int
    calibration_s: float
    estimated_s: float
    run_bytes: int
    output_bytes: int
    workers: int

    def text(self) -> str:
        """Human-readable summary."""
        return (f"{self.n_runs} runs ({self.n_pending} to compute, "
                f"{self.n_runs - self.n_pending} already in the store)\n"
                f"calibration run: {self.calibration_s:.2f} s\n"
                f"estimated time on {self.workers} worker(s): {_clock(self.estimated_s)}\n"
                f"output size: about {self.output_bytes / 1e6:.2f} MB "
                f"({self.run_bytes / 1e3:.1f} kB per run)\n")


def _calibration_task(run: Run, spec: SweepSpec, backend: str, fraction: float) -> RunTask:
    """The task of ``run`` shortened to ``fraction`` of its duration (and settling), without
    its ``[analysis]`` table (whose windows may lie beyond the shortened run)."""
    data = json.loads(json.dumps(run.scenario.data))
    data.pop("analysis", None)
    settings = data["run"]
    settings["t_stop_ms"] = float(settings["t_stop_ms"]) * fraction
    if "settle_ms" in settings:
        settings["settle_ms"] = float(settings["settle_ms"]) * fraction
    return replace(_task(run, spec, backend), data=data)


def dry_run(scenario, out_dir: str | os.PathLike, *, spec: SweepSpec | None = None,
            workers: int | None = None, backend: str = "auto", calibration_fraction: float = 0.2,
            execute: Callable[[RunTask], RunOutcome] = execute_task) -> DryRunEstimate:
    """Count the runs and estimate time and output size from one short calibration run.

    The calibration run is the first pending valid run, shortened to
    ``calibration_fraction`` of its duration (``run.t_stop_ms`` and ``run.settle_ms``),
    executed in this process and not stored; time and trace size are scaled back up.
    Its wall time includes one-time costs (imports, kernel compilation), so the estimate
    errs long.

    Parameters
    ----------
    scenario, spec, workers, backend, execute
        As for :func:`run_sweep`.
    out_dir : path
        Output folder (runs already in its store are not counted as pending).
    calibration_fraction : float
        Fraction of the run simulated for the calibration, in (0, 1].

    Raises
    ------
    SweepError
        If no run is valid or the calibration run fails (its error is in the message).
    """
    if not 0 < calibration_fraction <= 1:
        raise SweepError(f"calibration_fraction must be in (0, 1], got {calibration_fraction!r}")
    spec = _spec_of(scenario) if spec is None else spec
    runs = expand_runs(scenario, spec)
    todo = pending_runs(runs, out_dir)
    valid = [r for r in (todo or runs) if r.invalid is None]
    if not valid:
        raise SweepError(f"no valid run to calibrate with; first error: {runs[0].invalid}")
    n_workers = workers or os.cpu_count() or 1
    outcome = execute(_calibration_task(valid[0], spec, backend, calibration_fraction))
    if outcome.dataset is None:
        err = outcome.error or {}
        raise SweepError(f"calibration run {valid[0].parameters} failed: "
                         f"{err.get('error_type')}: {err.get('message')}")
    ds = outcome.dataset
    timed = sum(v.nbytes for v in ds.variables.values() if "time" in v.dims)
    run_bytes = int((ds.nbytes - timed) + timed / calibration_fraction)
    per_run_s = outcome.wall_time_s / calibration_fraction
    estimated = per_run_s * math.ceil(len(todo) / n_workers)
    return DryRunEstimate(len(runs), len(todo), outcome.wall_time_s, estimated, run_bytes,
                          run_bytes * len(runs), n_workers)


# --------------------------------------------------------------------------------------------
# Plot
# --------------------------------------------------------------------------------------------

def plot_sweep_feature(ds: xr.Dataset, variable: str, x: str, *, site: str | None = None,
                       hue: str | None = None, ax=None):
    """Plot a swept feature against one swept value, one line per value of ``hue``.

    Parameters
    ----------
    ds : xarray.Dataset
        Combined sweep Dataset.
    variable : str
        Variable to plot, e.g. ``"bap_amplitude_mV"``.
    x : str
        Swept coordinate on the x axis.
    site : str, optional
        Site to select when the variable is over ``site``.
    hue : str, optional
        Swept coordinate giving one line per value.
    ax : matplotlib Axes, optional

    Returns
    -------
    list of matplotlib.lines.Line2D
    """
    import matplotlib.pyplot as plt
    if ax is None:
        _, ax = plt.subplots(figsize=(5, 3.5))
    da = ds[variable]
    if site is not None:
        da = da.sel(site=site)
    xdim = ds[x].dims[0]
    lines = []
    groups = [(None, da)] if hue is None else [(v, da.isel({ds[hue].dims[0]: i}))
                                               for i, v in enumerate(ds[hue].values)]
    for value, sub in groups:
        extra = [d for d in sub.dims if d != xdim]
        y = sub.mean(extra) if extra else sub
        label = None if hue is None else f"{hue} = {value:g}" if isinstance(value, (float, np.floating)) else f"{hue} = {value}"
        lines += ax.plot(ds[x].values, y.transpose(xdim).values, marker="o", label=label)

    def label(name):
        units = ds[name].attrs.get("units")
        return f"{name} ({units})" if units and units != "1" else name

    ax.set_xlabel(label(x))
    ax.set_ylabel(label(variable) + (f" at {site}" if site else ""))
    if hue is not None:
        ax.legend(frameon=False, fontsize="small")
    return lines


# --------------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------------

def register_sweep(subparsers) -> argparse.ArgumentParser:
    """Add the ``sweep`` subcommand to an argparse subparsers object."""
    p = subparsers.add_parser("sweep", help="run a sweep of a scenario into one Dataset",
                              description="Run the sweep a scenario declares ([sweep] table), "
                                          "with values given or overridden on the command line.")
    p.add_argument("scenario", help="scenario TOML file")
    p.add_argument("--out", required=True, help="output folder (store in OUT/runs, OUT/sweep.nc)")
    p.add_argument("--grid", action="append", default=[], metavar="KEY=V1,V2,...",
                   help="sweep a key over values (cartesian product); repeatable")
    p.add_argument("--zip", action="append", default=[], metavar="KEY=V1,V2,...",
                   help="zipped values (all --zip lists equally long); repeatable")
    p.add_argument("--repeats", type=int, default=None, help="repeats with derived seeds")
    p.add_argument("--workers", type=int, default=None,
                   help="local worker processes (default: number of cores)")
    p.add_argument("--serial", action="store_true", help="run in this process, one by one")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="address of an existing Dask scheduler, e.g. tcp://host:8786")
    p.add_argument("--backend", default="auto", help="solver backend")
    p.add_argument("--dry-run", action="store_true",
                   help="print the number of runs, estimated time and output size")
    p.add_argument("--plot", default=None, metavar="VARIABLE:X[:HUE[:SITE]]",
                   help="save a figure of VARIABLE against X to OUT/sweep.png")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=main_sweep)
    return p


def main_sweep(args: argparse.Namespace) -> int:
    """Run ``cabletree sweep``; returns the exit code (``EXIT_RUNS_FAILED`` if runs failed)."""
    from .scenario import load_scenario
    scenario = load_scenario(args.scenario)
    spec = override_spec(_spec_of(scenario), grid=args.grid, zip=args.zip, repeats=args.repeats)
    engine = "serial" if args.serial else "processes"
    if args.dry_run:
        print(dry_run(scenario, args.out, spec=spec, workers=1 if args.serial else args.workers,
                      backend=args.backend).text(), end="")
        return 0
    report = run_sweep(scenario, args.out, spec=spec, engine=engine, workers=args.workers,
                       scheduler=args.scheduler, backend=args.backend,
                       progress=None if args.quiet else sys.stderr)
    print(f"{report.n_runs} runs: {report.n_computed} computed, {report.n_skipped} already done, "
          f"{len(report.failures)} failed; wrote {report.out_dir / 'sweep.nc'}")
    if args.plot:
        _save_plot(report.dataset, args.plot, report.out_dir / "sweep.png")
    for f in report.failures:
        print(f"FAILED {f.get('parameters')}: {f.get('error_type')}: {f.get('message')}",
              file=sys.stderr)
    return EXIT_RUNS_FAILED if report.failures else 0


def _save_plot(ds: xr.Dataset, text: str, path: Path) -> None:
    parts = text.split(":")
    if len(parts) < 2:
        raise SweepError(f"--plot: expected VARIABLE:X[:HUE[:SITE]], got {text!r}")
    variable, x = parts[:2]
    hue = parts[2] if len(parts) > 2 and parts[2] else None
    site = parts[3] if len(parts) > 3 and parts[3] else None
    for name in (variable, x) + ((hue,) if hue else ()):
        if name not in ds.variables:
            raise SweepError(f"--plot: {name!r} is not in the sweep Dataset; it has "
                             f"{sorted(map(str, ds.variables))}")
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(5, 3.5))
    plot_sweep_feature(ds, variable, x, site=site, hue=hue, ax=ax)
    fig.tight_layout()
    from .plots import save_figure
    save_figure(fig, path, dpi=150)
    plt.close(fig)


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m cabletree.sweep SCENARIO --out DIR ...`` (the same as ``cabletree sweep``)."""
    parser = argparse.ArgumentParser(prog="cabletree")
    register_sweep(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(["sweep", *(sys.argv[1:] if argv is None else argv)])
    try:
        return args.func(args)
    except CableTreeError as exc:
        print(f"cabletree sweep: error: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
