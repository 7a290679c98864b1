"""Small geometric formulas for the frusta between SWC samples.

Each non-root sample and its parent bound a frustum (truncated cone) from the parent's
position and radius to the child's (the usual SWC geometry convention, common
practice).  The formulas are the elementary ones for a truncated cone of height
``length_um`` and end radii ``r0_um``, ``r1_um``:

- lateral area ``pi (r0 + r1) sqrt(length**2 + (r0 - r1)**2)``,
- volume ``pi length (r0**2 + r0 r1 + r1**2) / 3``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["frustum_lateral_area_um2", "frustum_volume_um3", "segment_vectors_um"]


def frustum_lateral_area_um2(r0_um, r1_um, length_um):
    """Lateral (side) surface of a frustum, µm².

    Parameters
    ----------
    r0_um, r1_um : float or ndarray
        End radii, µm.
    length_um : float or ndarray
        Axial length (height), µm.

    Returns
    -------
    float or ndarray
        ``pi (r0 + r1) sqrt(length**2 + (r0 - r1)**2)``, µm².  A cylinder
        (``r0 == r1``) gives ``2 pi r length``.
    """
    r0 = np.asarray(r0_um, dtype=float)
    r1 = np.asarray(r1_um, dtype=float)
    length = np.asarray(length_um, dtype=float)
    return np.pi * (r0 + r1) * np.sqrt(length**2 + (r0 - r1) ** 2)


def frustum_volume_um3(r0_um, r1_um, length_um):
    """Volume of a frustum, µm³: ``pi length (r0² + r0 r1 + r1²) / 3``.

    Parameters
    ----------
    r0_um, r1_um : float or ndarray
        End radii, µm.
    length_um : float or ndarray
        Axial length, µm.

    Returns
    -------
    float or ndarray
        Volume, µm³.
    """
    r0 = np.asarray(r0_um, dtype=float)
    r1 = np.asarray(r1_um, dtype=float)
    length = np.asarray(length_um, dtype=float)
    return np.pi * length * (r0**2 + r0 * r1 + r1**2) / 3.0


def segment_vectors_um(xyz_um: np.ndarray, parent_index: np.ndarray) -> np.ndarray:
    """Vector from each sample's parent to the sample, µm (zero for the root).

    Parameters
    ----------
    xyz_um : ndarray, shape (n, 3)
        Sample positions, µm.
    parent_index : ndarray of int, shape (n,)
        Parent index of each sample, -1 for the root.

    Returns
    -------
    ndarray, shape (n, 3)
        ``xyz[i] - xyz[parent[i]]``; the root row is zero.
    """
    par = np.where(parent_index < 0, np.arange(len(parent_index)), parent_index)
    return xyz_um - xyz_um[par]
