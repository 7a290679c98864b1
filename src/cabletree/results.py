"""Labelled results: one :class:`xarray.Dataset` per run, saved as NetCDF.

Layout (DESIGN §6)
------------------
- ``v`` (time, site): membrane potential, mV.
- coordinates on ``site``: ``site_compartment``, ``branch``, ``path_distance_um``,
  ``swc_type``, ``x_um``, ``y_um``, ``z_um``, ``diameter_um``.
- per-compartment map over ``compartment``: ``compartment_*`` geometry
  (path distance, SWC type, xyz, diameter, parent, area, branch, branch order),
  passive values (``cm_uF_per_cm2``, ``leak_S_per_cm2``, ``leak_reversal_mV``,
  ``axial_resistivity_ohm_cm``, ``spine_factor``) and ``gmax_<channel>`` (S/cm²,
  0 where the channel is absent) plus ``<channel>__<parameter>`` for channel
  parameters.
- attrs: ``method``, ``dt_ms``, ``t_stop_ms``, ``celsius``, ``backend``, ``rates``
  (``"exact"``, or how rates were tabulated), ``cabletree_version``, ``scenario``
  (the scenario text, may be empty).

Every variable and coordinate carries ``units`` and ``long_name``.  Files are
NetCDF3 written with xarray's scipy engine (no HDF5 stack needed); integers are
stored as 32-bit, as NetCDF3 requires.  Writes go to a temporary name and are
renamed, so a failed write never leaves a half-written file.
"""

from __future__ import annotations

import os
from importlib import metadata

import numpy as np
import xarray as xr

from .cell import CellModel
from .errors import ResultsError
from .fileio import write_atomically

__all__ = ["make_dataset", "compartment_map", "save_dataset", "load_dataset", "package_version"]


def package_version() -> str:
    """Installed version of cabletree."""
    try:
        return metadata.version("cabletree")
    except metadata.PackageNotFoundError:  # running from a source tree
        return "0+unknown"


def _attrs(units: str, long_name: str) -> dict:
    return {"units": units, "long_name": long_name}


def compartment_map(cell: CellModel) -> xr.Dataset:
    """Per-compartment map of geometry and every placed parameter.

    Parameters
    ----------
    cell : CellModel

    Returns
    -------
    xarray.Dataset
        Variables over the ``compartment`` dimension (see the module docstring).
    """
    g = cell.grid
    n = g.n_compartments
    data = {
        "compartment_path_distance_um": (g.path_distance_um, "um", "path distance from the soma centre"),
        "compartment_swc_type": (g.swc_type.astype(np.int32), "1", "SWC structure type"),
        "compartment_x_um": (g.xyz_um[:, 0], "um", "x position"),
        "compartment_y_um": (g.xyz_um[:, 1], "um", "y position"),
        "compartment_z_um": (g.xyz_um[:, 2], "um", "z position"),
        "compartment_diameter_um": (g.diameter_um, "um", "diameter"),
        "compartment_parent": (g.parent.astype(np.int32), "1", "parent compartment (-1: root)"),
        "compartment_area_um2": (g.area_um2, "um2", "membrane area (before spine factor)"),
        "compartment_branch": (g.branch.astype(np.int32), "1", "branch index (-1: soma)"),
        "compartment_branch_order": (g.branch_order.astype(np.int32), "1", "branch order"),
    }
    long = {"cm_uF_per_cm2": ("uF cm-2", "specific membrane capacitance"),
            "leak_S_per_cm2": ("S cm-2", "leak conductance density"),
            "leak_reversal_mV": ("mV", "leak reversal potential"),
            "axial_resistivity_ohm_cm": ("ohm cm", "axial resistivity"),
            "spine_factor": ("1", "spine area correction factor")}
    for name, arr in cell.membrane_values.items():
        u, ln = long[name]
        data[name] = (np.asarray(arr, dtype=float), u, ln)
    for block in cell.channels:
        gmax = np.zeros(n)
        gmax[block.index] = block.gmax_S_per_cm2
        data[f"gmax_{block.channel.name}"] = (gmax, "S cm-2",
                                              f"maximal conductance density of {block.channel.name}")
        for j, pname in enumerate(block.channel.parameter_names):
            vals = np.full(n, np.nan)
            vals[block.index] = block.parameters[j]
            data[f"{block.channel.name}__{pname}"] = (vals, _units_from_name(pname),
                                                      f"{block.channel.name} parameter {pname}")
    ds = xr.Dataset({k: ("compartment", v, _attrs(u, ln)) for k, (v, u, ln) in data.items()},
                    coords={"compartment": ("compartment", np.arange(n, dtype=np.int32),
                                            _attrs("1", "compartment index"))})
    return ds


