"""The grid: the morphology discretised into compartments.

Discretisation
--------------
Each branch of length ``L`` is cut into ``k`` equal pieces by a **spacing rule**
(:class:`SpacingRule`).  A compartment is centred on every cut point (a *node*), at
the branch ends too, so branch points, the soma and terminals are nodes themselves
(a vertex-centred finite-volume scheme).  A node owns the membrane within half a
piece on either side of it; the axial conductance between neighbouring nodes is
the exact series conductance of the tapered frusta between them,
``1 / (Ri ∫ dx / (π r(x)²))``, which for a frustum of length ``l`` and end radii
``r1, r2`` is ``π r1 r2 / (Ri l)``.  The lateral area of a frustum piece of axial
length ``l`` is ``π (r1 + r2) sqrt(l² + (r1 - r2)²)``.  This scheme is second order
in space at the nodes, and a current injected at a branch end enters exactly at
the end (REFERENCES §1, "vertex-centred").

The soma is one compartment: a sphere of the radius given by the morphology
(:mod:`cabletree.morphology.soma` says how each SWC soma representation maps to
it), area ``4 π r²``.  A neurite leaving the soma starts at the sphere's surface
on the straight line from the centre to its first sample outside the sphere, with
the radius of that sample (not the soma's); samples inside the sphere are part of
the soma.  Likewise a branch leaving a branch point starts there with the radius
of its own first sample (a cylinder up to that sample), not the parent's radius,
so a thin oblique leaving a thick trunk is not given a wide cone.  Within a
branch, consecutive samples are joined by frusta.  A branch of zero length is
merged into the node it starts from.

Ordering
--------
Compartments are numbered by depth in the tree (a stable sort of depth-first
order by the number of edges from the root), so ``parent[i] < i``, and every
per-compartment array is stored in that order.  Elimination sweeps over contiguous
depth levels are then independent within a level (useful to compiled kernels).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from .errors import GridError
from .morphology.samples import SOMA, Morphology
from .morphology.tree import branches, path_distance_um

__all__ = ["SpacingRule", "Grid", "build_grid", "ac_length_constant_um"]


def ac_length_constant_um(diameter_um, frequency_hz: float, axial_resistivity_ohm_cm: float,
                          cm_uF_per_cm2: float):
    """High-frequency AC length constant ``λ_f = ½ sqrt(d / (π f Ri Cm))``, µm.

    Parameters
    ----------
    diameter_um : float or ndarray
        Cable diameter, µm.
    frequency_hz : float
        Frequency, Hz.
    axial_resistivity_ohm_cm : float
        Ri, Ω·cm.
    cm_uF_per_cm2 : float
        Specific membrane capacitance, µF/cm².

    Returns
    -------
    float or ndarray
        λ_f, µm.

    References
    ----------
    Hines ML, Carnevale NT (2001) The Neuroscientist 7:123-135 (the limit
    ωτ ≫ 1 of the AC length constant, independent of Rm); REFERENCES §6.1.
    """
    d_cm = np.asarray(diameter_um, dtype=float) * 1e-4
    lam_cm = 0.5 * np.sqrt(d_cm / (math.pi * frequency_hz * axial_resistivity_ohm_cm
                                   * cm_uF_per_cm2 * 1e-6))
    return lam_cm * 1e4


@dataclass(frozen=True)
class SpacingRule:
    """How long compartments may be.

    A branch of length ``L`` gets ``k = max(min_pieces, ceil(L / h))`` equal pieces,
    with ``h = min(max_length_um, lambda_fraction · λ_f(d̄))``, where ``λ_f`` is the
    AC length constant at ``frequency_hz`` (:func:`ac_length_constant_um`) for the
    branch's length-weighted mean diameter ``d̄``.  Either limit may be None.
    The default (0.1 λ at 100 Hz, at most 20 µm) follows Hines & Carnevale (2001)
    with an extra cap common in practice.

    Parameters
    ----------
    max_length_um : float or None
        Largest piece length, µm.
    lambda_fraction : float or None
        Largest piece length as a fraction of λ_f (dimensionless).
    frequency_hz : float
        Frequency of the AC length constant, Hz.
    min_pieces : int
        Fewest pieces per branch.
    """

    max_length_um: float | None = 20.0
    lambda_fraction: float | None = 0.1
    frequency_hz: float = 100.0
    min_pieces: int = 1

    def __post_init__(self) -> None:
        if self.max_length_um is None and self.lambda_fraction is None:
            raise GridError("SpacingRule: give max_length_um, lambda_fraction or both")
        if self.max_length_um is not None and not self.max_length_um > 0:
            raise GridError(f"SpacingRule: max_length_um must be > 0, got {self.max_length_um}")
        if self.lambda_fraction is not None and not self.lambda_fraction > 0:
            raise GridError(
                f"SpacingRule: lambda_fraction must be > 0, got {self.lambda_fraction}")
        if not self.frequency_hz > 0:
            raise GridError(f"SpacingRule: frequency_hz must be > 0, got {self.frequency_hz}")
        if int(self.min_pieces) != self.min_pieces or self.min_pieces < 1:
            raise GridError(f"SpacingRule: min_pieces must be an integer >= 1, got {self.min_pieces}")

    def pieces(self, length_um: float, mean_diameter_um: float,
               axial_resistivity_ohm_cm: float, cm_uF_per_cm2: float) -> int:
        """Number of pieces for a branch (see the class docstring)."""
        limits = []
        if self.max_length_um is not None:
            limits.append(self.max_length_um)
        if self.lambda_fraction is not None:
            limits.append(self.lambda_fraction * float(ac_length_constant_um(
                mean_diameter_um, self.frequency_hz, axial_resistivity_ohm_cm, cm_uF_per_cm2)))
        h = min(limits)
        return max(int(self.min_pieces), int(math.ceil(length_um / h - 1e-9)))


@dataclass(frozen=True, eq=False)
class Grid:
    """Compartments of a discretised morphology, numbered parents first by depth.

    All arrays have shape (n_compartments,) unless stated.

    Attributes
    ----------
    parent : ndarray of int64
        Parent compartment; -1 for the root (compartment 0).  ``parent[i] < i``.
    area_um2 : ndarray of float
        Membrane area, µm².
    resistance_integral_per_um : ndarray of float
        ``∫ dx / (π r²)`` of the conductor to the parent, 1/µm (0 for the root);
        multiply by Ri (Ω·cm) and 1e4 for Ω (see :mod:`cabletree.units`).
    path_distance_um : ndarray of float
        Path distance of the node from the soma centre, µm.
    swc_type : ndarray of int64
        SWC type (1 for the soma compartment).
    xyz_um : ndarray of float, shape (n_compartments, 3)
        Node position, µm.
    diameter_um : ndarray of float
        Cable diameter at the node (soma: sphere diameter), µm.
    length_um : ndarray of float
        Axial extent owned by the node (soma: sphere diameter), µm.
    branch : ndarray of int64
        Branch of the node (-1 for the soma); a branch-point node belongs to the
        branch that ends there.
    branch_position : ndarray of float
        Fractional position of the node along its branch, 0 (start) to 1 (end).
    branch_order : ndarray of int64
        Branch order of the node's branch (0 for the soma).
    depth : ndarray of int64
        Number of edges from the root.
    branch_nodes : tuple of ndarray
        For each branch, the compartments along it from its start node (a node of
        the parent branch or the soma) to its end, proximal to distal.
    has_soma : bool
        Whether compartment 0 is a soma.
    source : str
        Where the morphology came from.
    """

    parent: np.ndarray
    area_um2: np.ndarray
    resistance_integral_per_um: np.ndarray
    path_distance_um: np.ndarray
    swc_type: np.ndarray
    xyz_um: np.ndarray
    diameter_um: np.ndarray
    length_um: np.ndarray
    branch: np.ndarray
    branch_position: np.ndarray
    branch_order: np.ndarray
    depth: np.ndarray
    branch_nodes: tuple
    has_soma: bool
    source: str = "<memory>"

    @property
    def n_compartments(self) -> int:
        """Number of compartments."""
        return len(self.parent)

    @property
    def n_branches(self) -> int:
        """Number of branches."""
        return len(self.branch_nodes)

    def level_bounds(self) -> np.ndarray:
        """Start index of each depth level, plus ``n_compartments`` at the end.

        Returns
        -------
        ndarray of int64, shape (max_depth + 2,)
            Compartments ``bounds[k]:bounds[k+1]`` are at depth ``k``.
        """
        counts = np.bincount(self.depth)
        return np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)

    def compartment_at(self, branch: int, position: float) -> int:
        """Compartment nearest to a fractional position along a branch.

        Parameters
        ----------
        branch : int
            Branch index.
        position : float
            0 (branch start) to 1 (branch end).

        Returns
        -------
        int
            Compartment index.
        """
        if not 0 <= branch < self.n_branches:
            raise GridError(f"branch {branch} does not exist (the grid has {self.n_branches})")
        if not 0.0 <= position <= 1.0:
            raise GridError(f"branch position must be within [0, 1], got {position}")
        nodes = self.branch_nodes[branch]
        k = len(nodes) - 1
        return int(nodes[int(round(position * k))])


def _per_type(value, swc_type: int, name: str) -> float:
    if isinstance(value, Mapping):
        if swc_type in value:
            return float(value[swc_type])
        if "default" in value:
            return float(value["default"])
        raise GridError(f"{name}: no value for SWC type {swc_type} and no 'default'")
    return float(value)


def _cumulative_geometry(s: np.ndarray, r: np.ndarray):
    """Cumulative lateral area and resistance integral at the polyline points."""
    ds = np.diff(s)
    r1, r2 = r[:-1], r[1:]
    area = math.pi * (r1 + r2) * np.sqrt(ds * ds + (r1 - r2) ** 2)
    resist = ds / (math.pi * r1 * r2)
    return (np.concatenate([[0.0], np.cumsum(area)]),
            np.concatenate([[0.0], np.cumsum(resist)]))


def _geometry_at(q: np.ndarray, s: np.ndarray, r: np.ndarray, cum_area, cum_res):
    """Cumulative area and resistance integral from s=0 to each arc position q."""
    k = np.clip(np.searchsorted(s, q, side="right") - 1, 0, len(s) - 2)
    s0 = s[k]
    seg = s[k + 1] - s0
    slope = np.where(seg > 0, (r[k + 1] - r[k]) / np.where(seg > 0, seg, 1.0), 0.0)
    dq = q - s0
    rq = r[k] + slope * dq
    area = cum_area[k] + math.pi * (r[k] + rq) * dq * np.sqrt(1.0 + slope * slope)
    res = cum_res[k] + dq / (math.pi * r[k] * rq)
    return area, res, rq


def build_grid(morph: Morphology, rule: SpacingRule | None = None, *,
               axial_resistivity_ohm_cm: float | Mapping = 150.0,
               cm_uF_per_cm2: float | Mapping = 1.0) -> Grid:
    """Discretise a morphology into compartments.

    Parameters
    ----------
    morph : Morphology
        The reconstructed tree.
    rule : SpacingRule, optional
        Spacing rule; the default is ``SpacingRule()``.
    axial_resistivity_ohm_cm : float or mapping of SWC type to float
        Ri used by the AC length-constant rule, Ω·cm (a mapping may hold a
        ``"default"`` entry).
    cm_uF_per_cm2 : float or mapping of SWC type to float
        Specific capacitance used by the AC length-constant rule, µF/cm².

    Returns
    -------
    Grid

    Examples
    --------
    A 20 µm soma with a 200 µm dendrite, cut into pieces of at most 10 µm:

    >>> from cabletree.morphology import synthetic
    >>> grid = build_grid(synthetic.ball_and_stick(20.0, 200.0, 2.0),
    ...                   SpacingRule(max_length_um=10.0, lambda_fraction=None))
    >>> grid.n_compartments, float(grid.path_distance_um.max())
    (21, 210.0)
    """
    rule = SpacingRule() if rule is None else rule
    xyz = np.asarray(morph.xyz_um, dtype=float)
    radius = np.asarray(morph.radius_um, dtype=float)
    sample_pd = path_distance_um(morph)
    all_branches = branches(morph)
    has_soma = morph.has_soma

    # node attributes in depth-first creation order
    parent: list[int] = []
    area: list[float] = []
    resist: list[float] = []
    pdist: list[float] = []
    stype: list[int] = []
    pos: list[np.ndarray] = []
    diam: list[float] = []
    length: list[float] = []
    br: list[int] = []
    brpos: list[float] = []
    order: list[int] = []

    def add_node(p, a, res, d_path, t, xyz_node, dia, ln, b, bp, o) -> int:
        parent.append(p); area.append(a); resist.append(res); pdist.append(d_path)
        stype.append(t); pos.append(xyz_node); diam.append(dia); length.append(ln)
        br.append(b); brpos.append(bp); order.append(o)
        return len(parent) - 1

    if has_soma:
        rs = float(morph.soma_radius_um)
        center = np.asarray(morph.soma_center_um, dtype=float)
        add_node(-1, 4.0 * math.pi * rs * rs, 0.0, 0.0, SOMA, center, 2 * rs, 2 * rs, -1, 0.0, 0)
    end_node = {}  # sample index of a branch end -> node index
    branch_nodes: list[np.ndarray] = []

    for b in all_branches:
        samples = b.samples
        t = b.swc_type
        if b.start_sample < 0:  # soma-less root: the branch starts at its first sample
            pts = xyz[samples]
            rad = radius[samples]
            start_node = None
            pd0 = 0.0
        elif has_soma and morph.swc_type[b.start_sample] == SOMA and b.parent_branch < 0:
            dist_c = np.linalg.norm(xyz[samples] - center, axis=1)
            outside = np.nonzero(dist_c > rs)[0]
            start_node = 0
            if outside.size == 0:
                branch_nodes.append(np.array([0], dtype=np.int64))
                end_node[int(samples[-1])] = 0
                continue
            k0 = int(outside[0])
            first = xyz[samples[k0]]
            direction = (first - center) / dist_c[k0]
            surface = center + rs * direction
            pts = np.vstack([surface, xyz[samples[k0:]]])
            rad = np.concatenate([[radius[samples[k0]]], radius[samples[k0:]]])
            pd0 = sample_pd[samples[k0]] - (dist_c[k0] - rs)
        else:
            start_node = end_node[int(b.start_sample)]
            pts = np.vstack([xyz[b.start_sample], xyz[samples]])
            rad = np.concatenate([[radius[samples[0]]], radius[samples]])
            pd0 = sample_pd[b.start_sample]
        if np.any(~(rad > 0)):
            bad = samples[np.nonzero(~(rad[-len(samples):] > 0))[0]]
            ident = int(morph.sample_id[bad[0]]) if bad.size else int(morph.sample_id[b.start_sample])
            raise GridError(
                f"{morph.source}: sample id {ident} has a non-positive radius; a cable needs "
                "radius > 0 (repair with a minimum radius)")
        s = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))])
        total = float(s[-1])
        if total <= 1e-9:
            if start_node is None:
                raise GridError(f"{morph.source}: the root branch has zero length")
            branch_nodes.append(np.array([start_node], dtype=np.int64))
            end_node[int(samples[-1])] = start_node
            continue
        cum_area, cum_res = _cumulative_geometry(s, rad)
        mean_d = float(np.sum((rad[:-1] + rad[1:]) * np.diff(s)) / total)
        k = rule.pieces(total, mean_d, _per_type(axial_resistivity_ohm_cm, t, "axial_resistivity_ohm_cm"),
                        _per_type(cm_uF_per_cm2, t, "cm_uF_per_cm2"))
        q = np.linspace(0.0, total, k + 1)
        half = np.concatenate([[0.0], 0.5 * (q[:-1] + q[1:]), [total]])
        a_q, res_q, r_q = _geometry_at(q, s, rad, cum_area, cum_res)
        a_half, _, _ = _geometry_at(half, s, rad, cum_area, cum_res)
        node_area = np.diff(a_half)  # k + 1 control volumes
        seg_res = np.diff(res_q)
        xyz_q = np.column_stack([np.interp(q, s, pts[:, j]) for j in range(3)])
        h = total / k
        nodes = np.empty(k + 1, dtype=np.int64)
        if start_node is None:
            nodes[0] = add_node(-1, float(node_area[0]), 0.0, pd0, t, xyz_q[0], 2 * r_q[0],
                                0.5 * h, b.index, 0.0, b.order)
        else:
            nodes[0] = start_node
            area[start_node] += float(node_area[0])
        for j in range(1, k + 1):
            ln = h if j < k else 0.5 * h
            nodes[j] = add_node(int(nodes[j - 1]), float(node_area[j]), float(seg_res[j - 1]),
                                pd0 + float(q[j]), t, xyz_q[j], 2 * float(r_q[j]), ln, b.index,
                                j / k, b.order)
        if start_node is not None and not (has_soma and start_node == 0):
            length[start_node] += 0.5 * h
        branch_nodes.append(nodes)
        end_node[int(samples[-1])] = int(nodes[-1])

    n = len(parent)
    parent_a = np.asarray(parent, dtype=np.int64)
    depth = np.zeros(n, dtype=np.int64)
    for i in range(1, n):
        if parent_a[i] >= 0:
            depth[i] = depth[parent_a[i]] + 1
    perm = np.argsort(depth, kind="stable")  # new position -> old index
    inverse = np.empty(n, dtype=np.int64)
    inverse[perm] = np.arange(n)
    new_parent = np.where(parent_a[perm] >= 0, inverse[np.maximum(parent_a[perm], 0)], -1)

    def arr(values, dtype=float):
        return np.ascontiguousarray(np.asarray(values, dtype=dtype)[perm])

    grid = Grid(
        parent=new_parent.astype(np.int64),
        area_um2=arr(area),
        resistance_integral_per_um=arr(resist),
        path_distance_um=arr(pdist),
        swc_type=arr(stype, np.int64),
        xyz_um=np.ascontiguousarray(np.asarray(pos, dtype=float).reshape(n, 3)[perm]),
        diameter_um=arr(diam),
        length_um=arr(length),
        branch=arr(br, np.int64),
        branch_position=arr(brpos),
        branch_order=arr(order, np.int64),
        depth=np.ascontiguousarray(depth[perm]),
        branch_nodes=tuple(inverse[nb] for nb in branch_nodes),
        has_soma=has_soma,
        source=morph.source,
    )
    for name in ("parent", "area_um2", "resistance_integral_per_um", "path_distance_um",
                 "swc_type", "xyz_um", "diameter_um", "length_um", "branch",
                 "branch_position", "branch_order", "depth"):
        getattr(grid, name).setflags(write=False)
    return grid
