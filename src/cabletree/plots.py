"""Figures of morphologies, traces and features with matplotlib.

Every function takes an optional ``ax`` (a new figure is made when it is None), imports
matplotlib only when called, and returns the artist(s) it drew; the Axes is ``artist.axes``.
Nothing here computes features: call :mod:`cabletree.analysis` first and pass its output in.

Styling is plain and neutral: labelled axes with units, no top/right spines, perceptually
uniform colour maps from matplotlib's own set (viridis, cividis, magma, ...).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from cabletree.analysis import _unit_parts
from cabletree.fileio import write_atomically
from cabletree.errors import ResultsError

__all__ = [
    "plot_morphology",
    "plot_traces",
    "plot_feature_vs_distance",
    "plot_profiles",
    "save_figure",
    "site_label",
]

_FONT_SIZE = 10
_PROJECTIONS = {"xy": ("x", "y"), "xz": ("x", "z"), "yz": ("y", "z")}
_TYPE_NAMES = {1: "soma", 2: "axon", 3: "basal", 4: "apical"}
_SAVE_FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}
_COMPARTMENT_KEYS = ("x_um", "y_um", "z_um", "diameter_um", "parent")


def _axes(ax):
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=(5.0, 3.6), layout="constrained")
    return ax


def _tidy(ax, xlabel: str, ylabel: str) -> None:
    ax.set_xlabel(xlabel, fontsize=_FONT_SIZE)
    ax.set_ylabel(ylabel, fontsize=_FONT_SIZE)
    ax.tick_params(labelsize=_FONT_SIZE - 1)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _label_with_units(attrs: Mapping[str, Any], fallback: str) -> str:
    name = str(attrs.get("long_name", fallback))
    units = str(attrs.get("units", ""))
    if units in ("", "1"):
        return name
    return f"{name} ({_pretty_units(units)})"


def _pretty_units(units: str) -> str:
    """CF-style units for display: ``"S cm-2"`` → ``"S/cm²"``, ``"um"`` → ``"µm"``."""
    superscript = str.maketrans("0123456789", "⁰¹²³⁴⁵⁶⁷⁸⁹")

    def piece(symbol: str, power: int) -> str:
        symbol = "µ" + symbol[1:] if symbol.startswith("u") and len(symbol) > 1 else symbol
        return symbol + (str(abs(power)).translate(superscript) if abs(power) != 1 else "")

    parts = _unit_parts(units)
    up = " ".join(piece(s, p) for s, p in parts if p > 0) or "1"
    down = " ".join(piece(s, p) for s, p in parts if p < 0)
    return f"{up}/{down}" if down else up


def site_label(name: str, swc_type: int, path_distance_um: float) -> str:
    """Legend text for a site: ``"soma"`` or e.g. ``"apical 200 µm"``.

    Parameters
    ----------
    name : str
        Site name (used for SWC types without a plain name).
    swc_type : int
        SWC type code (1 soma, 2 axon, 3 basal, 4 apical).
    path_distance_um : float
        Path distance from the soma, µm.
    """
    if swc_type == 1:
        return "soma"
    kind = _TYPE_NAMES.get(int(swc_type))
    if kind is None:
        return name
    return f"{kind} {path_distance_um:.0f} µm"


def _compartment_arrays(source) -> dict[str, np.ndarray]:
    """Per-compartment geometry from a results Dataset or a mapping of arrays."""
    out = {}
    for key in _COMPARTMENT_KEYS:
        for candidate in (f"compartment_{key}", key):
            if candidate in source:
                out[key] = np.asarray(source[candidate])
                break
        else:
            raise ResultsError(f"plot_morphology: missing per-compartment array "
                               f"'compartment_{key}' (or '{key}')")
    return out


def _values_and_label(source, values, colorbar_label):
    if values is None:
        return None, colorbar_label
    if isinstance(values, str):
        if values not in source:
            raise ResultsError(f"plot_morphology: no per-compartment variable {values!r}")
        values = source[values]
    if isinstance(values, xr.DataArray):
        label = colorbar_label or _label_with_units(values.attrs, str(values.name))
        return np.asarray(values.values, dtype=float), label
    return np.asarray(values, dtype=float), colorbar_label


def plot_morphology(ds_or_arrays, values=None, ax=None, projection: str = "xy",
                    cmap: str = "viridis", colorbar_label: str | None = None,
                    sites: Sequence[str] | bool | None = None, scale_bar_um: float | None = 100.0,
                    linewidth_per_um: float = 1.0):
    """Draw the compartment tree as a 2-D projection, optionally coloured by a quantity.

    Each compartment is a line from its parent's centre to its own; the root (soma) is a
    disc of its diameter.  Line widths are ``linewidth_per_um`` points per µm of diameter,
    clipped to 0.4–6 points so thin tufts stay visible and the trunk does not swamp the figure.

    Parameters
    ----------
    ds_or_arrays : xarray.Dataset or mapping
        A results Dataset (``compartment_x_um`` ... ``compartment_parent``) or a mapping with
        keys ``x_um, y_um, z_um, diameter_um, parent`` (µm; parent −1 at the root).
    values : str, DataArray or ndarray, shape (n_compartments,), optional
        Per-compartment colour quantity, e.g. ``"gmax_ka_distal"`` (S/cm²).
    ax : matplotlib Axes, optional
    projection : {"xy", "xz", "yz"}
        Plane of the projection.
    cmap : str
        Colour map name (use a perceptually uniform one).
    colorbar_label : str, optional
        Colour bar label (default ``long_name (units)`` of ``values``).
    sites : sequence of str or True, optional
        Sites of the Dataset to mark and label (True: all sites).
    scale_bar_um : float or None
        Length of the scale bar, µm (None: no bar).
    linewidth_per_um : float
        Line width per µm of diameter, points.

    Returns
    -------
    matplotlib.collections.LineCollection
        One segment per non-root compartment; its ``colorbar`` attribute holds the colour bar
        (None without ``values``).
    """
    from matplotlib.collections import LineCollection
    from matplotlib.patches import Circle

    if projection not in _PROJECTIONS:
        raise ResultsError(f"plot_morphology: projection must be one of {sorted(_PROJECTIONS)}, "
                           f"got {projection!r}")
    geo = _compartment_arrays(ds_or_arrays)
    colour, label = _values_and_label(ds_or_arrays, values, colorbar_label)
    h, v = _PROJECTIONS[projection]
    px, py = geo[f"{h}_um"], geo[f"{v}_um"]
    parent = geo["parent"].astype(int)
    child = np.flatnonzero(parent >= 0)
    segments = np.stack([np.column_stack([px[parent[child]], py[parent[child]]]),
                         np.column_stack([px[child], py[child]])], axis=1)
    widths = np.clip(geo["diameter_um"][child] * linewidth_per_um, 0.4, 6.0)
    ax = _axes(ax)
    lines = LineCollection(segments, linewidths=widths, capstyle="round")
    if colour is None:
        lines.set_color("0.25")
    else:
        lines.set_array(colour[child])
        lines.set_cmap(cmap)
    ax.add_collection(lines)
    for root in np.flatnonzero(parent < 0):
        face = "0.25" if colour is None else lines.cmap(lines.norm(colour[root]))
        ax.add_patch(Circle((px[root], py[root]), geo["diameter_um"][root] / 2.0, color=face))
    ax.autoscale_view()
    ax.set_aspect("equal")
    ax.set_axis_off()
    lines.colorbar = None
    if colour is not None:
        bar = ax.figure.colorbar(lines, ax=ax, shrink=0.8)
        bar.set_label(label or "", fontsize=_FONT_SIZE)
        bar.ax.tick_params(labelsize=_FONT_SIZE - 1)
        lines.colorbar = bar
    if sites:
        _mark_sites(ax, ds_or_arrays, sites, h, v)
    if scale_bar_um:
        from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

        ax.add_artist(AnchoredSizeBar(ax.transData, scale_bar_um, f"{scale_bar_um:g} µm",
                                      "lower right", frameon=False, size_vertical=0,
                                      fontproperties={"size": _FONT_SIZE - 1}))
    return lines


def _mark_sites(ax, ds, sites, h: str, v: str) -> None:
    if not isinstance(ds, xr.Dataset):
        raise ResultsError("plot_morphology: marking sites needs a results Dataset")
    names = [str(s) for s in ds["site"].values] if sites is True else [str(s) for s in sites]
    sub = ds.sel(site=names)
    xs, ys = sub[f"{h}_um"].values, sub[f"{v}_um"].values
    ax.plot(xs, ys, linestyle="none", marker="o", markersize=5, markerfacecolor="white",
            markeredgecolor="black", zorder=3)
    for name, x, y in zip(names, xs, ys):
        ax.annotate(name, (x, y), xytext=(5, 3), textcoords="offset points",
                    fontsize=_FONT_SIZE - 2)


def plot_traces(ds: xr.Dataset, sites: Sequence[str] | None = None, ax=None,
                variable: str = "v", cmap: str = "cividis"):
    """Overlay recorded traces (default membrane potential) of several sites.

    Lines are labelled by site type and path distance (``"soma"``, ``"apical 200 µm"``); the
    soma is black, other sites take colours from ``cmap`` in order of path distance.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    sites : sequence of str, optional
        Sites to draw (default all).
    ax : matplotlib Axes, optional
    variable : str
        Variable over (time, site) to draw, e.g. ``"v"`` (mV).
    cmap : str
        Colour map for the dendritic sites.

    Returns
    -------
    list of matplotlib.lines.Line2D
        One line per site, in the order drawn (by path distance).
    """
    import matplotlib

    if variable not in ds.data_vars:
        raise ResultsError(f"plot_traces: the Dataset has no variable {variable!r}")
    names = [str(s) for s in ds["site"].values] if sites is None else [str(s) for s in sites]
    sub = ds.sel(site=names).sortby("path_distance_um")
    ax = _axes(ax)
    colours = matplotlib.colormaps[cmap](np.linspace(0.0, 0.85, max(sub.sizes["site"], 2)))
    lines = []
    for k, name in enumerate(sub["site"].values):
        one = sub.sel(site=name)
        kind = int(one["swc_type"])
        label = site_label(str(name), kind, float(one["path_distance_um"]))
        (line,) = ax.plot(sub["time"].values, one[variable].values, linewidth=1.2,
                          color="black" if kind == 1 else colours[k], label=label)
        lines.append(line)
    _tidy(ax, _label_with_units(ds["time"].attrs, "time"),
          _label_with_units(ds[variable].attrs, variable))
    ax.legend(frameon=False, fontsize=_FONT_SIZE - 2)
    return lines


def plot_feature_vs_distance(features, variable: str = "amplitude_mV", ax=None,
                             swc_types: Sequence[int] | None = None):
    """A feature against path distance for one run or several labelled runs.

    Parameters
    ----------
    features : xarray.Dataset or sequence of (str, xarray.Dataset)
        Feature Dataset(s) over ``site`` with a ``path_distance_um`` coordinate, e.g. from
        :func:`cabletree.analysis.bap_features`.
    variable : str
        Feature to draw (its ``long_name`` and ``units`` label the y axis).
    ax : matplotlib Axes, optional
    swc_types : sequence of int, optional
        Only sites of these SWC types (default all).

    Returns
    -------
    list of matplotlib.lines.Line2D
        One line per run.
    """
    import matplotlib

    runs = [("", features)] if isinstance(features, xr.Dataset) else list(features)
    ax = _axes(ax)
    colours = matplotlib.colormaps["viridis"](np.linspace(0.0, 0.8, max(len(runs), 2)))
    lines = []
    for colour, (label, f) in zip(colours, runs):
        if variable not in f.variables:
            raise ResultsError(f"plot_feature_vs_distance: features {label!r} lack {variable!r}")
        if swc_types is not None:
            f = f.isel(site=np.flatnonzero(np.isin(f["swc_type"].values, list(swc_types))))
        f = f.sortby("path_distance_um")
        (line,) = ax.plot(f["path_distance_um"].values, f[variable].values, marker="o",
                          markersize=3.5, linewidth=1.2, color=colour, label=label or None)
        lines.append(line)
    first = runs[0][1]
    _tidy(ax, _label_with_units(first["path_distance_um"].attrs, "path distance"),
          _label_with_units(first[variable].attrs, variable))
    if any(label for label, _ in runs):
        ax.legend(frameon=False, fontsize=_FONT_SIZE - 2)
    return lines


def plot_profiles(compartment_distance_um, profiles: Mapping[str, Any], ax=None,
                  ylabel: str = "gmax (S/cm²)"):
    """Density profiles (e.g. gmax of each channel) against path distance.

    Compartments on different branches share distances, so values are drawn as markers
    rather than joined lines.

    Parameters
    ----------
    compartment_distance_um : array-like, shape (n_compartments,)
        Path distance of each compartment, µm.
    profiles : mapping of str to array-like, shape (n_compartments,)
        Name → per-compartment values (all in the units of ``ylabel``).
    ax : matplotlib Axes, optional
    ylabel : str
        y-axis label with units.

    Returns
    -------
    list of matplotlib.lines.Line2D
        One marker series per profile.
    """
    x = np.asarray(compartment_distance_um, dtype=float)
    order = np.argsort(x, kind="stable")
    ax = _axes(ax)
    lines = []
    for name, values in profiles.items():
        y = np.asarray(values, dtype=float)
        if y.shape != x.shape:
            raise ResultsError(f"plot_profiles: profile {name!r} has shape {y.shape}, expected "
                               f"{x.shape} (one value per compartment)")
        (line,) = ax.plot(x[order], y[order], linestyle="none", marker="o", markersize=3,
                          label=name)
        lines.append(line)
    _tidy(ax, "path distance (µm)", ylabel)
    ax.legend(frameon=False, fontsize=_FONT_SIZE - 2)
    return lines


def save_figure(fig, path: str | os.PathLike, *, dpi: int = 300) -> Path:
    """Save a figure as PNG, SVG or PDF (by suffix), atomically (temporary name, then rename).

    Parameters
    ----------
    fig : matplotlib Figure
    path : str or path-like
        Destination; suffix ``.png``, ``.svg`` or ``.pdf``.
    dpi : int
        Resolution for PNG, dots per inch.

    Returns
    -------
    Path
        The written path.
    """
    target = Path(path)
    fmt = _SAVE_FORMATS.get(target.suffix.lower())
    if fmt is None:
        raise ResultsError(f"save_figure: cannot write {str(target)!r}; expected a suffix in "
                           f"{sorted(_SAVE_FORMATS)}")
    return write_atomically(target, lambda tmp: fig.savefig(tmp, format=fmt, dpi=dpi))
