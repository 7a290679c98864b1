"""The soma: which samples form it and the sphere that stands for it.

The **soma samples** are the type-1 samples connected to the root through type-1
samples only (the root itself must be type 1 for a morphology to have a soma).  All
of them, wherever they appear in the file, belong to the soma: they are not cable,
their path distance is 0, and a neurite sample whose parent is any soma sample leaves
the soma sphere.  Type-1 samples that hang below a neurite are not soma samples; they
are reported in the notes and kept as they are.

Whatever the SWC representation, the soma is summarised as one sphere
(``soma_center_um``, ``soma_radius_um``) with area ``4 pi r²``.  The conventions are:

``single_point``
    One soma sample: a sphere of that sample's radius centred on it (common practice,
    REFERENCES §7.3).
``three_point``
    The NeuroMorpho.Org standard (NeuroMorpho.Org note "Soma format representation
    in NeuroMorpho.Org as of version 5.3"): the root at the centre with radius r and
    two type-1 children at ``centre ∓ r`` (along y in the standard; any axis is
    accepted), both with radius r.  It stands for a cylinder of length 2r and radius
    r, whose lateral area ``2 pi r · 2r = 4 pi r²`` equals that of the sphere of
    radius r, so the soma is the sphere of radius r at the root.  Further soma
    samples attached to the soma (e.g. an extra type-1 point with parent 1) are part
    of the soma, do not change the sphere, and are listed in the notes.
``contour``
    A soma outline: at least 4 type-1 samples chained one to the next (an unbranched
    run), lying roughly in one plane, with equal radii small against the outline
    (the tracing line width, not a soma radius).  Following the NeuroMorpho.Org rule
    used when it averages contours into three points, the centre is the mean of the
    outline points and the radius is the mean distance of the points from that
    centre.
``cylinders``
    Any other set of soma samples (a chain or small tree of type-1 frusta): the
    sphere with the same total frustum lateral area, ``r = sqrt(A / (4 pi))``,
    centred at the root sample (common practice: equal membrane area).

A soma whose radius comes out zero, negative or NaN (e.g. ``1 1 0 0 0 0 -1``) is an
error unless a repair gives the radius: ``Repairs(soma_radius_um=r)`` sets it
(for a single-point soma it is also written into the root sample's radius, so a
written file carries it), and ``Repairs(infer_soma_radius=True)`` infers it as the
mean distance from the soma centre to the first sample of each stem (the neurite
samples whose parent is a soma sample), capped at
:data:`INFERRED_SOMA_RADIUS_CAP_UM` (20 µm, common practice: vertebrate neuron
somata are rarely wider than 40 µm).  ``soma_radius_um`` also overrides a valid
derived radius of any representation; that is recorded in the notes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import MorphologyError
from .geometry import frustum_lateral_area_um2, segment_vectors_um
from .samples import SOMA, Morphology

__all__ = [
    "INFERRED_SOMA_RADIUS_CAP_UM",
    "SomaGeometry",
    "soma_mask",
    "derive_soma",
    "make_morphology",
]

#: Upper bound of an inferred soma radius, µm (common practice).
INFERRED_SOMA_RADIUS_CAP_UM = 20.0

# Tolerances of the shape tests (common practice, chosen to accept archive files whose
# three-point somata are written with two decimals and slightly rotated).
_THREE_POINT_REL_TOL = 0.05
_CONTOUR_MIN_POINTS = 4
_CONTOUR_PLANARITY = 0.2  # smallest/largest singular value of the centred points
_CONTOUR_RADIUS_REL_SPREAD = 0.05
_CONTOUR_MAX_RADIUS_FRACTION = 0.5  # tracing radius < this fraction of the mean distance


@dataclass(frozen=True)
class SomaGeometry:
    """The sphere standing for the soma.

    Attributes
    ----------
    center_um : ndarray, shape (3,) or None
        Centre, µm (None without soma).
    radius_um : float or None
        Radius, µm (None without soma).
    kind : str
        "single_point", "three_point", "contour", "cylinders" or "none".
    notes : tuple of str
        What was found or repaired.
    """

    center_um: np.ndarray | None
    radius_um: float | None
    kind: str
    notes: tuple[str, ...] = ()


def soma_mask(swc_type: np.ndarray, parent_index: np.ndarray) -> np.ndarray:
    """Boolean mask of the soma samples.

    Parameters
    ----------
    swc_type : ndarray of int, shape (n,)
        SWC type codes.
    parent_index : ndarray of int, shape (n,)
        Parent indices, parents first, root at 0.

    Returns
    -------
    ndarray of bool, shape (n,)
        True for type-1 samples connected to a type-1 root through type-1 samples.
    """
    n = len(swc_type)
    mask = np.zeros(n, dtype=bool)
    if n == 0 or swc_type[0] != SOMA:
        return mask
    mask[0] = True
    candidate = np.asarray(swc_type) == SOMA
    parent = np.where(parent_index < 0, 0, parent_index)
    while True:  # one pass per level of the soma tree (a few for real files)
        grown = mask | (candidate & mask[parent])
        if np.array_equal(grown, mask):
            return mask
        mask = grown


def _is_three_point(xyz, radius, soma_children, r):
    """Indices (a, b) of two root children forming the standard 3-point soma, or None."""
    if not (np.isfinite(r) and r > 0):
        return None
    center = xyz[0]
    tol = _THREE_POINT_REL_TOL * r
    kids = list(soma_children)
    for ia, a in enumerate(kids):
        for b in kids[ia + 1:]:
            da = xyz[a] - center
            db = xyz[b] - center
            if (
                abs(np.linalg.norm(da) - r) <= tol
                and abs(np.linalg.norm(db) - r) <= tol
                and np.linalg.norm(da + db) <= tol
                and abs(radius[a] - r) <= tol
                and abs(radius[b] - r) <= tol
            ):
                return a, b
    return None


def _is_contour(xyz, radius, parent_index, idx):
    """True when the soma samples ``idx`` form a planar outline (see module doc)."""
    if len(idx) < _CONTOUR_MIN_POINTS:
        return False
    in_soma = np.zeros(len(parent_index), dtype=bool)
    in_soma[idx] = True
    parents = parent_index[idx[1:]]
    n_soma_children = np.bincount(parents, minlength=len(parent_index))[idx]
    # An unbranched run: every soma sample has at most one soma child, except the root
    # which may have two (the run passing through it).
    if np.any(n_soma_children[1:] > 1) or n_soma_children[0] > 2:
        return False
    pts = xyz[idx]
    centred = pts - pts.mean(axis=0)
    s = np.linalg.svd(centred, compute_uv=False)
    if s[0] <= 0 or s[-1] > _CONTOUR_PLANARITY * s[0]:
        return False
    r = radius[idx]
    if not np.all(np.isfinite(r)) or np.ptp(r) > _CONTOUR_RADIUS_REL_SPREAD * np.max(r) + 1e-12:
        return False
    mean_dist = np.linalg.norm(centred, axis=1).mean()
    return bool(np.max(r) < _CONTOUR_MAX_RADIUS_FRACTION * mean_dist)


def _id_list(sample_id, idx, most=10):
    ids = [int(sample_id[i]) for i in idx[:most]]
    more = f", ... ({len(idx)} in all)" if len(idx) > most else ""
    return ", ".join(str(i) for i in ids) + more


def _stem_distances(xyz, parent_index, mask, center):
    kids = np.nonzero(~mask & (parent_index >= 0))[0]
    stems = kids[mask[parent_index[kids]]]
    return np.linalg.norm(xyz[stems] - center, axis=1)


def derive_soma(
    sample_id: np.ndarray,
    swc_type: np.ndarray,
    xyz_um: np.ndarray,
    radius_um: np.ndarray,
    parent_index: np.ndarray,
    *,
    source: str = "<memory>",
    soma_radius_um: float | None = None,
    infer_soma_radius: bool = False,
) -> SomaGeometry:
    """Derive the soma sphere from the soma samples (conventions in the module doc).

    Parameters
    ----------
    sample_id, swc_type, xyz_um, radius_um, parent_index : ndarray
        Sample arrays as in :class:`~cabletree.morphology.samples.Morphology`
        (positions and radii in µm, parents first).
    source : str
        Name used in messages.
    soma_radius_um : float, optional
        Soma radius to use instead of the derived one, µm.
    infer_soma_radius : bool
        Infer a missing (non-positive) soma radius from the stems.

    Returns
    -------
    SomaGeometry
        Centre (µm), radius (µm), kind and notes; kind "none" when the root is not
        a type-1 sample.

    Raises
    ------
    MorphologyError
        If the soma radius is not positive and no repair supplies one.
    """
    mask = soma_mask(swc_type, parent_index)
    if not mask.any():
        return SomaGeometry(None, None, "none", ())
    notes: list[str] = []
    idx = np.nonzero(mask)[0]
    stray = np.nonzero((np.asarray(swc_type) == SOMA) & ~mask)[0]
    if stray.size:
        notes.append(
            f"{stray.size} type-1 sample(s) not connected to the soma through soma samples "
            f"(ids {_id_list(sample_id, stray)}) are kept as neurite samples of type 1"
        )
    r0 = float(radius_um[0])
    soma_children = idx[1:][parent_index[idx[1:]] == 0]
    center = np.array(xyz_um[0], dtype=float)
    if idx.size == 1:
        kind, radius = "single_point", r0
    elif (pair := _is_three_point(xyz_um, radius_um, soma_children, r0)) is not None:
        kind, radius = "three_point", r0
        extra = np.setdiff1d(idx, [0, *pair])
        if extra.size:
            notes.append(
                f"three-point soma with {extra.size} extra soma sample(s) (ids "
                f"{_id_list(sample_id, extra)}); they are part of the soma and do not "
                "change the sphere"
            )
    elif _is_contour(xyz_um, radius_um, parent_index, idx):
        kind = "contour"
        pts = xyz_um[idx]
        center = pts.mean(axis=0)
        radius = float(np.linalg.norm(pts - center, axis=1).mean())
        notes.append(
            f"soma outline of {idx.size} points converted to a sphere: centre = mean of "
            f"the points, radius = mean distance from it = {radius:.4g} µm"
        )
    else:
        kind = "cylinders"
        inner = idx[1:]
        lengths = np.linalg.norm(segment_vectors_um(xyz_um, parent_index)[inner], axis=1)
        area = float(
            np.sum(frustum_lateral_area_um2(radius_um[parent_index[inner]], radius_um[inner], lengths))
        )
        radius = float(np.sqrt(area / (4.0 * np.pi))) if np.isfinite(area) else float("nan")
        notes.append(
            f"soma of {idx.size} type-1 samples taken as frusta: sphere of the same lateral "
            f"area {area:.6g} µm², radius {radius:.4g} µm, centred at the root"
        )

    if soma_radius_um is not None:
        notes.append(
            f"repair soma_radius_um: soma radius set to {soma_radius_um:g} µm "
            f"(derived {kind} radius was {radius:g} µm)"
        )
        radius = float(soma_radius_um)
    elif not (np.isfinite(radius) and radius > 0):
        if not infer_soma_radius:
            raise MorphologyError(
                f"{source}: the {kind.replace('_', '-')} soma at sample id {int(sample_id[0])} "
                f"has radius {radius:g} µm; a positive soma radius is needed. Give one with "
                "Repairs(soma_radius_um=...) or ask for Repairs(infer_soma_radius=True)"
            )
        dist = _stem_distances(xyz_um, parent_index, mask, center)
        if dist.size == 0 or not np.any(dist > 0):
            raise MorphologyError(
                f"{source}: cannot infer the soma radius at sample id {int(sample_id[0])}: "
                "no neurite leaves the soma away from its centre"
            )
        mean = float(dist.mean())
        radius = min(mean, INFERRED_SOMA_RADIUS_CAP_UM)
        notes.append(
            f"repair infer_soma_radius: soma radius {radius:g} µm inferred as the mean "
            f"distance {mean:g} µm from the soma centre to the first samples of "
            f"{dist.size} stem(s), capped at {INFERRED_SOMA_RADIUS_CAP_UM:g} µm"
        )
    return SomaGeometry(center, float(radius), kind, tuple(notes))


def make_morphology(
    sample_id: np.ndarray,
    swc_type: np.ndarray,
    xyz_um: np.ndarray,
    radius_um: np.ndarray,
    parent_index: np.ndarray,
    *,
    source: str = "<memory>",
    notes: tuple[str, ...] = (),
    soma_radius_um: float | None = None,
    infer_soma_radius: bool = False,
    require_soma: bool = True,
) -> Morphology:
    """Build a :class:`Morphology` from parents-first arrays, deriving its soma.

    Parameters
    ----------
    sample_id, swc_type, xyz_um, radius_um, parent_index : ndarray
        Sample arrays (µm), parents first, root at index 0.
    source : str
        Provenance (file path or generator name).
    notes : tuple of str
        Notes collected so far; the soma notes are appended.
    soma_radius_um : float, optional
        Soma radius repair, µm (see module doc).
    infer_soma_radius : bool
        Infer a missing soma radius (see module doc).
    require_soma : bool
        Raise when the root is not a soma sample.

    Returns
    -------
    Morphology

    Raises
    ------
    MorphologyError
        No soma although one is required, or a soma radius that cannot be derived.
    """
    geom = derive_soma(
        sample_id, swc_type, xyz_um, radius_um, parent_index,
        source=source, soma_radius_um=soma_radius_um, infer_soma_radius=infer_soma_radius,
    )
    if geom.kind == "none" and require_soma:
        raise MorphologyError(
            f"{source}: no soma: the root (sample id {int(sample_id[0])}) has SWC type "
            f"{int(swc_type[0])}, expected 1 (soma); pass require_soma=False for a cable "
            "without soma"
        )
    radius = np.array(radius_um, dtype=float)
    all_notes = tuple(notes) + geom.notes
    if geom.kind == "single_point" and radius[0] != geom.radius_um:
        radius[0] = geom.radius_um
        all_notes += (
            f"the soma sample id {int(sample_id[0])} radius is set to {geom.radius_um:g} µm",
        )
    return Morphology(
        sample_id=np.array(sample_id, dtype=np.int64),
        swc_type=np.array(swc_type, dtype=np.int64),
        xyz_um=np.array(xyz_um, dtype=float).reshape(-1, 3),
        radius_um=radius,
        parent_index=np.array(parent_index, dtype=np.int64),
        soma_center_um=geom.center_um,
        soma_radius_um=geom.radius_um,
        soma_kind=geom.kind,
        source=source,
        notes=all_notes,
    )
