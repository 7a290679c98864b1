"""The sample tree as a graph, and per-sample tree measures.

Pure functions of a :class:`Morphology` (never modified).  Definitions (textbook
terms):

- a **branch point** is a neurite sample with two or more neurite children (the soma
  is not a branch point, however many stems leave it);
- a **terminal** is a neurite sample without children (the root of a morphology
  without soma is not counted, even when it has only one child);
- the **branch order** of a sample is 0 on the soma, 1 on the stems (branches leaving
  the soma, or the branch starting at the root of a morphology without soma), and
  rises by 1 after each branch point; a change of SWC type alone (an axon leaving a
  dendrite) does not raise it.  It is the order of the branch the sample lies on,
  see :func:`cabletree.morphology.tree.branches`.
"""

from __future__ import annotations

import networkx as nx
import numpy as np

from .geometry import segment_vectors_um
from .samples import Morphology
from .tree import branches, is_soma_sample, neurite_child_counts

__all__ = ["to_graph", "neurite_child_counts", "branch_points", "terminals", "branch_order"]


def to_graph(morph: Morphology) -> nx.DiGraph:
    """The sample tree as a directed graph.

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    networkx.DiGraph
        Nodes are sample indices with attributes ``id`` (SWC id), ``swc_type``,
        ``xyz`` (tuple, µm) and ``radius`` (µm); edges run parent -> child with
        ``length_um`` (Euclidean segment length, µm).  Graph attribute ``source``.
    """
    graph = nx.DiGraph(source=morph.source)
    graph.add_nodes_from(
        (i, {"id": sid, "swc_type": t, "xyz": tuple(p), "radius": r})
        for i, (sid, t, p, r) in enumerate(zip(
            morph.sample_id.tolist(), morph.swc_type.tolist(),
            morph.xyz_um.tolist(), morph.radius_um.tolist(),
        ))
    )
    lengths = np.linalg.norm(segment_vectors_um(morph.xyz_um, morph.parent_index), axis=1)
    graph.add_edges_from(
        (int(p), i, {"length_um": float(lengths[i])})
        for i, p in enumerate(morph.parent_index.tolist()) if p >= 0
    )
    return graph


def branch_points(morph: Morphology) -> np.ndarray:
    """Indices of the branch points (neurite samples with >= 2 neurite children).

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of int
        Sample indices, ascending.
    """
    return np.nonzero((neurite_child_counts(morph) >= 2) & ~is_soma_sample(morph))[0]


def terminals(morph: Morphology) -> np.ndarray:
    """Indices of the terminals (neurite samples without children).

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of int
        Sample indices, ascending.
    """
    n_children = np.bincount(morph.parent_index[1:], minlength=morph.n_samples)
    leaf = (n_children == 0) & ~is_soma_sample(morph)
    if not morph.has_soma:
        leaf[0] = False
    return np.nonzero(leaf)[0]


def branch_order(morph: Morphology) -> np.ndarray:
    """Branch order of every sample (0 on the soma; see the module doc).

    Parameters
    ----------
    morph : Morphology

    Returns
    -------
    ndarray of int, shape (n_samples,)
    """
    order = np.zeros(morph.n_samples, dtype=np.int64)
    for branch in branches(morph):
        order[branch.samples] = branch.order
    return order
