"""The ``[analysis]`` section of a scenario: which features to compute and which figures to draw.

This module only wires :mod:`cabletree.analysis` and :mod:`cabletree.plots` together
according to a scenario's ``[analysis]`` table; it computes nothing itself.

Keys of ``[analysis]`` (all optional)
-------------------------------------
``figures``
    List of figure names among :data:`FIGURES` (default: all that apply).
``formats``
    List of file formats among ``png``, ``svg``, ``pdf`` (default ``["png"]``).
``morphology_values``
    A per-compartment variable of the results (e.g. ``"gmax_ka_distal"``) or a list of
    them (summed) to colour the morphology by; default: the sum of all ``gmax_ka*``
    maps if present, else none.
``morphology_label``
    Colour-bar label (default: from the variable).
``[analysis.spikes]``
    Spike counts, latency and rate per site (:func:`cabletree.analysis.spike_features`):
    ``onset_ms`` (0), ``threshold_mV`` (-20).
``[analysis.bap]``
    Back-propagation features (:func:`cabletree.analysis.bap_features`):
    ``window_ms`` ([lo, hi]), ``soma_site`` ("soma").
``[analysis.epsp]``
    EPSP features (:func:`cabletree.analysis.epsp_features`): ``onset_ms`` (required),
    ``baseline_ms`` (5).
``[analysis.dendritic_spike]``
    Local spike test (:func:`cabletree.analysis.detect_dendritic_spike`): ``site``
    (required), ``soma_site`` ("soma"), ``threshold_mV`` (-20), ``window_ms``.
``[analysis.threshold]``
    Threshold search by bisection (:func:`cabletree.threshold.find_threshold`):
    ``keys`` (dotted key paths set to the searched value times ``factors``), ``factors``
    (default all 1), ``low``, ``high``, ``tolerance``, ``max_runs`` (20); the criterion
    is ``[analysis.dendritic_spike]``, which must be present.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import ScenarioError

__all__ = ["FIGURES", "FORMATS", "check_analysis", "compute_features", "draw_figures",
           "write_feature_tables"]

#: Figures that :func:`draw_figures` can draw.
FIGURES = ("summary", "traces", "feature_vs_distance", "morphology", "profiles")
#: File formats of figures.
FORMATS = ("png", "svg", "pdf")

_SECTIONS = {
    "spikes": ((), ("onset_ms", "threshold_mV")),
    "bap": ((), ("window_ms", "soma_site")),
    "epsp": (("onset_ms",), ("baseline_ms",)),
    "dendritic_spike": (("site",), ("soma_site", "threshold_mV", "window_ms")),
    "threshold": (("keys", "low", "high", "tolerance"), ("factors", "max_runs")),
}
_TOP_KEYS = ("figures", "formats", "morphology_values", "morphology_label") + tuple(_SECTIONS)


def _fail(path: str, message: str) -> ScenarioError:
    return ScenarioError(f"{path}: {message}")


def _suggest(name, known) -> str:
    import difflib

    close = difflib.get_close_matches(str(name), list(known), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def _is_num(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _check_window(path: str, value, t_stop: float) -> None:
    if not (isinstance(value, list) and len(value) == 2 and all(_is_num(x) for x in value)
            and value[0] < value[1]):
        raise _fail(path, f"expected [lo, hi] in ms with lo < hi, got {value!r}")
    if value[0] < 0 or value[1] > t_stop:
        raise _fail(path, f"window {value!r} ms is outside the run [0, {t_stop:g}] ms "
                          "(run.t_stop_ms)")


def check_analysis(analysis: dict, site_names: set, t_stop_ms: float,
                   input_labels: set = frozenset()) -> None:
    """Check an ``[analysis]`` table; raise ScenarioError naming the key path.

    Parameters
    ----------
    analysis : dict
        The table.
    site_names : set of str
        Recording sites of the cell.
    t_stop_ms : float
        Run length, ms.
    input_labels : set of str
        Labels of ``[inputs]`` (threshold keys must address existing inputs).
    """
    if not isinstance(analysis, dict):
        raise _fail("analysis", "expected a table")
    for key, value in analysis.items():
        p = f"analysis.{key}"
        if key not in _TOP_KEYS:
            raise _fail(p, f"unknown key{_suggest(key, _TOP_KEYS)} (allowed here: "
                           f"{', '.join(_TOP_KEYS)})")
        if key in ("figures", "formats"):
            choices = FIGURES if key == "figures" else FORMATS
            if not isinstance(value, list):
                raise _fail(p, f"expected a list of names among {', '.join(choices)}")
            for i, v in enumerate(value):
                if v not in choices:
                    raise _fail(f"{p}[{i}]", f"unknown value {v!r}{_suggest(v, choices)} "
                                             f"(expected one of {', '.join(choices)})")
        elif key == "morphology_values":
            names = [value] if isinstance(value, str) else value
            if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
                raise _fail(p, "expected a variable name or a list of them")
        elif key == "morphology_label":
            if not isinstance(value, str):
                raise _fail(p, "expected a string")
        else:
            _check_section(key, value, site_names, t_stop_ms, input_labels)
    if "threshold" in analysis and "dendritic_spike" not in analysis:
        raise _fail("analysis.threshold", "needs [analysis.dendritic_spike] as its criterion")


def _check_section(name, value, site_names, t_stop, input_labels) -> None:
    p = f"analysis.{name}"
    if not isinstance(value, dict):
        raise _fail(p, "expected a table")
    required, optional = _SECTIONS[name]
    allowed = required + optional
    for k in value:
        if k not in allowed:
            raise _fail(f"{p}.{k}", f"unknown key{_suggest(k, allowed)} (allowed here: "
                                    f"{', '.join(allowed)})")
    for k in required:
        if k not in value:
            raise _fail(f"{p}.{k}", "missing required key")
    for k, v in value.items():
        q = f"{p}.{k}"
        if k.endswith("site"):
            if v not in site_names:
                raise _fail(q, f"unknown site {v!r}{_suggest(v, site_names)} (recorded sites: "
                               f"{', '.join(sorted(site_names))})")
        elif k == "window_ms":
            _check_window(q, v, t_stop)
        elif k == "keys":
            if not isinstance(v, list) or not v or not all(isinstance(x, str) for x in v):
                raise _fail(q, "expected a non-empty list of dotted key paths")
            for i, key in enumerate(v):
                parts = key.split(".")
                if parts[0] != "inputs" or len(parts) < 3 or parts[1] not in input_labels:
                    raise _fail(f"{q}[{i}]", f"expected a key path inside [inputs.<label>], "
                                             f"got {key!r}")
        elif k == "factors":
            if not isinstance(v, list) or len(v) != len(value.get("keys", [])) or not all(
                    _is_num(x) and x > 0 for x in v):
                raise _fail(q, "expected one positive number per entry of 'keys'")
        elif k == "max_runs":
            if not isinstance(v, int) or isinstance(v, bool) or v < 2:
                raise _fail(q, f"expected an integer >= 2, got {v!r}")
        else:
            if isinstance(v, str):
                raise _fail(q, f"expected a plain number (units are fixed by the key name), got "
                               f"the string {v!r}")
            if not _is_num(v):
                raise _fail(q, f"expected a number, got {v!r}")
            if k == "onset_ms" and not 0 <= v < t_stop:
                raise _fail(q, f"time {v:g} ms is outside the run [0, {t_stop:g}) ms "
                               "(run.t_stop_ms)")
    if name == "threshold":
        if not 0 <= value["low"] < value["high"]:
            raise _fail(f"{p}.high", f"expected 0 <= low < high, got low = {value['low']!r}, "
                                     f"high = {value['high']!r}")
        if not value["tolerance"] > 0:
            raise _fail(f"{p}.tolerance", f"expected a number > 0, got {value['tolerance']!r}")


def compute_features(ds: xr.Dataset, analysis: dict) -> dict[str, xr.Dataset]:
    """Features named in ``analysis`` (already checked) for one run.

    Returns
    -------
    dict of str to xarray.Dataset
        ``"spikes"``, ``"bap"``, ``"epsp"`` as requested (Datasets over ``site``), and
        ``"dendritic_spike"`` as a one-row Dataset over ``site``.
    """
    from . import analysis as an

    out: dict[str, xr.Dataset] = {}
    if "spikes" in analysis:
        a = analysis["spikes"]
        out["spikes"] = an.spike_features(ds, onset_ms=float(a.get("onset_ms", 0.0)),
                                          threshold_mV=float(a.get("threshold_mV", -20.0)))
    if "bap" in analysis:
        a = analysis["bap"]
        window = tuple(a["window_ms"]) if "window_ms" in a else None
        out["bap"] = an.bap_features(ds, soma_site=a.get("soma_site", "soma"), window_ms=window)
    if "epsp" in analysis:
        a = analysis["epsp"]
        out["epsp"] = an.epsp_features(ds, float(a["onset_ms"]),
                                       baseline_ms=float(a.get("baseline_ms", 5.0)))
    if "dendritic_spike" in analysis:
        a = analysis["dendritic_spike"]
        r = dendritic_spike(ds, a)
        out["dendritic_spike"] = xr.Dataset(
            {"occurred": ("site", np.array([int(r.occurred)], dtype=np.int32),
                          {"units": "1", "long_name": "dendritic spike before the soma (1 yes)"}),
             "dendritic_crossing_ms": ("site", [r.dendritic_crossing_ms],
                                       {"units": "ms", "long_name": "dendritic threshold crossing"}),
             "soma_crossing_ms": ("site", [r.soma_crossing_ms],
                                  {"units": "ms", "long_name": "somatic threshold crossing"}),
             "lead_ms": ("site", [r.lead_ms], {"units": "ms",
                                               "long_name": "dendrite lead over the soma"})},
            coords={"site": ("site", [str(a["site"])])})
    return out


def dendritic_spike(ds: xr.Dataset, spec: dict):
    """:func:`cabletree.analysis.detect_dendritic_spike` with the settings of a spec table."""
    from .analysis import detect_dendritic_spike

    window = tuple(spec["window_ms"]) if "window_ms" in spec else None
    return detect_dendritic_spike(ds, spec["site"], spec.get("soma_site", "soma"),
                                  float(spec.get("threshold_mV", -20.0)), window_ms=window)


def write_feature_tables(features: dict[str, xr.Dataset], out_dir) -> list[Path]:
    """Write each feature Dataset as ``<name>.csv`` (units in the headers) into ``out_dir``."""
    from .analysis import features_table

    paths = []
    for name, f in features.items():
        path = Path(out_dir) / f"{name}.csv"
        features_table(f, path)
        paths.append(path)
    return paths


def _morphology_values(ds: xr.Dataset, analysis: dict):
    names = analysis.get("morphology_values")
    if names is None:
        names = [n for n in ds.data_vars if n.startswith("gmax_ka")]
        label = "A-type K⁺ gmax (S/cm²)" if names else None
    else:
        names = [names] if isinstance(names, str) else list(names)
        missing = [n for n in names if n not in ds.data_vars]
        if missing:
            raise ScenarioError(f"analysis.morphology_values: the results have no per-compartment "
                                f"variable {missing[0]!r}{_suggest(missing[0], ds.data_vars)}")
        units = ds[names[0]].attrs.get("units", "")
        label = f"{' + '.join(names)} ({units.replace('S cm-2', 'S/cm²')})"
    if not names:
        return None, None
    values = sum(np.asarray(ds[n].values, dtype=float) for n in names)
    return values, analysis.get("morphology_label", label)


def _distance_feature(features: dict):
    for name, variable, title in (("bap", "amplitude_mV", "bAP amplitude"),
                                  ("epsp", "amplitude_mV", "EPSP amplitude")):
        if name in features:
            return features[name], variable, title
    return None, None, None


def _draw(kind: str, ds: xr.Dataset, features: dict, analysis: dict):
    import matplotlib.pyplot as plt

    from . import plots

    values, label = _morphology_values(ds, analysis)
    feat, variable, title = _distance_feature(features)
    if kind == "traces":
        fig, ax = plt.subplots(figsize=(6.0, 4.0), layout="constrained")
        plots.plot_traces(ds, ax=ax)
    elif kind == "morphology":
        fig, ax = plt.subplots(figsize=(4.5, 6.0), layout="constrained")
        plots.plot_morphology(ds, values, ax=ax, colorbar_label=label, sites=True)
    elif kind == "feature_vs_distance":
        if feat is None:
            return None
        fig, ax = plt.subplots(figsize=(5.0, 3.6), layout="constrained")
        plots.plot_feature_vs_distance(feat, variable, ax=ax)
        ax.set_title(title)
    elif kind == "profiles":
        maps = {n[len("gmax_"):]: ds[n].values for n in ds.data_vars if n.startswith("gmax_")}
        if not maps:
            return None
        fig, ax = plt.subplots(figsize=(5.0, 3.6), layout="constrained")
        plots.plot_profiles(ds["compartment_path_distance_um"].values, maps, ax=ax)
    else:  # summary
        fig = plt.figure(figsize=(12.0, 4.6), layout="constrained")
        fig.get_layout_engine().set(wspace=0.08)
        axes = fig.subplots(1, 3, width_ratios=(0.8, 1.2, 1.0))
        plots.plot_morphology(ds, values, ax=axes[0], colorbar_label=label, sites=True)
        plots.plot_traces(ds, ax=axes[1])
        axes[1].set_title("membrane potential")
        if feat is not None:
            plots.plot_feature_vs_distance(feat, variable, ax=axes[2])
            axes[2].set_title(title)
        else:
            axes[2].set_axis_off()
    return fig


def draw_figures(ds: xr.Dataset, features: dict, analysis: dict, out_dir,
                 formats=None) -> list[Path]:
    """Draw the figures named in ``analysis`` into ``out_dir``.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    features : dict of str to Dataset
        From :func:`compute_features`.
    analysis : dict
        The ``[analysis]`` table.
    out_dir : path-like
        Output folder (created if needed).
    formats : sequence of str, optional
        Overrides ``analysis.formats``.

    Returns
    -------
    list of Path
        The written files.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from .plots import save_figure

    os.makedirs(out_dir, exist_ok=True)
    kinds = analysis.get("figures", list(FIGURES))
    fmts = list(formats) if formats else list(analysis.get("formats", ["png"]))
    written = []
    for kind in kinds:
        fig = _draw(kind, ds, features, analysis)
        if fig is None:
            continue
        try:
            for fmt in fmts:
                written.append(save_figure(fig, Path(out_dir) / f"{kind}.{fmt}", dpi=150))
        finally:
            plt.close(fig)
    return written
