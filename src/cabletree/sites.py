"""Sites: named places on the grid where something is recorded or injected."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import CellModelError
from .grid import Grid

__all__ = ["Site", "soma_site", "site_at_distance", "site_on_branch", "all_compartment_sites"]


@dataclass(frozen=True)
class Site:
    """A named compartment.

    Parameters
    ----------
    name : str
        Label used in results (e.g. "soma", "apical_200um").
    compartment : int
        Compartment index in the grid.
    """

    name: str
    compartment: int


def soma_site(grid: Grid, name: str = "soma") -> Site:
    """The soma compartment (the root when there is no soma)."""
    return Site(name, 0)


def site_at_distance(grid: Grid, path_distance_um: float, swc_types=(4,), name: str | None = None,
                     tolerance_um: float | None = None) -> Site:
    """The compartment of the given SWC types at a path distance, on the main path.

    Every compartment of those types whose path distance is within half the
    longest such compartment of the target can represent it (the grid has no
    node exactly there); among those at least 90 % as thick as the thickest, the
    closest wins (the margin keeps a tapering trunk from always giving its more
    proximal node).  So on a pyramidal cell the site falls on the apical trunk rather than on
    an oblique branch that happens to have a node a little nearer.

    Parameters
    ----------
    grid : Grid
    path_distance_um : float
        Target path distance from the soma centre, µm.
    swc_types : tuple of int
        Allowed SWC types.
    name : str, optional
        Site label; default ``"<type>_<distance>um"``.
    tolerance_um : float, optional
        Largest accepted distance mismatch, µm; default: half the longest
        compartment on those types, plus 1 µm.

    Returns
    -------
    Site
    """
    types = tuple(int(t) for t in swc_types)
    candidates = np.nonzero(np.isin(grid.swc_type, types))[0]
    if candidates.size == 0:
        raise CellModelError(f"no compartment of SWC type(s) {types} on the grid ({grid.source})")
    mismatch = np.abs(grid.path_distance_um[candidates] - path_distance_um)
    best = float(mismatch.min())
    window = max(best, 0.5 * float(grid.length_um[candidates].max())) + 1e-9
    near = candidates[mismatch <= window]
    near_mismatch = mismatch[mismatch <= window]
    thick = grid.diameter_um[near] >= 0.9 * grid.diameter_um[near].max()
    chosen = int(near[thick][np.argmin(near_mismatch[thick])])
    tol = tolerance_um if tolerance_um is not None else 0.5 * float(
        grid.length_um[candidates].max()) + 1.0
    if best > tol:
        far = float(grid.path_distance_um[candidates].max())
        raise CellModelError(
            f"no compartment of SWC type(s) {types} within {tol:.3g} µm of path distance "
            f"{path_distance_um} µm (those types reach {far:.1f} µm)")
    from .morphology.samples import SWC_TYPE_NAMES
    label = name or f"{SWC_TYPE_NAMES.get(types[0], f'type{types[0]}')}_{path_distance_um:g}um"
    return Site(label, chosen)


def site_on_branch(grid: Grid, branch: int, position: float, name: str | None = None) -> Site:
    """The compartment nearest a fractional ``position`` (0-1) along ``branch``."""
    return Site(name or f"branch{branch}_{position:g}", grid.compartment_at(branch, position))


def all_compartment_sites(grid: Grid) -> tuple[Site, ...]:
    """One site per compartment, named ``c<index>``."""
    return tuple(Site(f"c{i}", i) for i in range(grid.n_compartments))
