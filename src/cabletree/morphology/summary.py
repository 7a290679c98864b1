"""A summary of a morphology: counts, lengths, areas and path distances per SWC type.

Geometry conventions (stated here and in the docs):

- the soma is the sphere of :mod:`cabletree.morphology.soma`, area ``4 pi r²``;
- a segment between two neurite samples is the frustum between them (SWC
  convention, common practice); it is counted under the child's SWC type;
- a segment from a soma sample to a neurite sample (the first piece of a stem) is a
  cylinder of the child's radius running from the soma surface to the child, of
  length ``max(|x_child - soma centre| - soma radius, 0)``; the part inside the soma
  sphere is not counted, so the soma is not counted twice;
- segments between soma samples belong to the soma and are not counted as neurite;
- without a soma every segment is a frustum.

Path distances follow :func:`cabletree.morphology.tree.path_distance_um`: along the
tree from the soma centre (a stem's first sample sits at its Euclidean distance
from the centre).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geometry import frustum_lateral_area_um2, segment_vectors_um
from .graph import branch_points, terminals
from .samples import SWC_TYPE_NAMES, Morphology
from .tree import is_soma_sample, path_distance_um

__all__ = ["MorphologySummary", "segment_geometry", "summarize", "format_summary"]


@dataclass(frozen=True)
class MorphologySummary:
    """Counts and sizes of a morphology (lengths µm, areas µm²).

    Attributes
    ----------
    source : str
        Where the morphology came from.
    n_samples : int
        Number of samples.
    soma_kind : str
        SWC soma representation ("single_point", "three_point", "contour",
        "cylinders", "none").
    soma_radius_um : float or None
        Radius of the soma sphere, µm.
    soma_area_um2 : float
        ``4 pi r²`` of the soma sphere, µm² (0 without soma).
    samples_per_type : dict of int to int
        Number of samples of each SWC type present.
    length_um_per_type : dict of int to float
        Total cable length of each neurite SWC type, µm.
    area_um2_per_type : dict of int to float
        Total lateral membrane area of each neurite SWC type, µm².
    max_path_distance_um_per_type : dict of int to float
        Largest path distance from the soma centre of each SWC type, µm.
    n_stems : int
        Neurite samples whose parent is a soma sample.
    n_branch_points : int
        Neurite samples with two or more neurite children.
    n_terminals : int
        Neurite samples without children.
    notes : tuple of str
        The morphology's notes (repairs, warnings).
    """

    source: str
    n_samples: int
    soma_kind: str
    soma_radius_um: float | None
    soma_area_um2: float
    samples_per_type: dict[int, int]
    length_um_per_type: dict[int, float]
    area_um2_per_type: dict[int, float]
    max_path_distance_um_per_type: dict[int, float]
    n_stems: int
    n_branch_points: int
    n_terminals: int
    notes: tuple[str, ...] = ()

    @property
    def total_length_um(self) -> float:
        """Total neurite length, µm."""
        return float(sum(self.length_um_per_type.values()))

    @property
    def total_area_um2(self) -> float:
        """Total membrane area, soma included, µm²."""
        return float(sum(self.area_um2_per_type.values()) + self.soma_area_um2)


def segment_geometry(morph: Morphology) -> tuple[np.ndarray, np.ndarray]:
    """Length and lateral area of the segment from each sample's parent to it.

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    length_um : ndarray, shape (n_samples,)
        Segment lengths, µm (0 for the root and for soma samples).
    area_um2 : ndarray, shape (n_samples,)
        Lateral areas, µm², with the conventions of the module doc.
    """
    soma = is_soma_sample(morph)
    par = morph.parent_index
    length = np.linalg.norm(segment_vectors_um(morph.xyz_um, par), axis=1)
    r_parent = morph.radius_um[np.maximum(par, 0)]
    area = frustum_lateral_area_um2(r_parent, morph.radius_um, length)
    stem = ~soma & (par >= 0) & soma[np.maximum(par, 0)]
    if morph.has_soma and stem.any():
        outside = np.linalg.norm(morph.xyz_um[stem] - morph.soma_center_um, axis=1)
        length[stem] = np.maximum(outside - morph.soma_radius_um, 0.0)
        area[stem] = 2.0 * np.pi * morph.radius_um[stem] * length[stem]
    length[soma] = 0.0
    area[soma] = 0.0
    length[0] = area[0] = 0.0
    return length, area


def summarize(morph: Morphology) -> MorphologySummary:
    """Summarise a morphology (conventions in the module doc).

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    MorphologySummary
    """
    soma = is_soma_sample(morph)
    length, area = segment_geometry(morph)
    distance = path_distance_um(morph)
    types = morph.swc_type
    codes = [int(c) for c in np.unique(types)]
    neurite_codes = [c for c in codes if np.any((types == c) & ~soma)]
    par = morph.parent_index
    stems = ~soma & (par >= 0) & soma[np.maximum(par, 0)]
    radius = morph.soma_radius_um
    return MorphologySummary(
        source=morph.source,
        n_samples=morph.n_samples,
        soma_kind=morph.soma_kind,
        soma_radius_um=radius,
        soma_area_um2=4.0 * np.pi * radius**2 if radius is not None else 0.0,
        samples_per_type={c: int(np.sum(types == c)) for c in codes},
        length_um_per_type={c: float(length[(types == c) & ~soma].sum()) for c in neurite_codes},
        area_um2_per_type={c: float(area[(types == c) & ~soma].sum()) for c in neurite_codes},
        max_path_distance_um_per_type={c: float(distance[types == c].max()) for c in codes},
        n_stems=int(stems.sum()),
        n_branch_points=len(branch_points(morph)),
        n_terminals=len(terminals(morph)),
        notes=morph.notes,
    )


def _type_name(code: int) -> str:
    return f"{code} {SWC_TYPE_NAMES.get(code, 'custom')}"


def format_summary(summary: MorphologySummary) -> str:
    """A readable text table of a summary.

    Parameters
    ----------
    summary : MorphologySummary

    Returns
    -------
    str
        Several lines of text (no trailing newline).
    """
    lines = [f"morphology: {summary.source}", f"samples: {summary.n_samples}"]
    if summary.soma_radius_um is None:
        lines.append("soma: none")
    else:
        lines.append(
            f"soma: {summary.soma_kind.replace('_', '-')}, radius {summary.soma_radius_um:.3f} µm, "
            f"area {summary.soma_area_um2:.1f} µm²"
        )
    lines.append(
        f"stems: {summary.n_stems}   branch points: {summary.n_branch_points}   "
        f"terminals: {summary.n_terminals}"
    )
    header = f"{'SWC type':<14}{'samples':>9}{'length µm':>13}{'area µm²':>13}{'max path µm':>14}"
    lines += ["", header, "-" * len(header)]
    for code, count in summary.samples_per_type.items():
        length = summary.length_um_per_type.get(code)
        area = summary.area_um2_per_type.get(code)
        lines.append(
            f"{_type_name(code):<14}{count:>9d}"
            f"{'-' if length is None else f'{length:.1f}':>13}"
            f"{'-' if area is None else f'{area:.1f}':>13}"
            f"{summary.max_path_distance_um_per_type[code]:>14.1f}"
        )
    lines.append("-" * len(header))
    lines.append(
        f"{'total':<14}{summary.n_samples:>9d}{summary.total_length_um:>13.1f}"
        f"{summary.total_area_um2:>13.1f}   (area includes the soma)"
    )
    for note in summary.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)
