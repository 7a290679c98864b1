"""Test helper: results Datasets in the cabletree results schema, built from analytic waveforms.

The schema is the one documented for :mod:`cabletree.results` (dims ``time``, ``site``,
``compartment``; ``v`` in mV; site and per-compartment coordinates with units).  The tree is an
invented Y-shaped cell: a spherical soma at the origin, an apical trunk along +y that forks into
two oblique tufts, and one basal dendrite along −y.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import xarray as xr

__all__ = ["SiteSpec", "y_tree_compartments", "make_results", "gaussian_spike"]

SWC_SOMA, SWC_BASAL, SWC_APICAL = 1, 3, 4


@dataclass(frozen=True)
class SiteSpec:
    """Where a synthetic site sits: path distance (µm) and SWC type; position on the tree."""

    name: str
    path_distance_um: float
    swc_type: int = SWC_APICAL


def gaussian_spike(t_ms: np.ndarray, t_peak_ms: float, amplitude_mV: float,
                   sigma_ms: float) -> np.ndarray:
    """amplitude · exp(−(t − t_peak)²/(2σ²)), mV; full width at half maximum 2σ√(2 ln 2)."""
    return amplitude_mV * np.exp(-((t_ms - t_peak_ms) ** 2) / (2.0 * sigma_ms ** 2))


def y_tree_compartments(spacing_um: float = 20.0, trunk_um: float = 400.0,
                        tuft_um: float = 200.0, basal_um: float = 150.0) -> dict[str, np.ndarray]:
    """Per-compartment arrays of the invented Y-shaped tree, parent-before-child order."""
    x, y, d, parent, dist, swc = [0.0], [0.0], [20.0], [-1], [0.0], [SWC_SOMA]

    def grow(start: int, direction: tuple[float, float], length: float, kind: int,
             diameter0: float) -> int:
        ux, uy = np.asarray(direction) / np.hypot(*direction)
        prev = start
        for k in range(1, int(round(length / spacing_um)) + 1):
            x.append(x[start] + ux * k * spacing_um)
            y.append(y[start] + uy * k * spacing_um)
            d.append(max(diameter0 * (1.0 - 0.5 * k * spacing_um / length), 0.5))
            parent.append(prev)
            dist.append(dist[start] + k * spacing_um)
            swc.append(kind)
            prev = len(x) - 1
        return prev

    fork = grow(0, (0.0, 1.0), trunk_um, SWC_APICAL, 3.0)
    grow(fork, (-1.0, 1.0), tuft_um, SWC_APICAL, 1.5)
    grow(fork, (1.0, 1.0), tuft_um, SWC_APICAL, 1.5)
    grow(0, (0.3, -1.0), basal_um, SWC_BASAL, 1.5)
    dist_arr = np.asarray(dist)
    diam = np.asarray(d)
    area = np.where(np.asarray(parent) < 0, np.pi * diam ** 2, np.pi * diam * spacing_um)
    return {
        "x_um": np.asarray(x), "y_um": np.asarray(y), "z_um": np.zeros(len(x)),
        "diameter_um": diam, "parent": np.asarray(parent), "path_distance_um": dist_arr,
        "swc_type": np.asarray(swc), "area_um2": area,
        # an invented distal A-type density: linear 5x increase over 350 µm
        "gmax_ka_distal": 0.01 * (1.0 + 4.0 * np.minimum(dist_arr, 350.0) / 350.0),
    }


def _nearest_compartment(comp: Mapping[str, np.ndarray], site: SiteSpec) -> int:
    candidates = np.flatnonzero(comp["swc_type"] == site.swc_type)
    return int(candidates[np.argmin(np.abs(comp["path_distance_um"][candidates]
                                           - site.path_distance_um))])


def make_results(time_ms: np.ndarray, traces: Mapping[str, np.ndarray],
                 sites: list[SiteSpec]) -> xr.Dataset:
    """A results Dataset with ``v`` from ``traces`` (site name → mV array) on the Y tree.

    Site coordinates take path distance and SWC type from ``sites`` (not rounded to the
    compartment grid) and position/diameter from the nearest compartment of that type.
    """
    comp = y_tree_compartments()
    names = [s.name for s in sites]
    idx = np.asarray([_nearest_compartment(comp, s) for s in sites])
    v = np.stack([np.asarray(traces[n], dtype=float) for n in names], axis=1)
    site_coords = {
        "site": ("site", np.asarray(names, dtype=object), {"long_name": "recording site"}),
        "site_compartment": ("site", idx, {"units": "1", "long_name": "compartment index"}),
        "branch": ("site", np.where(idx == 0, -1, 0), {"units": "1", "long_name": "branch"}),
        "path_distance_um": ("site", np.asarray([s.path_distance_um for s in sites]),
                             {"units": "um", "long_name": "path distance from the soma"}),
        "swc_type": ("site", np.asarray([s.swc_type for s in sites]),
                     {"units": "1", "long_name": "SWC type"}),
    }
    for key in ("x_um", "y_um", "z_um", "diameter_um"):
        site_coords[key] = ("site", comp[key][idx], {"units": "um", "long_name": key[:-3]})
    comp_vars = {
        f"compartment_{key}": ("compartment", comp[key],
                               {"units": "um2" if key == "area_um2" else
                                ("um" if key.endswith("_um") else "1"),
                                "long_name": key})
        for key in ("path_distance_um", "swc_type", "x_um", "y_um", "z_um", "diameter_um",
                    "parent", "area_um2")
    }
    comp_vars["gmax_ka_distal"] = ("compartment", comp["gmax_ka_distal"],
                                   {"units": "S cm-2", "long_name": "distal A-type K gmax"})
    ds = xr.Dataset(
        {"v": (("time", "site"), v, {"units": "mV", "long_name": "membrane potential"}),
         **comp_vars},
        coords={"time": ("time", np.asarray(time_ms, dtype=float),
                         {"units": "ms", "long_name": "time"}), **site_coords},
        attrs={"method": "synthetic", "dt_ms": float(time_ms[1] - time_ms[0]),
               "t_stop_ms": float(time_ms[-1]), "celsius": 34.0,
               "cabletree_version": "test", "scenario": ""},
    )
    return ds
