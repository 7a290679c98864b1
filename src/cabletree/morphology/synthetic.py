"""Invented morphologies for demos, tests and benchmarks.

Every generator is deterministic (random ones take a ``seed``) and returns a
:class:`Morphology` built through the same soma rules as the SWC reader.  Sample ids
run 1..n in storage order; positions and radii are rounded to 0.1 nm so written files
stay readable.  Stems start with a sample on the soma surface (single-point somata)
or leave from the soma centre sample (three-point soma of :func:`pyramidal_cell`).

As in every SWC file, the radius changes along the frustum between two samples, so
the first segment of a daughter branch tapers from the parent's end radius to the
daughter's radius; more samples per branch make that segment shorter.
"""

from __future__ import annotations

import numpy as np

from .samples import APICAL, AXON, BASAL, SOMA, Morphology
from .soma import make_morphology

__all__ = ["cylinder", "ball_and_stick", "y_tree", "random_tree", "pyramidal_cell"]

_DECIMALS = 4  # rounding of positions and radii, µm


class _Builder:
    """Accumulates samples (parents first) and builds the Morphology."""

    def __init__(self) -> None:
        self.types: list[int] = []
        self.xyz: list[np.ndarray] = []
        self.radius: list[float] = []
        self.parent: list[int] = []

    def add(self, swc_type: int, xyz, radius_um: float, parent: int) -> int:
        self.types.append(int(swc_type))
        self.xyz.append(np.asarray(xyz, dtype=float))
        self.radius.append(float(radius_um))
        self.parent.append(int(parent))
        return len(self.types) - 1

    def cable(self, parent, start_xyz, direction, length_um, r_start_um, r_end_um,
              n_segments, swc_type, *, include_start=False, rng=None, wiggle_um=0.0):
        """Add a straight (optionally jittered) cable; returns its sample indices."""
        d = np.asarray(direction, dtype=float)
        d = d / np.linalg.norm(d)
        start = np.asarray(start_xyz, dtype=float)
        first = 0 if include_start else 1
        out = []
        for k in range(first, n_segments + 1):
            f = k / n_segments
            p = start + d * length_um * f
            if rng is not None and wiggle_um > 0 and 0 < k < n_segments:
                p = p + rng.normal(0.0, wiggle_um, 3)
            parent = self.add(swc_type, p, r_start_um + (r_end_um - r_start_um) * f, parent)
            out.append(parent)
        return out

    def build(self, source: str, require_soma: bool) -> Morphology:
        n = len(self.types)
        return make_morphology(
            np.arange(1, n + 1), np.array(self.types),
            np.round(np.array(self.xyz), _DECIMALS), np.round(np.array(self.radius), _DECIMALS),
            np.array(self.parent), source=source, require_soma=require_soma,
        )


def _positive(name: str, value: float) -> None:
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"{name} = {value!r}; expected a positive number")


def cylinder(length_um: float, diameter_um: float, n_samples: int = 11, swc_type: int = BASAL,
             with_soma: bool = False, soma_diameter_um: float = 20.0) -> Morphology:
    """A uniform straight cable along +x.

    Parameters
    ----------
    length_um : float
        Cable length, µm.
    diameter_um : float
        Cable diameter, µm.
    n_samples : int
        Samples along the cable, both ends included (>= 2).
    swc_type : int
        SWC type of the cable samples.
    with_soma : bool
        Without soma (default) the root is the cable's first sample at the origin
        (read it with ``require_soma=False``); with a soma, see :func:`ball_and_stick`.
    soma_diameter_um : float
        Soma diameter when ``with_soma``, µm.

    Returns
    -------
    Morphology
    """
    if with_soma:
        return ball_and_stick(soma_diameter_um, length_um, diameter_um, n_samples, swc_type)
    _positive("length_um", length_um)
    _positive("diameter_um", diameter_um)
    if n_samples < 2:
        raise ValueError(f"n_samples = {n_samples}; a cable needs at least 2 samples")
    b = _Builder()
    root = b.add(swc_type, (0.0, 0.0, 0.0), diameter_um / 2, -1)
    b.cable(root, (0.0, 0.0, 0.0), (1, 0, 0), length_um, diameter_um / 2, diameter_um / 2,
            n_samples - 1, swc_type)
    return b.build(f"synthetic.cylinder(length_um={length_um:g}, diameter_um={diameter_um:g})", False)


