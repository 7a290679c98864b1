"""Scenario files: one TOML file describes one complete numerical experiment.

The schema is cabletree's own.  Every collection is a table keyed by a user label
(never an array of tables), so every value has a readable dotted key path such as
``channels.ka_gradient.gmax.slope_per_um``; :func:`with_overrides` and the sweep
module address values by those paths.  Units are part of the key names
(``delay_ms``, ``amplitude_nA``, ``gmax`` is always S/cm²); values are plain numbers.

Sections
--------
``[morphology]``
    ``file`` (SWC path relative to the scenario file) *or* ``synthetic`` (name of a
    generator in :mod:`cabletree.morphology.synthetic`: ``pyramidal_cell``,
    ``ball_and_stick``, ``y_tree``, ``cylinder``, ``random_tree``) with
    ``[morphology.parameters]``; optional ``[morphology.repairs]`` (fields of
    :class:`~cabletree.morphology.Repairs`).
``[grid]``
    Fields of :class:`~cabletree.grid.SpacingRule` (``max_length_um``,
    ``lambda_fraction``, ``frequency_hz``, ``min_pieces``).
``[membrane]``
    ``cm_uF_per_cm2``, ``axial_resistivity_ohm_cm``, ``leak_S_per_cm2``,
    ``leak_reversal_mV``: a number, or a table keyed by SWC type name (``soma``,
    ``axon``, ``basal``, ``apical``), type number as a string (``"5"``) or ``default``.
``[channels.<label>]``
    ``channel`` (built-in name, :data:`cabletree.channels.CHANNELS`), ``gmax``
    (S/cm², a number or a profile table ``{kind = "linear", value_at_zero = ...,
    slope_per_um = ...}``, kinds of :data:`cabletree.profiles.PROFILES`), optional
    ``selector`` (``{swc_types = [..], path_distance_um = [lo, hi], branch_order =
    [lo, hi]}``, half-open ranges, ``inf`` allowed), ``parameters`` (channel
    parameter -> number or profile), ``reversal_mV``, ``block_fraction`` (0-1, the
    fraction of the conductance blocked, e.g. by a drug: gmax is multiplied by
    ``1 - block_fraction``), and ``distal_channel`` + ``distal_from_um``: the same
    density profile carried by another kinetic type from that path distance on
    (Migliore et al 1999 switch A-type kinetics at 100 µm, see
    :func:`cabletree.channels.ka_placements`).
``[membrane_profiles.<label>]``
    ``parameter`` (one of :data:`cabletree.profiles.MEMBRANE_PARAMETERS`), ``value``
    (number or profile), optional ``selector``.
``[spines.<label>]``
    ``factor`` (number or profile, see :func:`cabletree.profiles.SpineCorrection`),
    optional ``selector``.
``[sites.<label>]``
    ``soma = true``; or ``path_distance_um`` (a number or a list of numbers, µm) with
    optional ``swc_types`` (default ``["apical"]``) and ``tolerance_um``; or ``branch``
    and ``position`` (0-1).  A list of distances gives sites ``<label>_<d>um``.
    Every site is recorded.
``[inputs.<label>]``
    ``type`` = ``step`` | ``ramp`` | ``pulse_train`` | ``noise`` | ``sampled`` (a
    current injected at ``site``, fields of the classes in :mod:`cabletree.inputs`)
    or ``synapse``: ``kinetics`` = ``ampa`` | ``nmda`` | ``alpha`` |
    ``double_exponential`` (with ``tau_ms`` for alpha, ``tau_rise_ms``/
    ``tau_decay_ms`` otherwise; AMPA/NMDA defaults may be overridden, also
    ``reversal_mV`` and ``mg_mM``), ``weight_nS`` (peak conductance per event), placed
    at ``site`` or spread over a ``selector`` with ``count`` or ``density_per_um``
    (positions drawn with probability proportional to compartment length, seed
    ``placement_seed``), driven by ``events`` = ``{kind = "explicit", times_ms}`` |
    ``{kind = "regular", start_ms, interval_ms, count}`` | ``{kind = "bursts",
    start_ms, n_bursts, burst_interval_ms, spikes_per_burst, spike_interval_ms}`` |
    ``{kind = "poisson", rate_hz, start_ms, stop_ms, seed}`` (an independent train per
    synapse; the others drive all synapses of the input together).
``[run]``
    ``t_stop_ms`` (required), ``dt_ms`` (0.025), ``method`` (``crank_nicolson``),
    ``record_interval_ms``, ``v_init_mV`` (-65), ``celsius`` (34), ``seed`` (0; the
    default of every seed not given), ``backend`` (``auto``), ``threads`` (1: threads
    for the compiled backend, each updating and solving its part of the tree, used
    where they pay off; sweeps always run each cell on one thread), ``settle_ms``
    (0: run this long without inputs first and start from the state reached, so
    the recording begins at rest), ``rate_table_step_mV`` (absent: exact rates; opt-in
    tabulated rates at this voltage spacing, see :mod:`cabletree.solver.tables`).
``[analysis]`` (optional)
    What :mod:`cabletree.report` computes and draws; see there.
``[sweep]`` (optional)
    Passed through untouched as :attr:`Scenario.sweep_spec` (:mod:`cabletree.sweep`).

Every error is a :class:`~cabletree.errors.ScenarioError` whose message starts
with the file and the key path and says what was expected.
"""

from __future__ import annotations

import copy
import dataclasses
import difflib
import json
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .errors import CableTreeError, ScenarioError

try:  # Python >= 3.11
    import tomllib as _toml
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as _toml

__all__ = [
    "Scenario", "load_scenario", "scenario_from_dict", "validate", "with_overrides",
    "build_cell_model", "run_scenario", "dump_scenario", "save_scenario", "get_value",
    "scenario_seeds",
]

_SWC_TYPE_KEYS = {"soma": 1, "axon": 2, "basal": 3, "apical": 4}
_LABEL = re.compile(r"^[A-Za-z0-9_-]+$")
_TOP = ("morphology", "grid", "membrane", "channels", "membrane_profiles", "spines", "sites",
        "inputs", "run", "analysis", "sweep")


# --------------------------------------------------------------------------------------------
# The Scenario value
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Scenario:
    """A validated scenario.

    Attributes
    ----------
    data : dict
        The scenario as nested dicts (what the TOML file holds).  Treat as read-only;
        :func:`with_overrides` returns a changed copy.
    source_path : str
        File the scenario came from (``"<dict>"`` when built in Python).
    base_dir : str
        Folder that relative paths in the scenario are resolved against.
    text : str
        The file text ("" when built in Python).

    Two scenarios are equal when their ``data`` are equal.
    """

    data: dict
    source_path: str = field(default="<dict>", compare=False)
    base_dir: str = field(default=".", compare=False)
    text: str = field(default="", compare=False)

    @property
    def sweep_spec(self) -> dict | None:
        """The ``[sweep]`` table, untouched (None without one)."""
        return self.data.get("sweep")

    @property
    def analysis_spec(self) -> dict:
        """The ``[analysis]`` table ({} without one)."""
        return self.data.get("analysis", {})


