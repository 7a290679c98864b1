"""The sample tree as a graph; branch points, terminals, branch order, path distance."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from cabletree.morphology import (
    branch_order, branch_points, parse_swc_text, path_distance_um, read_swc, synthetic,
    terminals, to_graph,
)


def test_to_graph_nodes_and_edges():
    m = parse_swc_text("7 1 0 0 0 5 -1\n8 3 3 4 0 1 7\n9 3 3 4 12 0.5 8\n")
    g = to_graph(m)
    assert nx.is_arborescence(g)
    assert g.nodes[1] == {"id": 8, "swc_type": 3, "xyz": (3.0, 4.0, 0.0), "radius": 1.0}
    assert g.edges[0, 1]["length_um"] == pytest.approx(5.0)
    assert g.edges[1, 2]["length_um"] == pytest.approx(12.0)
    assert g.graph["source"] == "<string>"


def test_y_tree_branch_points_terminals_order():
    m = synthetic.y_tree(100, 2, 50, 1.26, n_samples_per_branch=5, with_soma=True)
    bp = branch_points(m)
    assert len(bp) == 1
    assert m.xyz_um[bp[0]][0] == pytest.approx(110.0)  # trunk end at soma radius + 100
    assert len(terminals(m)) == 2
    order = branch_order(m)
    assert order[0] == 0
    assert set(order[1:bp[0] + 1]) == {1}
    assert set(order[bp[0] + 1:]) == {2}


def test_soma_with_many_stems_is_not_a_branch_point():
    m = parse_swc_text("1 1 0 0 0 5 -1\n2 3 10 0 0 1 1\n3 3 -10 0 0 1 1\n4 2 0 -10 0 1 1\n")
    assert len(branch_points(m)) == 0
    np.testing.assert_array_equal(terminals(m), [1, 2, 3])
    np.testing.assert_array_equal(branch_order(m), [0, 1, 1, 1])


def test_cable_without_soma():
    m = synthetic.cylinder(100, 2, n_samples=5)
    np.testing.assert_array_equal(terminals(m), [4])
    np.testing.assert_array_equal(branch_order(m), [1] * 5)


def test_branch_order_matches_networkx_count(data_dir):
    # Independent reference: order = 1 + number of branch points strictly above the sample
    # on its path from the soma, computed with networkx ancestors.
    m = read_swc(data_dir / "l23_pyramidal_rat_svoboda_gR004P1.swc")
    g = to_graph(m)
    bps = set(branch_points(m).tolist())
    soma = set(np.nonzero(m.swc_type == 1)[0].tolist())
    order = branch_order(m)
    for i in range(0, m.n_samples, 37):
        if i in soma:
            assert order[i] == 0
            continue
        above = nx.ancestors(g, i) & bps
        assert order[i] == 1 + len(above)


def test_path_distance_along_the_tree_not_euclidean():
    # REFERENCES §7 test 8: three 50 µm segments -> 150 µm whatever the Euclidean distance.
    text = ("1 1 0 0 0 5 -1\n2 3 50 0 0 1 1\n3 3 50 50 0 1 2\n4 3 0 50 0 1 3\n")
    m = parse_swc_text(text)
    d = path_distance_um(m)
    assert d[3] == pytest.approx(150.0, abs=1e-12)
    assert np.linalg.norm(m.xyz_um[3] - m.soma_center_um) == pytest.approx(50.0)


def test_path_distance_matches_networkx(data_dir):
    # Cross-check with networkx weighted shortest paths (the first segment measured from
    # the soma centre, as the convention says).
    m = read_swc(data_dir / "l5_ttpc_pyramidal_rat_hay2013_cell4.swc")
    g = to_graph(m)
    ref = nx.single_source_dijkstra_path_length(g, 0, weight="length_um")
    d = path_distance_um(m)
    for i in range(3, m.n_samples, 101):  # samples 1, 2 are soma
        assert d[i] == pytest.approx(ref[i], rel=1e-12)


def test_functions_do_not_mutate():
    m = synthetic.random_tree(10, 2)
    before = [a.copy() for a in (m.xyz_um, m.radius_um, m.parent_index)]
    to_graph(m), branch_points(m), terminals(m), branch_order(m)
    for a, b in zip(before, (m.xyz_um, m.radius_um, m.parent_index)):
        np.testing.assert_array_equal(a, b)