def ball_and_stick(soma_diameter_um: float = 20.0, dendrite_length_um: float = 200.0,
                   dendrite_diameter_um: float = 2.0, n_samples: int = 21,
                   swc_type: int = BASAL) -> Morphology:
    """A single-point spherical soma with one uniform dendrite along +x.

    The dendrite's ``n_samples`` samples run from the soma surface
    (x = soma radius) to x = soma radius + ``dendrite_length_um``, so its cable
    length and lateral area are exactly ``dendrite_length_um`` and
    ``pi d L``.

    Parameters
    ----------
    soma_diameter_um : float
        Soma diameter, µm.
    dendrite_length_um : float
        Dendrite length, µm.
    dendrite_diameter_um : float
        Dendrite diameter, µm.
    n_samples : int
        Dendrite samples, both ends included (>= 2).
    swc_type : int
        SWC type of the dendrite.

    Returns
    -------
    Morphology
    """
    for name, value in (("soma_diameter_um", soma_diameter_um),
                        ("dendrite_length_um", dendrite_length_um),
                        ("dendrite_diameter_um", dendrite_diameter_um)):
        _positive(name, value)
    if n_samples < 2:
        raise ValueError(f"n_samples = {n_samples}; a dendrite needs at least 2 samples")
    rs = soma_diameter_um / 2
    r = dendrite_diameter_um / 2
    b = _Builder()
    soma = b.add(SOMA, (0.0, 0.0, 0.0), rs, -1)
    b.cable(soma, (rs, 0.0, 0.0), (1, 0, 0), dendrite_length_um, r, r, n_samples - 1,
            swc_type, include_start=True)
    return b.build(
        f"synthetic.ball_and_stick(soma_diameter_um={soma_diameter_um:g}, "
        f"dendrite_length_um={dendrite_length_um:g}, dendrite_diameter_um={dendrite_diameter_um:g})",
        True,
    )


def y_tree(trunk_length_um: float, trunk_diameter_um: float, daughter_length_um: float,
           daughter_diameter_um: float, n_samples_per_branch: int = 11, angle_deg: float = 30.0,
           with_soma: bool = False, soma_diameter_um: float = 20.0,
           swc_type: int = BASAL) -> Morphology:
    """A trunk along +x that splits into two equal daughters (a "Y").

    Parameters
    ----------
    trunk_length_um, trunk_diameter_um : float
        Trunk length and diameter, µm.
    daughter_length_um, daughter_diameter_um : float
        Length and diameter of each daughter, µm.  With
        ``trunk_diameter**1.5 == 2 * daughter_diameter**1.5`` the tree satisfies
        Rall's 3/2-power rule (Rall 1959, Exp Neurol 1:491-527).
    n_samples_per_branch : int
        Samples per branch, its start included (>= 2).
    angle_deg : float
        Angle of each daughter from the x axis, in the xy plane, degrees.
    with_soma : bool
        Start the trunk on the surface of a single-point soma at the origin;
        otherwise the root is the trunk's first sample.
    soma_diameter_um : float
        Soma diameter when ``with_soma``, µm.
    swc_type : int
        SWC type of the neurites.

    Returns
    -------
    Morphology
    """
    for name, value in (("trunk_length_um", trunk_length_um), ("trunk_diameter_um", trunk_diameter_um),
                        ("daughter_length_um", daughter_length_um),
                        ("daughter_diameter_um", daughter_diameter_um)):
        _positive(name, value)
    if n_samples_per_branch < 2:
        raise ValueError(f"n_samples_per_branch = {n_samples_per_branch}; expected >= 2")
    b = _Builder()
    rt, rd = trunk_diameter_um / 2, daughter_diameter_um / 2
    n_seg = n_samples_per_branch - 1
    if with_soma:
        rs = soma_diameter_um / 2
        parent = b.add(SOMA, (0.0, 0.0, 0.0), rs, -1)
        start = np.array([rs, 0.0, 0.0])
        trunk = b.cable(parent, start, (1, 0, 0), trunk_length_um, rt, rt, n_seg, swc_type,
                        include_start=True)
    else:
        start = np.zeros(3)
        root = b.add(swc_type, start, rt, -1)
        trunk = [root] + b.cable(root, start, (1, 0, 0), trunk_length_um, rt, rt, n_seg, swc_type)
    end = b.xyz[trunk[-1]]
    a = np.radians(angle_deg)
    for sign in (1.0, -1.0):
        b.cable(trunk[-1], end, (np.cos(a), sign * np.sin(a), 0.0), daughter_length_um, rd, rd,
                n_seg, swc_type)
    return b.build(
        f"synthetic.y_tree(trunk {trunk_length_um:g} x {trunk_diameter_um:g} um, daughters "
        f"{daughter_length_um:g} x {daughter_diameter_um:g} um)",
        with_soma,
    )


