"""Branches and path distance: pure functions over a :class:`Morphology`.

A **branch** is an unbranched run of neurite samples.  A new branch starts at a
neurite sample whose parent is a soma sample (a *stem*), at every child of a
branch point (a sample with two or more neurite children), and where the SWC
type changes (e.g. an axon leaving a dendrite), so every branch has one type.

**Path distance** is measured along the tree from the soma centre.  A neurite
sample whose parent is a soma sample lies at its Euclidean distance from the
soma centre (the cable is taken to leave the soma surface on the straight line
towards it); soma samples are at 0.  Without a soma, distances are measured from
the root sample.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .samples import Morphology
from .soma import soma_mask

__all__ = ["Branch", "branches", "path_distance_um", "is_soma_sample", "neurite_child_counts"]


@dataclass(frozen=True, eq=False)
class Branch:
    """An unbranched run of neurite samples.

    Parameters
    ----------
    index : int
        Position of the branch in the tuple returned by :func:`branches`.
    samples : ndarray of int
        Sample indices of the branch, proximal to distal (the start point is not
        included).
    start_sample : int
        Sample the branch grows from: a soma sample, a branch point, the sample
        before a type change, or -1 when the branch starts at a soma-less root
        (then ``samples[0]`` is the root itself).
    parent_branch : int
        Index of the branch it grows from, or -1 for a stem.
    swc_type : int
        SWC type of every sample of the branch.
    order : int
        Branch order: 1 for a stem, +1 after each branch point (a type change
        alone does not raise it).
    """

    index: int
    samples: np.ndarray
    start_sample: int
    parent_branch: int
    swc_type: int
    order: int


def is_soma_sample(morph: Morphology) -> np.ndarray:
    """Boolean mask of the soma samples (type-1 samples reached from the root via type 1).

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of bool, shape (n_samples,)
    """
    if not morph.has_soma:
        return np.zeros(morph.n_samples, dtype=bool)
    return soma_mask(morph.swc_type, morph.parent_index)


def neurite_child_counts(morph: Morphology) -> np.ndarray:
    """Number of neurite (non-soma) children of every sample.

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of int, shape (n_samples,)
    """
    soma = is_soma_sample(morph)
    kids = np.nonzero(~soma & (morph.parent_index >= 0))[0]
    return np.bincount(morph.parent_index[kids], minlength=morph.n_samples)


def path_distance_um(morph: Morphology) -> np.ndarray:
    """Path distance of every sample from the soma centre, µm.

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of float, shape (n_samples,)
        Soma samples are at 0; see the module docstring for the convention.
    """
    soma = is_soma_sample(morph)
    xyz = morph.xyz_um
    parent = morph.parent_index
    dist = np.zeros(morph.n_samples)
    center = morph.soma_center_um
    for i in range(1, morph.n_samples):
        if soma[i]:
            continue
        p = parent[i]
        if soma[p]:
            dist[i] = float(np.linalg.norm(xyz[i] - center))
        else:
            dist[i] = dist[p] + float(np.linalg.norm(xyz[i] - xyz[p]))
    return dist


def branches(morph: Morphology) -> tuple[Branch, ...]:
    """Split the neurites of a morphology into branches, parents before children.

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    tuple of Branch
        Ordered so that every branch comes after its parent branch.
    """
    soma = is_soma_sample(morph)
    parent = morph.parent_index
    types = morph.swc_type
    n = morph.n_samples
    n_neurite_children = neurite_child_counts(morph)
    children = morph.children()

    def starts_branch(i: int) -> bool:
        p = parent[i]
        if p < 0:
            return True
        return bool(soma[p] or n_neurite_children[p] >= 2 or types[p] != types[i])

    out: list[Branch] = []
    # stack of (first sample, start sample, parent branch, order)
    stack: list[tuple[int, int, int, int]] = []
    if soma[0]:
        for i in range(n - 1, 0, -1):
            if not soma[i] and soma[parent[i]]:
                stack.append((i, int(parent[i]), -1, 1))
    else:
        stack.append((0, -1, -1, 1))
    while stack:
        first, start, parent_branch, order = stack.pop()
        run = [first]
        current = first
        while True:
            kids = [k for k in children[current] if not soma[k]]
            if len(kids) == 1 and not starts_branch(kids[0]):
                current = kids[0]
                run.append(current)
                continue
            break
        index = len(out)
        out.append(Branch(index, np.asarray(run, dtype=np.int64), start, parent_branch,
                          int(types[first]), order))
        kids = [k for k in children[current] if not soma[k]]
        bump = 1 if len(kids) >= 2 else 0
        for k in reversed(kids):
            stack.append((k, current, index, order + bump))
    return tuple(out)