def _err(ctx: "_Ctx", path: str, message: str) -> ScenarioError:
    return ScenarioError(f"{ctx.source}: {path}: {message}" if path else f"{ctx.source}: {message}")


@dataclass(frozen=True)
class _Ctx:
    source: str
    base_dir: str


def _suggest(name: str, known) -> str:
    close = difflib.get_close_matches(str(name), list(known), n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else ""


def _join(path: str, key) -> str:
    return f"{path}.{key}" if path else str(key)


def _table(ctx, value, path: str) -> dict:
    if not isinstance(value, dict):
        raise _err(ctx, path, f"expected a table, got {_show(value)}")
    return value


def _show(value) -> str:
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return f"a list {value!r}"
    return f"{type(value).__name__} {value!r}"


def _keys(ctx, d: dict, path: str, required=(), optional=()) -> None:
    allowed = list(required) + list(optional)
    for key in d:
        if key not in allowed:
            raise _err(ctx, _join(path, key),
                       f"unknown key{_suggest(key, allowed)} (allowed here: {', '.join(allowed)})")
    for key in required:
        if key not in d:
            raise _err(ctx, _join(path, key), "missing required key")


def _is_num(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


_UNIT_WORDS = {"_ms": "ms", "_um": "µm", "_mV": "mV", "_nA": "nA", "_nS": "nS", "_hz": "Hz",
               "_S_per_cm2": "S/cm²", "_uF_per_cm2": "µF/cm²", "_ohm_cm": "Ω·cm", "_mM": "mM"}


def _unit_of(key: str) -> str:
    for suffix, unit in _UNIT_WORDS.items():
        if str(key).endswith(suffix):
            return unit
    return ""


def _num(ctx, d: dict, key: str, path: str, default=None, *, lo=None, lo_open=False, hi=None,
         integer=False, unit: str | None = None, allow_inf=False):
    """A number at ``d[key]`` with range checks; ``default`` when absent (None = required)."""
    p = _join(path, key)
    if key not in d:
        if default is None:
            raise _err(ctx, p, "missing required key")
        return default
    v = d[key]
    unit = _unit_of(key) if unit is None else unit
    in_unit = f" in {unit}" if unit else ""
    if isinstance(v, str):
        raise _err(ctx, p, f"expected a plain number{in_unit} (units are fixed by the key name), "
                           f"got the string {v!r}")
    if not _is_num(v) or (integer and not (isinstance(v, int) or float(v).is_integer())):
        kind = "an integer" if integer else "a number"
        raise _err(ctx, p, f"expected {kind}{in_unit}, got {_show(v)}")
    if math.isnan(v) or (math.isinf(v) and not allow_inf):
        raise _err(ctx, p, f"expected a finite number{in_unit}, got {v!r}")
    if lo is not None and (v <= lo if lo_open else v < lo):
        raise _err(ctx, p, f"expected a number {'>' if lo_open else '>='} {lo:g}{in_unit}, got {v!r}")
    if hi is not None and v > hi:
        raise _err(ctx, p, f"expected a number <= {hi:g}{in_unit}, got {v!r}")
    return int(v) if integer else float(v)


def _str(ctx, d: dict, key: str, path: str, choices=None, default=None) -> str:
    p = _join(path, key)
    if key not in d:
        if default is None:
            raise _err(ctx, p, "missing required key")
        return default
    v = d[key]
    if not isinstance(v, str):
        raise _err(ctx, p, f"expected a string, got {_show(v)}")
    if choices is not None and v not in choices:
        raise _err(ctx, p, f"unknown value {v!r}{_suggest(v, choices)} (expected one of "
                           f"{', '.join(map(str, choices))})")
    return v


def _bool(ctx, d: dict, key: str, path: str, default: bool) -> bool:
    if key not in d:
        return default
    if not isinstance(d[key], bool):
        raise _err(ctx, _join(path, key), f"expected true or false, got {_show(d[key])}")
    return d[key]


def _numbers(ctx, d: dict, key: str, path: str, *, length=None, allow_inf=False) -> list[float]:
    p = _join(path, key)
    v = d[key]
    if not isinstance(v, list):
        raise _err(ctx, p, f"expected a list of numbers, got {_show(v)}")
    for i, x in enumerate(v):
        if isinstance(x, str):
            raise _err(ctx, f"{p}[{i}]", f"expected a plain number (units are fixed by the key "
                                          f"name), got the string {x!r}")
        if not _is_num(x) or math.isnan(x) or (math.isinf(x) and not allow_inf):
            raise _err(ctx, f"{p}[{i}]", f"expected a number, got {_show(x)}")
    if length is not None and len(v) != length:
        raise _err(ctx, p, f"expected {length} numbers [lo, hi], got {len(v)}")
    return [float(x) for x in v]


# --------------------------------------------------------------------------------------------
# Pieces: profiles, selectors, SWC-type tables
# --------------------------------------------------------------------------------------------

#: Fields of each profile kind that carry values (scaled by a block), not positions.
_PROFILE_VALUE_FIELDS = {"uniform": ("value",), "linear": ("value_at_zero", "slope_per_um"),
                         "exponential": ("value_at_zero", "baseline"), "sigmoid": ("low", "high"),
                         "step": ("below", "above"), "table": ("values",)}


def _profile(ctx, value, path: str, unit: str, scale: float = 1.0, nonnegative=False):
    from .profiles import PROFILES, make_profile

    if isinstance(value, str):
        raise _err(ctx, path, f"expected a plain number in {unit} (units are fixed by the key "
                              f"name) or a profile table, got the string {value!r}")
    if _is_num(value):
        if math.isnan(value) or math.isinf(value):
            raise _err(ctx, path, f"expected a finite number in {unit}, got {value!r}")
        if nonnegative and value < 0:
            raise _err(ctx, path, f"conductances must be >= 0 {unit}, got {value!r}")
        return float(value) * scale
    if not isinstance(value, dict):
        raise _err(ctx, path, f"expected a number in {unit} or a profile table, got {_show(value)}")
    kind = _str(ctx, value, "kind", path, choices=sorted(PROFILES))
    params = {k: v for k, v in value.items() if k != "kind"}
    allowed = [f.name for f in dataclasses.fields(PROFILES[kind])]
    _keys(ctx, params, path, required=(), optional=allowed)
    for k, v in params.items():
        if k == "variable":
            continue
        if k in ("x", "values"):
            params[k] = _numbers(ctx, params, k, path)
        else:
            params[k] = _num(ctx, params, k, path, unit="")
    for k in _PROFILE_VALUE_FIELDS[kind] + ("floor", "ceiling"):
        if k in params and params[k] is not None:
            params[k] = [x * scale for x in params[k]] if k == "values" else params[k] * scale
    try:
        prof = make_profile(kind, **params)
    except CableTreeError as exc:
        raise _err(ctx, path, str(exc)) from None
    return prof


def _swc_types(ctx, value, path: str) -> tuple[int, ...]:
    if not isinstance(value, list) or not value:
        raise _err(ctx, path, f"expected a non-empty list of SWC types (numbers or "
                              f"{', '.join(_SWC_TYPE_KEYS)}), got {_show(value)}")
    out = []
    for i, t in enumerate(value):
        if isinstance(t, str) and t in _SWC_TYPE_KEYS:
            out.append(_SWC_TYPE_KEYS[t])
        elif isinstance(t, int) and not isinstance(t, bool) and t >= 0:
            out.append(int(t))
        else:
            raise _err(ctx, f"{path}[{i}]", f"expected an SWC type number or one of "
                                            f"{', '.join(_SWC_TYPE_KEYS)}{_suggest(t, _SWC_TYPE_KEYS)}, "
                                            f"got {t!r}")
    return tuple(out)


def _selector(ctx, d: dict, key: str, path: str):
    from .profiles import Selector

    if key not in d:
        return Selector()
    p = _join(path, key)
    s = _table(ctx, d[key], p)
    _keys(ctx, s, p, optional=("swc_types", "path_distance_um", "branch_order"))
    kwargs = {}
    if "swc_types" in s:
        kwargs["swc_types"] = _swc_types(ctx, s["swc_types"], _join(p, "swc_types"))
    for name in ("path_distance_um", "branch_order"):
        if name in s:
            lo, hi = _numbers(ctx, s, name, p, length=2, allow_inf=True)
            if not lo < hi:
                raise _err(ctx, _join(p, name), f"expected [lo, hi] with lo < hi (half-open range), "
                                                f"got {s[name]!r}")
            kwargs[name] = (lo, hi)
    try:
        return Selector(**kwargs)
    except CableTreeError as exc:
        raise _err(ctx, p, str(exc)) from None


def _per_type_value(ctx, d: dict, key: str, path: str, default: float, lo=None, lo_open=False):
    p = _join(path, key)
    if key in d and isinstance(d[key], dict):
        t = d[key]
        out = {}
        for k in t:
            if k == "default":
                code = "default"
            elif k in _SWC_TYPE_KEYS:
                code = _SWC_TYPE_KEYS[k]
            elif k.isdigit():
                code = int(k)
            else:
                raise _err(ctx, _join(p, k), f"unknown SWC type key"
                                             f"{_suggest(k, list(_SWC_TYPE_KEYS) + ['default'])} "
                                             f"(expected soma, axon, basal, apical, a type number "
                                             f"or default)")
            out[code] = _num(ctx, t, k, p, lo=lo, lo_open=lo_open, unit=_unit_of(key))
        return out
    return _num(ctx, d, key, path, default, lo=lo, lo_open=lo_open)


# --------------------------------------------------------------------------------------------
# Compiling a scenario into model objects
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class _Compiled:
    cell: Any
    settings: Any
    backend: str
    threads: int
    settle_ms: float
    seeds: dict
    site_names: dict


def _morphology(ctx, data: dict):
    from .morphology import Repairs, read_swc, synthetic

    path = "morphology"
    m = _table(ctx, data.get("morphology"), path) if "morphology" in data else None
    if m is None:
        raise _err(ctx, path, "missing required table [morphology]")
    _keys(ctx, m, path, optional=("file", "synthetic", "parameters", "repairs"))
    if ("file" in m) == ("synthetic" in m):
        raise _err(ctx, path, "give exactly one of 'file' (an SWC path) or 'synthetic' (a "
                              "generator name)")
    repairs = None
    if "repairs" in m:
        r = _table(ctx, m["repairs"], "morphology.repairs")
        names = [f.name for f in dataclasses.fields(Repairs)]
        _keys(ctx, r, "morphology.repairs", optional=names)
        try:
            repairs = Repairs(**r)
        except (CableTreeError, TypeError) as exc:
            raise _err(ctx, "morphology.repairs", str(exc)) from None
    if "file" in m:
        if "parameters" in m:
            raise _err(ctx, "morphology.parameters", "parameters belong to 'synthetic' "
                                                     "generators, not to SWC files")
        name = _str(ctx, m, "file", path)
        file = Path(ctx.base_dir) / name
        if not file.exists():
            raise _err(ctx, "morphology.file", f"no SWC file at {file} (paths are relative to "
                                               f"the scenario file's folder)")
        try:
            return read_swc(file, repairs=repairs)
        except CableTreeError as exc:
            raise _err(ctx, "morphology.file", str(exc)) from None
    generators = ("pyramidal_cell", "ball_and_stick", "y_tree", "cylinder", "random_tree")
    gen = _str(ctx, m, "synthetic", path, choices=generators)
    params = _table(ctx, m.get("parameters", {}), "morphology.parameters")
    if repairs is not None:
        raise _err(ctx, "morphology.repairs", "repairs apply to SWC files only")
    try:
        return getattr(synthetic, gen)(**params)
    except TypeError as exc:
        raise _err(ctx, "morphology.parameters", f"{gen}: {exc}") from None
    except (CableTreeError, ValueError) as exc:
        raise _err(ctx, "morphology.parameters", f"{gen}: {exc}") from None


def _membrane(ctx, data: dict):
    from .cell import Membrane

    m = _table(ctx, data.get("membrane", {}), "membrane")
    names = ("cm_uF_per_cm2", "axial_resistivity_ohm_cm", "leak_S_per_cm2", "leak_reversal_mV")
    _keys(ctx, m, "membrane", optional=names)
    return Membrane(
        cm_uF_per_cm2=_per_type_value(ctx, m, "cm_uF_per_cm2", "membrane", 1.0, lo=0, lo_open=True),
        axial_resistivity_ohm_cm=_per_type_value(ctx, m, "axial_resistivity_ohm_cm", "membrane",
                                                 150.0, lo=0, lo_open=True),
        leak_S_per_cm2=_per_type_value(ctx, m, "leak_S_per_cm2", "membrane", 5e-5, lo=0),
        leak_reversal_mV=_per_type_value(ctx, m, "leak_reversal_mV", "membrane", -65.0))


def _grid_rule(ctx, data: dict):
    from .grid import SpacingRule

    g = _table(ctx, data.get("grid", {}), "grid")
    _keys(ctx, g, "grid", optional=("max_length_um", "lambda_fraction", "frequency_hz",
                                     "min_pieces"))
    kwargs = {}
    for k in ("max_length_um", "lambda_fraction", "frequency_hz"):
        if k in g:
            kwargs[k] = _num(ctx, g, k, "grid", lo=0, lo_open=True,
                             unit="Hz" if k == "frequency_hz" else None)
    if "min_pieces" in g:
        kwargs["min_pieces"] = _num(ctx, g, "min_pieces", "grid", lo=1, integer=True)
    return SpacingRule(**kwargs)


def _labelled(ctx, data: dict, section: str) -> dict:
    t = _table(ctx, data.get(section, {}), section)
    for label, value in t.items():
        if not _LABEL.match(label):
            raise _err(ctx, _join(section, label), "labels may hold only letters, digits, '_' "
                                                   "and '-'")
        _table(ctx, value, _join(section, label))
    return t


def _channels(ctx, data: dict, grid):
    from .channels import CHANNELS
    from .profiles import ChannelPlacement, Selector, evaluate

    out = []
    for label, c in _labelled(ctx, data, "channels").items():
        p = _join("channels", label)
        _keys(ctx, c, p, required=("channel", "gmax"),
              optional=("selector", "parameters", "reversal_mV", "block_fraction",
                        "distal_channel", "distal_from_um"))
        channel = CHANNELS[_str(ctx, c, "channel", p, choices=sorted(CHANNELS))]
        block = _num(ctx, c, "block_fraction", p, 0.0, lo=0.0, hi=1.0, unit="")
        gmax = _profile(ctx, c["gmax"], _join(p, "gmax"), "S/cm²", scale=1.0 - block,
                        nonnegative=True)
        where = _selector(ctx, c, "selector", p)
        params = {}
        if "parameters" in c:
            pt = _table(ctx, c["parameters"], _join(p, "parameters"))
            _keys(ctx, pt, _join(p, "parameters"), optional=channel.parameter_names)
            params = {k: _profile(ctx, v, _join(_join(p, "parameters"), k), _unit_of(k) or "1")
                      for k, v in pt.items()}
        rev = (_profile(ctx, c["reversal_mV"], _join(p, "reversal_mV"), "mV")
               if "reversal_mV" in c else None)
        parts = [(channel, where)]
        if ("distal_channel" in c) != ("distal_from_um" in c):
            raise _err(ctx, _join(p, "distal_channel" if "distal_from_um" in c else "distal_from_um"),
                       "missing required key (distal_channel and distal_from_um go together)")
        if "distal_channel" in c:
            distal = CHANNELS[_str(ctx, c, "distal_channel", p, choices=sorted(CHANNELS))]
            at = _num(ctx, c, "distal_from_um", p, lo=0.0)
            lo, hi = where.path_distance_um or (0.0, math.inf)
            parts = [(channel, Selector(where.swc_types, (lo, min(hi, at)), where.branch_order))
                     if lo < min(hi, at) else None,
                     (distal, Selector(where.swc_types, (max(lo, at), hi), where.branch_order))
                     if max(lo, at) < hi else None]
            parts = [x for x in parts if x is not None]
        for ch, sel in parts:
            try:
                placement = ChannelPlacement(ch, gmax, sel, params, rev)
            except CableTreeError as exc:
                raise _err(ctx, p, str(exc)) from None
            idx = np.flatnonzero(sel.mask(grid))
            values = evaluate(placement.gmax_S_per_cm2, grid, idx)
            bad = np.flatnonzero(~(values >= 0))
            if bad.size:
                c0 = int(idx[bad[0]])
                raise _err(ctx, _join(p, "gmax"),
                           f"conductances must be >= 0 S/cm², but the profile gives "
                           f"{values[bad[0]]:.4g} at path distance "
                           f"{grid.path_distance_um[c0]:.1f} µm (compartment {c0}); add floor = 0")
            out.append(placement)
    return out


def _membrane_placements(ctx, data: dict):
    from .profiles import MEMBRANE_PARAMETERS, MembranePlacement, SpineCorrection

    out = []
    for label, c in _labelled(ctx, data, "membrane_profiles").items():
        p = _join("membrane_profiles", label)
        _keys(ctx, c, p, required=("parameter", "value"), optional=("selector",))
        name = _str(ctx, c, "parameter", p, choices=MEMBRANE_PARAMETERS)
        out.append(MembranePlacement(name, _profile(ctx, c["value"], _join(p, "value"),
                                                    _unit_of(name) or "1"),
                                     _selector(ctx, c, "selector", p)))
    for label, c in _labelled(ctx, data, "spines").items():
        p = _join("spines", label)
        _keys(ctx, c, p, required=("factor",), optional=("selector",))
        out.append(SpineCorrection(_profile(ctx, c["factor"], _join(p, "factor"), "1"),
                                   _selector(ctx, c, "selector", p)))
    return out


def _sites(ctx, data: dict, grid) -> dict:
    """label -> list of Site (one per distance for a list of distances)."""
    from .sites import Site, site_at_distance, site_on_branch, soma_site

    out: dict[str, list] = {}
    for label, s in _labelled(ctx, data, "sites").items():
        p = _join("sites", label)
        _keys(ctx, s, p, optional=("soma", "path_distance_um", "swc_types", "tolerance_um",
                                    "branch", "position"))
        kinds = [k for k in ("soma", "path_distance_um", "branch") if k in s]
        if len(kinds) != 1:
            raise _err(ctx, p, "a site needs exactly one of 'soma = true', 'path_distance_um' "
                               "or 'branch' (with 'position')")
        try:
            if kinds[0] == "soma":
                if s["soma"] is not True:
                    raise _err(ctx, _join(p, "soma"), f"expected true, got {_show(s['soma'])}")
                _keys(ctx, s, p, optional=("soma",))
                out[label] = [soma_site(grid, label)]
            elif kinds[0] == "branch":
                _keys(ctx, s, p, required=("branch", "position"), optional=("branch",))
                b = _num(ctx, s, "branch", p, lo=0, integer=True, unit="")
                if b >= grid.n_branches:
                    raise _err(ctx, _join(p, "branch"), f"branch {b} is off the tree (the grid "
                                                        f"has branches 0-{grid.n_branches - 1})")
                pos = _num(ctx, s, "position", p, lo=0.0, hi=1.0, unit="")
                out[label] = [site_on_branch(grid, b, pos, label)]
            else:
                types = _swc_types(ctx, s.get("swc_types", ["apical"]), _join(p, "swc_types"))
                tol = _num(ctx, s, "tolerance_um", p, -1.0, lo=0)
                raw = s["path_distance_um"]
                many = isinstance(raw, list)
                dists = (_numbers(ctx, s, "path_distance_um", p) if many
                         else [_num(ctx, s, "path_distance_um", p, lo=0)])
                sites = []
                for i, d in enumerate(dists):
                    where = f"{_join(p, 'path_distance_um')}" + (f"[{i}]" if many else "")
                    try:
                        site = site_at_distance(grid, d, types, None, None if tol < 0 else tol)
                    except CableTreeError as exc:
                        raise _err(ctx, where, f"site off the tree: {exc}") from None
                    sites.append(Site(f"{label}_{d:g}um" if many else label, site.compartment))
                out[label] = sites
        except CableTreeError as exc:
            if isinstance(exc, ScenarioError):
                raise
            raise _err(ctx, p, str(exc)) from None
    names = [x.name for v in out.values() for x in v]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise _err(ctx, "sites", f"site names must be unique; repeated: {dup}")
    return out


def _single_site(ctx, sites: dict, d: dict, path: str):
    label = _str(ctx, d, "site", path)
    if label not in sites:
        raise _err(ctx, _join(path, "site"), f"unknown site {label!r}{_suggest(label, sites)} "
                                             f"(sites defined: {', '.join(sites) or 'none'})")
    if len(sites[label]) != 1:
        raise _err(ctx, _join(path, "site"), f"site {label!r} is a list of {len(sites[label])} "
                                             "sites; inputs need a single site")
    return sites[label][0]


_CURRENTS = {
    "step": ("StepCurrent", ("amplitude_nA", "delay_ms", "duration_ms"), ()),
    "ramp": ("RampCurrent", ("start_nA", "stop_nA", "delay_ms", "duration_ms"), ()),
    "pulse_train": ("PulseTrainCurrent", ("amplitude_nA", "delay_ms", "pulse_duration_ms",
                                          "interval_ms", "n_pulses"), ()),
    "noise": ("NoiseCurrent", ("mean_nA", "std_nA", "delay_ms", "duration_ms"),
              ("sample_interval_ms", "seed")),
    "sampled": ("SampledCurrent", ("time_ms", "current_nA"), ()),
}
_INPUT_TYPES = tuple(_CURRENTS) + ("synapse",)
_EVENT_KINDS = {
    "explicit": (("times_ms",), ()),
    "regular": (("start_ms", "interval_ms", "count"), ()),
    "bursts": (("start_ms", "n_bursts", "burst_interval_ms", "spikes_per_burst",
                "spike_interval_ms"), ()),
    "poisson": (("rate_hz", "start_ms", "stop_ms"), ("seed",)),
}
_KINETICS = ("ampa", "nmda", "alpha", "double_exponential")


def _check_time(ctx, path: str, t: float, t_stop: float) -> None:
    if not 0.0 <= t < t_stop:
        raise _err(ctx, path, f"time {t:g} ms is outside the run [0, {t_stop:g}) ms "
                              "(run.t_stop_ms)")


def _current(ctx, kind: str, d: dict, path: str, t_stop: float, run_seed: int, seeds: dict):
    from . import inputs

    cls_name, required, optional = _CURRENTS[kind]
    _keys(ctx, d, path, required=("type", "site") + required, optional=optional)
    if kind == "sampled":
        t = _numbers(ctx, d, "time_ms", path)
        i = _numbers(ctx, d, "current_nA", path)
        for k, x in enumerate(t):
            _check_time(ctx, f"{_join(path, 'time_ms')}[{k}]", x, t_stop + 1e-9)
        kwargs = {"time_ms": tuple(t), "current_values_nA": tuple(i)}
    else:
        kwargs = {}
        for k in required + optional:
            if k == "seed":
                kwargs[k] = _num(ctx, d, k, path, run_seed, lo=0, integer=True, unit="")
                seeds[_join(path, "seed")] = kwargs[k]
            elif k in d:
                positive = k in ("duration_ms", "pulse_duration_ms", "interval_ms",
                                 "sample_interval_ms")
                kwargs[k] = _num(ctx, d, k, path, lo=0 if (positive or k in ("delay_ms", "std_nA"))
                                 else None, lo_open=positive, integer=(k == "n_pulses"))
        if "delay_ms" in kwargs:
            _check_time(ctx, _join(path, "delay_ms"), kwargs["delay_ms"], t_stop)
    try:
        return getattr(inputs, cls_name)(**kwargs)
    except CableTreeError as exc:
        raise _err(ctx, path, str(exc)) from None


def _kinetics(ctx, d: dict, path: str):
    from .inputs import AMPA, NMDA, SynapseKinetics

    kind = _str(ctx, d, "kinetics", path, choices=_KINETICS)
    given = {k: _num(ctx, d, k, path, lo=0 if k != "reversal_mV" else None,
                     lo_open=k.startswith("tau"))
             for k in ("tau_ms", "tau_rise_ms", "tau_decay_ms", "reversal_mV", "mg_mM") if k in d}
    allowed = {"ampa": ("tau_rise_ms", "tau_decay_ms", "reversal_mV"),
               "nmda": ("tau_rise_ms", "tau_decay_ms", "reversal_mV", "mg_mM"),
               "alpha": ("tau_ms", "reversal_mV"),
               "double_exponential": ("tau_rise_ms", "tau_decay_ms", "reversal_mV", "mg_mM")}[kind]
    for k in given:
        if k not in allowed:
            raise _err(ctx, _join(path, k), f"not a parameter of {kind} kinetics (allowed: "
                                            f"{', '.join(allowed)})")
    try:
        if kind == "alpha":
            if "tau_ms" not in given:
                raise _err(ctx, _join(path, "tau_ms"), "missing required key for alpha kinetics")
            return SynapseKinetics("alpha", "alpha", given["tau_ms"], given["tau_ms"],
                                   given.get("reversal_mV", 0.0))
        if kind == "double_exponential":
            for k in ("tau_rise_ms", "tau_decay_ms"):
                if k not in given:
                    raise _err(ctx, _join(path, k), "missing required key for "
                                                    "double_exponential kinetics")
            return SynapseKinetics("double_exponential", "double_exponential",
                                   given["tau_rise_ms"], given["tau_decay_ms"],
                                   given.get("reversal_mV", 0.0), given.get("mg_mM"))
        base = AMPA if kind == "ampa" else NMDA
        return dataclasses.replace(base, **{k: v for k, v in given.items()})
    except ScenarioError:
        raise
    except CableTreeError as exc:
        raise _err(ctx, path, str(exc)) from None


def _events(ctx, d: dict, path: str, t_stop: float, n_synapses: int, seed_default: int,
            seeds: dict) -> list:
    from . import inputs

    p = _join(path, "events")
    e = _table(ctx, d.get("events"), p) if "events" in d else None
    if e is None:
        raise _err(ctx, p, "missing required key")
    kind = _str(ctx, e, "kind", p, choices=sorted(_EVENT_KINDS))
    required, optional = _EVENT_KINDS[kind]
    _keys(ctx, e, p, required=("kind",) + required, optional=optional)
    if kind == "explicit":
        times = _numbers(ctx, e, "times_ms", p)
        for i, t in enumerate(times):
            _check_time(ctx, f"{_join(p, 'times_ms')}[{i}]", t, t_stop)
        return [inputs.explicit_events(times)] * n_synapses
    ints = ("count", "n_bursts", "spikes_per_burst")
    v = {k: _num(ctx, e, k, p, lo=0, integer=k in ints,
                 lo_open=k in ("interval_ms", "burst_interval_ms", "spike_interval_ms"))
         for k in required}
    _check_time(ctx, _join(p, "start_ms"), v["start_ms"], t_stop)
    if kind == "regular":
        train = inputs.regular_events(v["start_ms"], v["interval_ms"], v["count"])
    elif kind == "bursts":
        train = inputs.burst_events(v["start_ms"], v["n_bursts"], v["burst_interval_ms"],
                                    v["spikes_per_burst"], v["spike_interval_ms"])
    else:
        if v["stop_ms"] > t_stop:
            raise _err(ctx, _join(p, "stop_ms"), f"time {v['stop_ms']:g} ms is outside the run "
                                                 f"[0, {t_stop:g}] ms (run.t_stop_ms)")
        if v["stop_ms"] < v["start_ms"]:
            raise _err(ctx, _join(p, "stop_ms"), "expected stop_ms >= start_ms")
        seed = _num(ctx, e, "seed", p, seed_default, lo=0, integer=True, unit="")
        seeds[_join(p, "seed")] = seed
        return [inputs.poisson_events(v["rate_hz"], v["start_ms"], v["stop_ms"], seed=[seed, i])
                for i in range(n_synapses)]
    late = [t for t in train.times_ms if t >= t_stop]
    if late:
        raise _err(ctx, p, f"event at {late[0]:g} ms is outside the run [0, {t_stop:g}) ms "
                           "(run.t_stop_ms)")
    return [train] * n_synapses


def _synapse_sites(ctx, d: dict, path: str, grid, sites: dict, seed_default: int, seeds: dict):
    from .sites import Site

    if ("site" in d) == ("selector" in d):
        raise _err(ctx, path, "give exactly one of 'site' (a site label) or 'selector' "
                              "(with 'count' or 'density_per_um')")
    if "site" in d:
        for k in ("count", "density_per_um", "placement_seed"):
            if k in d:
                raise _err(ctx, _join(path, k), "only used with 'selector'")
        return [_single_site(ctx, sites, d, path)]
    if ("count" in d) == ("density_per_um" in d):
        raise _err(ctx, path, "with 'selector', give exactly one of 'count' or 'density_per_um'")
    mask = _selector(ctx, d, "selector", path).mask(grid)
    idx = np.flatnonzero(mask)
    length = grid.length_um[idx]
    if idx.size == 0 or length.sum() <= 0:
        raise _err(ctx, _join(path, "selector"), "selects no dendrite of the tree (off the tree)")
    if "count" in d:
        n = _num(ctx, d, "count", path, lo=1, integer=True, unit="")
    else:
        n = int(round(_num(ctx, d, "density_per_um", path, lo=0, lo_open=True, unit="1/µm")
                      * float(length.sum())))
        if n < 1:
            raise _err(ctx, _join(path, "density_per_um"), "gives no synapse on the selected "
                                                            f"{length.sum():.1f} µm of dendrite")
    seed = _num(ctx, d, "placement_seed", path, seed_default, lo=0, integer=True, unit="")
    seeds[_join(path, "placement_seed")] = seed
    rng = np.random.default_rng(seed)
    chosen = rng.choice(idx, size=n, replace=True, p=length / length.sum())
    label = path.split(".")[-1]
    return [Site(f"{label}_{i}", int(c)) for i, c in enumerate(chosen)]


def _inputs(ctx, data: dict, grid, sites: dict, t_stop: float, run_seed: int, seeds: dict):
    from .cell import CurrentInjection, SynapseGroup

    injections, groups = [], []
    for label, d in _labelled(ctx, data, "inputs").items():
        p = _join("inputs", label)
        kind = _str(ctx, d, "type", p, choices=_INPUT_TYPES)
        if kind != "synapse":
            waveform = _current(ctx, kind, d, p, t_stop, run_seed, seeds)
            injections.append(CurrentInjection(_single_site(ctx, sites, d, p), waveform))
            continue
        _keys(ctx, d, p, required=("type", "kinetics", "weight_nS", "events"),
              optional=("tau_ms", "tau_rise_ms", "tau_decay_ms", "reversal_mV", "mg_mM", "site",
                        "selector", "count", "density_per_um", "placement_seed"))
        kinetics = _kinetics(ctx, d, p)
        weight = _num(ctx, d, "weight_nS", p, lo=0)
        syn_sites = _synapse_sites(ctx, d, p, grid, sites, run_seed, seeds)
        trains = _events(ctx, d, p, t_stop, len(syn_sites), run_seed, seeds)
        kinetics = dataclasses.replace(kinetics, name=label)
        groups.append(SynapseGroup.from_synapses(kinetics, syn_sites, [weight] * len(syn_sites),
                                                 trains))
    return injections, groups


def _run_settings(ctx, data: dict):
    from .solver import BACKENDS, METHODS, RunSettings

    p = "run"
    if "run" not in data:
        raise _err(ctx, p, "missing required table [run]")
    r = _table(ctx, data["run"], p)
    _keys(ctx, r, p, required=("t_stop_ms",),
          optional=("dt_ms", "method", "record_interval_ms", "v_init_mV", "celsius", "seed",
                    "backend", "threads", "settle_ms", "rate_table_step_mV"))
    t_stop = _num(ctx, r, "t_stop_ms", p, lo=0, lo_open=True)
    dt = _num(ctx, r, "dt_ms", p, 0.025, lo=0, lo_open=True)
    if dt > t_stop:
        raise _err(ctx, "run.dt_ms", f"expected a time step shorter than run.t_stop_ms "
                                     f"({t_stop:g} ms), got {dt:g} ms")
    rec = _num(ctx, r, "record_interval_ms", p, dt, lo=0, lo_open=True)
    ratio = rec / dt
    if ratio < 1 - 1e-9 or abs(ratio - round(ratio)) > 1e-6:
        raise _err(ctx, "run.record_interval_ms", f"expected a whole multiple of run.dt_ms "
                                                  f"({dt:g} ms), got {rec:g} ms")
    settings = RunSettings(t_stop_ms=t_stop, dt_ms=dt,
                           method=_str(ctx, r, "method", p, choices=METHODS,
                                       default="crank_nicolson"),
                           record_interval_ms=rec, v_init_mV=_num(ctx, r, "v_init_mV", p, -65.0),
                           rate_table_step_mV=(_num(ctx, r, "rate_table_step_mV", p, lo=0,
                                                    lo_open=True, hi=10.0)
                                               if "rate_table_step_mV" in r else None))
    celsius = _num(ctx, r, "celsius", p, 34.0, lo=-5.0, hi=50.0, unit="°C")
    seed = _num(ctx, r, "seed", p, 0, lo=0, integer=True, unit="")
    backend = _str(ctx, r, "backend", p, choices=BACKENDS, default="auto")
    threads = _num(ctx, r, "threads", p, 1, lo=1, hi=256, integer=True, unit="")
    settle = _num(ctx, r, "settle_ms", p, 0.0, lo=0)
    return settings, celsius, seed, backend, threads, settle


def _analysis_check(ctx, data: dict, site_names: set, t_stop: float) -> None:
    from .report import check_analysis

    try:
        check_analysis(data.get("analysis", {}), site_names, t_stop,
                       input_labels=set(data.get("inputs", {})))
    except ScenarioError as exc:
        raise _err(ctx, "", str(exc)) from None


def _compile(data: dict, base_dir: str, source: str) -> _Compiled:
    from .cell import build_cell

    ctx = _Ctx(source, base_dir)
    if not isinstance(data, dict):
        raise _err(ctx, "", f"expected a table at the top level, got {_show(data)}")
    _keys(ctx, data, "", required=("morphology", "run"), optional=_TOP)
    settings, celsius, seed, backend, threads, settle = _run_settings(ctx, data)
    morph = _morphology(ctx, data)
    membrane = _membrane(ctx, data)
    rule = _grid_rule(ctx, data)
    from .grid import build_grid

    try:
        grid = build_grid(morph, rule, axial_resistivity_ohm_cm=membrane.axial_resistivity_ohm_cm,
                          cm_uF_per_cm2=membrane.cm_uF_per_cm2)
    except CableTreeError as exc:
        raise _err(ctx, "grid", str(exc)) from None
    channels = _channels(ctx, data, grid)
    placements = _membrane_placements(ctx, data)
    sites = _sites(ctx, data, grid)
    seeds: dict = {"run.seed": seed}
    injections, groups = _inputs(ctx, data, grid, sites, settings.t_stop_ms, seed, seeds)
    recording = [s for v in sites.values() for s in v]
    try:
        cell = build_cell(grid, membrane=membrane, channels=channels,
                          membrane_placements=placements, celsius=celsius, injections=injections,
                          synapses=groups, recording_sites=recording or None)
    except CableTreeError as exc:
        raise _err(ctx, "", f"the cell model cannot be built: {exc}") from None
    names = {s.name for s in cell.recording_sites}
    _analysis_check(ctx, data, names, settings.t_stop_ms)
    return _Compiled(cell, settings, backend, int(threads), settle, seeds,
                     {k: [s.name for s in v] for k, v in sites.items()})


# --------------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------------

def scenario_from_dict(data: Mapping, base_dir: str | os.PathLike = ".",
                       source: str = "<dict>") -> Scenario:
    """A validated scenario from nested dicts (as a TOML file would give).

    Parameters
    ----------
    data : mapping
        The scenario tables.
    base_dir : str or path-like
        Folder relative paths (``morphology.file``) are resolved against.
    source : str
        Name used in error messages.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        The scenario is invalid (message names the source and key path).
    """
    d = copy.deepcopy(dict(data))
    validate(d, base_dir=base_dir, source=source)
    return Scenario(d, source, os.fspath(base_dir), "")


def load_scenario(path: str | os.PathLike) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : str or path-like
        The TOML file.

    Returns
    -------
    Scenario
        With ``base_dir`` the file's folder.

    Raises
    ------
    ScenarioError
        Unreadable file, TOML syntax error (with line and column) or invalid scenario.
    """
    path = os.fspath(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ScenarioError(f"{path}: cannot read the scenario file: {exc}") from None
    try:
        data = _toml.loads(text)
    except _toml.TOMLDecodeError as exc:
        raise ScenarioError(f"{path}: not valid TOML: {exc}") from None
    base = os.path.dirname(os.path.abspath(path))
    validate(data, base_dir=base, source=path)
    return Scenario(data, path, base, text)


def validate(scenario: Scenario | Mapping, base_dir: str | os.PathLike = ".",
             source: str = "<dict>") -> None:
    """Check a scenario strictly; return None or raise :class:`ScenarioError`.

    Checks unknown keys (with a close-match suggestion), missing keys, wrong types,
    strings given where a number with fixed units is expected, ranges (negative
    conductances, fractions outside 0-1), sites off the tree and times outside the
    run.  The morphology is read and discretised, so checks that need the tree are
    made too.

    Parameters
    ----------
    scenario : Scenario or mapping
        A Scenario (its own ``base_dir`` and ``source_path`` are used) or raw tables.
    base_dir : str or path-like
        For raw tables: folder relative paths are resolved against.
    source : str
        For raw tables: name used in messages.
    """
    if isinstance(scenario, Scenario):
        _compile(scenario.data, scenario.base_dir, scenario.source_path)
    else:
        _compile(dict(scenario), os.fspath(base_dir), source)


def _walk(data: dict, key: str, source: str, create: bool):
    parts = key.split(".")
    node = data
    for i, part in enumerate(parts[:-1]):
        here = ".".join(parts[:i + 1])
        if isinstance(node, list) and part.isdigit() and int(part) < len(node):
            node = node[int(part)]
        elif isinstance(node, dict) and part in node:
            node = node[part]
        else:
            known = list(node) if isinstance(node, dict) else []
            raise ScenarioError(f"{source}: {here}: unknown key path in override {key!r}"
                                f"{_suggest(part, known)}")
        if not isinstance(node, (dict, list)):
            raise ScenarioError(f"{source}: {here}: is a value, not a table; cannot set {key!r}")
    last = parts[-1]
    if isinstance(node, list):
        if not (last.isdigit() and int(last) < len(node)):
            raise ScenarioError(f"{source}: {key}: list index out of range in override")
        return node, int(last)
    if last not in node and not create:
        raise ScenarioError(f"{source}: {key}: unknown key path{_suggest(last, list(node))}")
    return node, last


def get_value(scenario: Scenario, key: str):
    """The value at a dotted key path, e.g. ``"channels.ka.gmax.slope_per_um"``."""
    node, last = _walk(scenario.data, key, scenario.source_path, create=False)
    return node[last]


def with_overrides(scenario: Scenario, overrides: Mapping[str, Any]) -> Scenario:
    """A copy of a scenario with values replaced at dotted key paths, validated again.

    A path must lead through existing tables; its last key may be new (it is then
    checked like any key, so a misspelt key is refused with a suggestion).  Numeric
    parts index lists (``sites.apical.path_distance_um.2``).

    Parameters
    ----------
    scenario : Scenario
    overrides : mapping of str to value
        ``{"channels.ka_gradient.block_fraction": 0.5, ...}``.

    Returns
    -------
    Scenario
        ``text`` is left empty (use :func:`dump_scenario` for the effective text).
    """
    data = copy.deepcopy(scenario.data)
    for key, value in overrides.items():
        node, last = _walk(data, str(key), scenario.source_path, create=True)
        node[last] = copy.deepcopy(value.tolist() if isinstance(value, np.ndarray) else
                                   value.item() if isinstance(value, np.generic) else value)
    _compile(data, scenario.base_dir, scenario.source_path)
    return Scenario(data, scenario.source_path, scenario.base_dir, "")


def build_cell_model(scenario: Scenario):
    """The cell model and run settings a scenario describes.

    Returns
    -------
    (CellModel, RunSettings)
    """
    c = _compile(scenario.data, scenario.base_dir, scenario.source_path)
    return c.cell, c.settings


def scenario_seeds(scenario: Scenario) -> dict:
    """Every seed the scenario uses (given or defaulted to ``run.seed``), by key path."""
    return dict(_compile(scenario.data, scenario.base_dir, scenario.source_path).seeds)


def _settled_state(cell, settings, settle_ms: float, backend: str, threads: int):
    from .cell import SynapseGroup
    from .solver import RunSettings, simulate

    quiet = [SynapseGroup(g.kinetics, g.compartment, g.weight_nS, np.zeros(0),
                          np.zeros(0, np.int64)) for g in cell.synapses]
    rest = cell.with_inputs(injections=(), synapses=quiet)
    pre = RunSettings(t_stop_ms=settle_ms, dt_ms=settings.dt_ms, method=settings.method,
                      v_init_mV=settings.v_init_mV,
                      rate_table_step_mV=settings.rate_table_step_mV,
                      rate_table_range_mV=settings.rate_table_range_mV)
    state = simulate(rest, pre, backend=backend, threads=threads).final_state
    return dataclasses.replace(state, time_ms=0.0)


def run_scenario(scenario: Scenario, backend: str = "auto", progress=None,
                 threads: int | None = None):
    """Run a scenario and return its labelled results.

    Parameters
    ----------
    scenario : Scenario
    backend : {"auto", "reference", "compiled"}
        Solver backend; ``"auto"`` defers to ``run.backend`` of the scenario.
    progress : callable, optional
        ``progress(fraction_done, time_ms)``, called during the recorded run (see
        :func:`cabletree.solver.simulate`).
    threads : int, optional
        Threads for the compiled backend (see :func:`cabletree.solver.simulate`);
        ``None`` defers to ``run.threads`` of the scenario.

    Returns
    -------
    xarray.Dataset
        See :mod:`cabletree.results`; ``attrs["scenario"]`` holds the TOML text of the
        effective scenario, ``attrs["seeds"]`` every seed used (``key=value; ...``) and
        ``attrs["run_seed"]`` the run seed.

    Raises
    ------
    ScenarioError
        Invalid scenario.
    NumericalInstabilityError
        The run blew up (time and compartment named).
    """
    from .results import make_dataset
    from .solver import simulate

    c = _compile(scenario.data, scenario.base_dir, scenario.source_path)
    chosen = c.backend if backend == "auto" else backend
    n_threads = c.threads if threads is None else threads
    state = (_settled_state(c.cell, c.settings, c.settle_ms, chosen, n_threads)
             if c.settle_ms > 0 else None)
    out = simulate(c.cell, c.settings, initial_state=state, backend=chosen, progress=progress,
                   threads=n_threads)
    ds = make_dataset(c.cell, out, scenario_text=dump_scenario(scenario))
    ds.attrs["seeds"] = "; ".join(f"{k}={v}" for k, v in c.seeds.items())
    ds.attrs["run_seed"] = int(c.seeds["run.seed"])
    ds.attrs["settle_ms"] = float(c.settle_ms)
    ds.attrs["scenario_source"] = scenario.source_path
    return ds


# --------------------------------------------------------------------------------------------
# TOML writer
# --------------------------------------------------------------------------------------------

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def _key(k: str) -> str:
    return k if _BARE.match(k) else json.dumps(k)


def _scalar(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        v = float(v)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_scalar(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_key(k)} = {_scalar(x)}" for k, x in v.items()) + "}"
    raise ScenarioError(f"cannot write {type(v).__name__} {v!r} to a scenario file")


def _dump_table(lines: list, d: dict, path: tuple) -> None:
    plain = [(k, v) for k, v in d.items() if not isinstance(v, dict)]
    tables = [(k, v) for k, v in d.items() if isinstance(v, dict)]
    if path and (plain or not tables):
        lines.append(("\n" if lines else "") + "[" + ".".join(_key(p) for p in path) + "]")
    for k, v in plain:
        lines.append(f"{_key(k)} = {_scalar(v)}")
    for k, v in tables:
        _dump_table(lines, v, path + (k,))


def dump_scenario(scenario: Scenario | Mapping) -> str:
    """TOML text of a scenario (a small writer for the value types scenarios use).

    ``load_scenario`` of the text written to a file in the same folder gives an
    equal scenario.

    Parameters
    ----------
    scenario : Scenario or mapping

    Returns
    -------
    str
    """
    data = scenario.data if isinstance(scenario, Scenario) else dict(scenario)
    lines: list[str] = []
    _dump_table(lines, data, ())
    return "\n".join(lines) + "\n"


def save_scenario(scenario: Scenario, path: str | os.PathLike) -> Path:
    """Write a scenario file; a relative ``morphology.file`` is re-based on the new folder.

    Returns
    -------
    Path
        The written file.
    """
    target = Path(path)
    data = copy.deepcopy(scenario.data)
    m = data.get("morphology", {})
    if "file" in m and not os.path.isabs(m["file"]):
        absolute = os.path.abspath(os.path.join(scenario.base_dir, m["file"]))
        m["file"] = os.path.relpath(absolute, os.path.abspath(target.parent or "."))
    from .fileio import write_atomically

    write_atomically(target, lambda tmp: tmp.write_text(dump_scenario(data), encoding="utf-8"))
    return target