def random_tree(n_branches: int, seed: int, *, n_stems: int = 3, samples_per_branch: int = 5,
                mean_branch_length_um: float = 60.0, stem_diameter_um: float = 2.0,
                min_diameter_um: float = 0.3, soma_diameter_um: float = 15.0,
                swc_type: int = BASAL) -> Morphology:
    """A random branching tree on a single-point soma, for benchmarks and property tests.

    The topology grows by splitting a randomly chosen terminal branch into two (one
    split into three when the parity of ``n_branches - n_stems`` asks for it).
    Branch lengths are gamma distributed (shape 4) around
    ``mean_branch_length_um``; daughter diameters follow Rall's 3/2-power rule
    (``d_child = d_parent * 2**(-2/3)``), bounded below by ``min_diameter_um``, and
    each branch tapers by 10 %.  Generation is vectorised; 10^5 samples take well
    under a second.

    Parameters
    ----------
    n_branches : int
        Number of branches (>= 1).
    seed : int
        Seed of the random generator (the same seed gives the same tree).
    n_stems : int
        Branches leaving the soma (reduced to ``n_branches`` if larger, raised by one
        when ``n_branches - n_stems == 1``, since one split cannot make one branch).
    samples_per_branch : int
        Samples per branch (>= 1).
    mean_branch_length_um : float
        Mean branch length, µm.
    stem_diameter_um, min_diameter_um : float
        Diameter at the start of the stems and the smallest diameter, µm.
    soma_diameter_um : float
        Soma diameter, µm.
    swc_type : int
        SWC type of all neurites.

    Returns
    -------
    Morphology
        ``1 + n_branches * samples_per_branch`` samples.
    """
    if n_branches < 1 or samples_per_branch < 1:
        raise ValueError("n_branches and samples_per_branch must be at least 1")
    rng = np.random.default_rng(seed)
    n_stems = max(1, min(n_stems, n_branches))
    if n_branches - n_stems == 1:  # a single split would give one child: use one more stem
        n_stems += 1
    parent_branch = [-1] * n_stems
    tips = list(range(n_stems))
    while len(parent_branch) < n_branches:
        remaining = n_branches - len(parent_branch)
        k = int(rng.integers(len(tips)))
        split = tips[k]
        tips[k] = tips[-1]
        tips.pop()
        for _ in range(3 if remaining == 3 else 2):
            tips.append(len(parent_branch))
            parent_branch.append(split)
    parent_branch_arr = np.array(parent_branch)
    rs = soma_diameter_um / 2
    lengths = np.maximum(rng.gamma(4.0, mean_branch_length_um / 4.0, n_branches), 1.0)
    kicks = rng.normal(0.0, 0.6, (n_branches, 3))
    direction = np.empty((n_branches, 3))
    start = np.empty((n_branches, 3))
    d_start = np.empty(n_branches)
    for i, p in enumerate(parent_branch):
        if p < 0:
            v = kicks[i] / np.linalg.norm(kicks[i])
            start[i] = rs * v
            d_start[i] = stem_diameter_um
        else:
            v = direction[p] + kicks[i]
            start[i] = start[p] + direction[p] * lengths[p]
            d_start[i] = max(d_start[p] * 0.9 * 2 ** (-2 / 3), min_diameter_um)
        direction[i] = v / np.linalg.norm(v)
    d_end = np.maximum(0.9 * d_start, min_diameter_um)
    m = samples_per_branch
    frac = np.arange(1, m + 1) / m
    xyz = start[:, None, :] + direction[:, None, :] * (lengths[:, None] * frac)[:, :, None]
    radius = (d_start[:, None] + (d_end - d_start)[:, None] * frac) / 2
    index = 1 + np.arange(n_branches * m).reshape(n_branches, m)
    parent = np.empty((n_branches, m), dtype=np.int64)
    parent[:, 1:] = index[:, :-1]
    parent[:, 0] = np.where(parent_branch_arr < 0, 0, index[np.maximum(parent_branch_arr, 0), -1])
    n = 1 + n_branches * m
    return make_morphology(
        np.arange(1, n + 1),
        np.concatenate(([SOMA], np.full(n - 1, swc_type))),
        np.round(np.vstack((np.zeros((1, 3)), xyz.reshape(-1, 3))), _DECIMALS),
        np.round(np.concatenate(([rs], radius.ravel())), _DECIMALS),
        np.concatenate(([-1], parent.ravel())),
        source=f"synthetic.random_tree(n_branches={n_branches}, seed={seed})",
    )


