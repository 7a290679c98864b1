"""The morphology: a reconstructed tree of SWC samples held as arrays.

A :class:`Morphology` is immutable.  Samples are stored parent-before-child
(``parent_index[i] < i`` for every non-root sample), so algorithms over the tree
are single forward or backward sweeps over the arrays.  The original SWC ids are
kept in :attr:`Morphology.sample_id` so messages and written files can refer to
them.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import MorphologyError

__all__ = ["Morphology", "SWC_TYPE_NAMES", "SOMA", "AXON", "BASAL", "APICAL"]

SOMA = 1
AXON = 2
BASAL = 3
APICAL = 4

#: Names of the standard SWC structure types (open SWC standard).  Codes of 5 and
#: above are custom; they are kept as they are.
SWC_TYPE_NAMES = {0: "undefined", 1: "soma", 2: "axon", 3: "basal", 4: "apical"}


@dataclass(frozen=True, eq=False)
class Morphology:
    """A neuron reconstruction as arrays of samples, parents first.

    Parameters
    ----------
    sample_id : ndarray of int, shape (n_samples,)
        SWC id of each sample as found in the file (or generated).
    swc_type : ndarray of int, shape (n_samples,)
        SWC structure type (1 soma, 2 axon, 3 basal, 4 apical, 5+ custom).
    xyz_um : ndarray of float, shape (n_samples, 3)
        Sample positions, µm.
    radius_um : ndarray of float, shape (n_samples,)
        Sample radii, µm.  Must be positive except where a soma is given by
        ``soma_radius_um``.
    parent_index : ndarray of int, shape (n_samples,)
        Index (not id) of each sample's parent; -1 for the root.  The root is
        sample 0 and ``parent_index[i] < i`` for i > 0.
    soma_center_um : ndarray of float, shape (3,) or None
        Centre of the soma, µm; None when the morphology has no soma.
    soma_radius_um : float or None
        Radius of the soma sphere used by the grid, µm (see
        :mod:`cabletree.morphology.soma` for how it is derived from each SWC soma
        representation); None when there is no soma.
    soma_kind : str
        How the soma was given: "single_point", "three_point", "contour",
        "cylinders" or "none".
    source : str
        Where the morphology came from (file path or generator name).
    notes : tuple of str
        Warnings and repairs reported while reading (never silent).
    """

    sample_id: np.ndarray
    swc_type: np.ndarray
    xyz_um: np.ndarray
    radius_um: np.ndarray
    parent_index: np.ndarray
    soma_center_um: np.ndarray | None = None
    soma_radius_um: float | None = None
    soma_kind: str = "none"
    source: str = "<memory>"
    notes: tuple[str, ...] = field(default=())

    def __post_init__(self) -> None:
        n = len(self.sample_id)
        for name in ("swc_type", "radius_um", "parent_index"):
            if len(getattr(self, name)) != n:
                raise MorphologyError(
                    f"{self.source}: array {name!r} has length {len(getattr(self, name))}, "
                    f"expected {n} (one per sample)"
                )
        if self.xyz_um.shape != (n, 3):
            raise MorphologyError(
                f"{self.source}: xyz_um has shape {self.xyz_um.shape}, expected ({n}, 3)"
            )
        if n == 0:
            raise MorphologyError(f"{self.source}: the morphology has no samples")
        if self.parent_index[0] != -1:
            raise MorphologyError(f"{self.source}: sample 0 must be the root (parent -1)")
        if n > 1:
            idx = np.arange(1, n)
            bad = np.nonzero(self.parent_index[1:] >= idx)[0]
            if bad.size:
                i = int(bad[0]) + 1
                raise MorphologyError(
                    f"{self.source}: sample id {int(self.sample_id[i])} has parent index "
                    f"{int(self.parent_index[i])}; samples must be stored parents first"
                )
            roots = np.nonzero(self.parent_index[1:] < 0)[0]
            if roots.size:
                i = int(roots[0]) + 1
                raise MorphologyError(
                    f"{self.source}: sample id {int(self.sample_id[i])} is a second root; "
                    "a morphology has exactly one root"
                )
        for arr in (self.sample_id, self.swc_type, self.xyz_um, self.radius_um, self.parent_index):
            arr.setflags(write=False)

    @property
    def n_samples(self) -> int:
        """Number of samples."""
        return len(self.sample_id)

    @property
    def has_soma(self) -> bool:
        """True when the morphology has a soma."""
        return self.soma_radius_um is not None

    def children(self) -> list[list[int]]:
        """Child sample indices of every sample, in storage order."""
        kids: list[list[int]] = [[] for _ in range(self.n_samples)]
        for i in range(1, self.n_samples):
            kids[int(self.parent_index[i])].append(i)
        return kids
