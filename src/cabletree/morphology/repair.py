"""Opt-in repairs of common defects in reconstructions.

All repairs are off by default.  Each one that changes something returns a readable
note (what was done, to how many samples, which ids) that ends up in
:attr:`Morphology.notes`; nothing is changed silently.  The functions are pure: they
return new arrays or a new :class:`Morphology`.

The soma repairs (``soma_radius_um``, ``infer_soma_radius``) are applied by
:func:`cabletree.morphology.soma.derive_soma`; their conventions are documented
there.  The reader applies the others in this order: ``radius_is_diameter``, then
``min_radius_um`` (before the radii are validated), then ``merge_zero_length`` (on
the finished morphology).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..errors import MorphologyError
from .samples import Morphology
from .soma import soma_mask

__all__ = ["Repairs", "halve_radii", "clamp_min_radius", "merge_zero_length_samples"]


@dataclass(frozen=True)
class Repairs:
    """Which repairs to apply while reading a morphology (all off by default).

    Parameters
    ----------
    min_radius_um : float, optional
        Raise neurite radii below this value (including zero, negative and NaN
        radii) to it, µm.  Soma samples are left alone (use the soma repairs).
    soma_radius_um : float, optional
        Use this soma radius, µm, instead of the one derived from the file.
    infer_soma_radius : bool
        When the soma radius is zero or missing, infer it from the distance of the
        stems' first samples from the soma centre (capped; see
        :mod:`cabletree.morphology.soma`).
    merge_zero_length : bool
        Merge neurite samples that coincide with their parent (distance at most
        ``zero_length_tolerance_um``) into the parent, reattaching their children.
    radius_is_diameter : bool
        The file's radius column holds diameters: halve it.
    zero_length_tolerance_um : float
        Distance below which a sample counts as coincident with its parent, µm.
    """

    min_radius_um: float | None = None
    soma_radius_um: float | None = None
    infer_soma_radius: bool = False
    merge_zero_length: bool = False
    radius_is_diameter: bool = False
    zero_length_tolerance_um: float = 1e-9

    def __post_init__(self) -> None:
        for name in ("min_radius_um", "soma_radius_um"):
            value = getattr(self, name)
            if value is not None and not (np.isfinite(value) and value > 0):
                raise MorphologyError(f"Repairs.{name} = {value!r}; expected a positive number of µm")
        if not (self.zero_length_tolerance_um >= 0):
            raise MorphologyError(
                f"Repairs.zero_length_tolerance_um = {self.zero_length_tolerance_um!r}; expected >= 0 µm"
            )


def _ids(sample_id: np.ndarray, idx: np.ndarray, most: int = 10) -> str:
    shown = ", ".join(str(int(sample_id[i])) for i in idx[:most])
    return shown + (f", ... ({len(idx)} in all)" if len(idx) > most else "")


def halve_radii(radius_um: np.ndarray) -> tuple[np.ndarray, str]:
    """Halve a radius column that holds diameters.

    Parameters
    ----------
    radius_um : ndarray
        The column as read (diameters, µm).

    Returns
    -------
    radius_um : ndarray
        Radii, µm.
    note : str
        What was done.
    """
    return np.asarray(radius_um, dtype=float) / 2.0, (
        f"repair radius_is_diameter: the radius column of all {len(radius_um)} samples was "
        "read as diameters and halved"
    )


def clamp_min_radius(
    radius_um: np.ndarray,
    swc_type: np.ndarray,
    parent_index: np.ndarray,
    sample_id: np.ndarray,
    min_radius_um: float,
) -> tuple[np.ndarray, str | None]:
    """Raise neurite radii below ``min_radius_um`` (or NaN) to it.

    Parameters
    ----------
    radius_um : ndarray
        Radii, µm.
    swc_type, parent_index, sample_id : ndarray
        Sample arrays (parents first), used to skip the soma and name samples.
    min_radius_um : float
        Smallest allowed neurite radius, µm.

    Returns
    -------
    radius_um : ndarray
        Repaired radii, µm.
    note : str or None
        What was changed, None when nothing was.
    """
    radius = np.array(radius_um, dtype=float)
    neurite = ~soma_mask(swc_type, parent_index)
    bad = np.nonzero(neurite & ~(radius >= min_radius_um))[0]
    if bad.size == 0:
        return radius, None
    radius[bad] = min_radius_um
    return radius, (
        f"repair min_radius_um: {bad.size} neurite sample(s) with radius below "
        f"{min_radius_um:g} µm (or NaN) raised to it (ids {_ids(sample_id, bad)})"
    )


def merge_zero_length_samples(morph: Morphology, tolerance_um: float = 1e-9) -> Morphology:
    """Merge neurite samples that coincide with their parent into the parent.

    The merged sample disappears, its children are reattached to the parent (the
    parent keeps its own type and radius).  Chains of coincident samples collapse
    onto the first of them.

    Parameters
    ----------
    morph : Morphology
        The morphology (not modified).
    tolerance_um : float
        A sample at most this far from its parent is merged, µm.

    Returns
    -------
    Morphology
        A new morphology (the same object if nothing was merged), with a note.
    """
    par = morph.parent_index
    n = morph.n_samples
    soma = soma_mask(morph.swc_type, par)
    dist = np.zeros(n)
    dist[1:] = np.linalg.norm(morph.xyz_um[1:] - morph.xyz_um[par[1:]], axis=1)
    merge = (dist <= tolerance_um) & ~soma
    merge[0] = False
    if not merge.any():
        return morph
    target = np.arange(n)
    for i in np.nonzero(merge)[0]:  # parents first, so target[par[i]] is final
        target[i] = target[par[i]]
    keep = ~merge
    new_index = np.cumsum(keep) - 1
    kept = np.nonzero(keep)[0]
    new_parent = np.where(par[kept] < 0, -1, new_index[target[np.maximum(par[kept], 0)]])
    note = (
        f"repair merge_zero_length: {int(merge.sum())} neurite sample(s) coincident with "
        f"their parent merged into it, children reattached (ids "
        f"{_ids(morph.sample_id, np.nonzero(merge)[0])})"
    )
    return dataclasses.replace(
        morph,
        sample_id=morph.sample_id[kept].copy(),
        swc_type=morph.swc_type[kept].copy(),
        xyz_um=morph.xyz_um[kept].copy(),
        radius_um=morph.radius_um[kept].copy(),
        parent_index=new_parent.astype(np.int64),
        notes=morph.notes + (note,),
    )