def pyramidal_cell(seed: int = 0) -> Morphology:
    """An invented pyramidal-like cell for demos.

    A three-point soma of radius 10 µm (NeuroMorpho.Org layout); an apical trunk of
    600 µm along +y tapering from 3 to 1 µm diameter, with five oblique branches
    (some of them forking) and a tuft of two forks at its end; five basal dendrites
    of about 200 µm path length, each forking once; an axon (type 2) of 300 µm
    along -y.  The seed only jitters angles and sample positions by a few µm.

    Parameters
    ----------
    seed : int
        Seed of the jitter.

    Returns
    -------
    Morphology
    """
    rng = np.random.default_rng(seed)
    b = _Builder()
    rs = 10.0
    soma = b.add(SOMA, (0, 0, 0), rs, -1)
    b.add(SOMA, (0, -rs, 0), rs, soma)
    b.add(SOMA, (0, rs, 0), rs, soma)

    def jitter(v, scale=0.15):
        v = np.asarray(v, dtype=float)
        v = v / np.linalg.norm(v) + rng.normal(0.0, scale, 3)
        return v / np.linalg.norm(v)

    trunk = b.cable(soma, (0, rs, 0), (0, 1, 0), 600.0, 1.5, 0.5, 60, APICAL,
                    include_start=True, rng=rng, wiggle_um=0.8)
    for k, (at, side) in enumerate(((8, 1), (15, -1), (22, 1), (30, -1), (38, 1))):
        origin = trunk[at]
        oblique = b.cable(origin, b.xyz[origin], jitter((side, 0.6, 0.2 * side)), 90.0 + 10 * k,
                          0.45, 0.35, 10, APICAL, rng=rng, wiggle_um=0.6)
        if k % 2 == 0:
            for turn in (-0.5, 0.5):
                tip = oblique[-1]
                b.cable(tip, b.xyz[tip], jitter((side, 0.8 + turn, turn)), 60.0, 0.3, 0.25, 6,
                        APICAL, rng=rng, wiggle_um=0.5)
    top = trunk[-1]
    for side in (-1, 1):
        fork = b.cable(top, b.xyz[top], jitter((0.6 * side, 1, 0)), 150.0, 0.45, 0.35, 15, APICAL,
                       rng=rng, wiggle_um=0.6)
        for turn in (-0.4, 0.4):
            b.cable(fork[-1], b.xyz[fork[-1]], jitter((0.6 * side + turn, 1, turn)), 120.0, 0.3,
                    0.2, 12, APICAL, rng=rng, wiggle_um=0.5)
    for k in range(5):
        angle = np.radians(-160 + 35 * k)
        v = jitter((np.cos(angle), np.sin(angle) - 0.3, 0.3 * np.sin(3.0 * k)))
        stem = b.cable(soma, rs * v, v, 80.0, 0.6, 0.45, 8, BASAL, include_start=True,
                       rng=rng, wiggle_um=0.6)
        for turn in (-0.5, 0.5):
            b.cable(stem[-1], b.xyz[stem[-1]], jitter(v + turn * np.cross(v, (0, 0, 1))), 120.0,
                    0.35, 0.25, 12, BASAL, rng=rng, wiggle_um=0.5)
    b.cable(soma, (0, -rs, 0), (0, -1, 0), 300.0, 0.6, 0.3, 30, AXON, include_start=True,
            rng=rng, wiggle_um=0.5)
    return b.build(f"synthetic.pyramidal_cell(seed={seed})", True)