def _units_from_name(name: str) -> str:
    for suffix, unit in (("_mV", "mV"), ("_ms", "ms"), ("_um", "um"), ("_per_ms", "ms-1")):
        if name.endswith(suffix):
            return unit
    return "1"


def make_dataset(cell: CellModel, output, scenario_text: str = "") -> xr.Dataset:
    """Build the labelled Dataset of a run.

    Parameters
    ----------
    cell : CellModel
        The cell that was run.
    output : cabletree.solver.RunOutput
        What :func:`cabletree.solver.simulate` returned.
    scenario_text : str
        The scenario file text, stored in the attrs for provenance.

    Returns
    -------
    xarray.Dataset
    """
    g = cell.grid
    sites = output.sites
    comp = np.array([s.compartment for s in sites], dtype=np.int64)
    coords = {
        "time": ("time", np.asarray(output.time_ms, dtype=float), _attrs("ms", "time")),
        "site": ("site", np.array([s.name for s in sites], dtype=str), {"long_name": "recording site"}),
        "site_compartment": ("site", comp.astype(np.int32), _attrs("1", "compartment of the site")),
        "branch": ("site", g.branch[comp].astype(np.int32), _attrs("1", "branch of the site (-1: soma)")),
        "path_distance_um": ("site", g.path_distance_um[comp], _attrs("um", "path distance from the soma centre")),
        "swc_type": ("site", g.swc_type[comp].astype(np.int32), _attrs("1", "SWC structure type")),
        "x_um": ("site", g.xyz_um[comp, 0], _attrs("um", "x position")),
        "y_um": ("site", g.xyz_um[comp, 1], _attrs("um", "y position")),
        "z_um": ("site", g.xyz_um[comp, 2], _attrs("um", "z position")),
        "diameter_um": ("site", g.diameter_um[comp], _attrs("um", "diameter at the site")),
    }
    ds = xr.Dataset({"v": (("time", "site"), np.asarray(output.v_mV, dtype=float),
                           _attrs("mV", "membrane potential"))}, coords=coords)
    ds = ds.merge(compartment_map(cell))
    s = output.settings
    ds.attrs.update({
        "method": s.method, "dt_ms": float(s.dt_ms), "t_stop_ms": float(s.t_stop_ms),
        "record_interval_ms": float(s.dt_ms * s.record_every), "celsius": float(cell.celsius),
        "rates": ("exact" if s.rate_table_step_mV is None else
                  f"tabulated every {s.rate_table_step_mV:g} mV over "
                  f"[{s.rate_table_range_mV[0]:g}, {s.rate_table_range_mV[1]:g}] mV, linear "
                  "interpolation (blocks with parameters varying over the tree exact)"),
        "backend": output.backend, "cabletree_version": package_version(),
        "morphology_source": g.source, "scenario": scenario_text,
        "Conventions": "CF-1.8",
    })
    return ds


def save_dataset(ds: xr.Dataset, path) -> None:
    """Write a results Dataset as NetCDF3 (scipy engine), atomically.

    Parameters
    ----------
    ds : xarray.Dataset
    path : str or path-like
        Destination ``.nc`` file; written to a temporary file in the same folder
        and renamed when complete.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    out = ds.copy()
    for name, var in list(out.variables.items()):
        if var.dtype.kind in "iu" and var.dtype.itemsize > 4:
            if var.size and (var.values.max() > np.iinfo(np.int32).max or var.values.min() < np.iinfo(np.int32).min):
                raise ResultsError(f"variable {name!r} does not fit in 32-bit integers for NetCDF3")
            out[name] = var.astype(np.int32)
        if var.dtype.kind == "b":
            out[name] = var.astype(np.int8)
    for key, value in list(out.attrs.items()):
        if isinstance(value, bool):
            out.attrs[key] = int(value)
        elif value is None:
            out.attrs[key] = ""
    try:
        write_atomically(path, lambda tmp: out.to_netcdf(tmp, engine="scipy", format="NETCDF3_64BIT"))
    except Exception as exc:
        raise ResultsError(f"could not write results to {path}: {exc}") from exc


def load_dataset(path) -> xr.Dataset:
    """Read a results Dataset written by :func:`save_dataset` (fully loaded into memory)."""
    path = os.fspath(path)
    if not os.path.exists(path):
        raise ResultsError(f"no results file at {path}")
    with xr.open_dataset(path, engine="scipy") as ds:
        return ds.load()
