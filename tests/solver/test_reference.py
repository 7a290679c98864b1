"""The reference backend's heavy-path tree solver against plain level elimination.

Both are exact direct methods for the same symmetric tree system (Hines 1984,
Int J Biomed Comput 15:69-76, for the elimination order); they must agree to
round-off, and both must satisfy ``A x = r`` to round-off (checked with the
matrix assembled independently by scipy.sparse, and against scipy's sparse
direct solver).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from cabletree.cell import CurrentInjection, build_cell
from cabletree.channels import hh_potassium, hh_sodium
from cabletree.grid import build_grid
from cabletree.inputs import StepCurrent
from cabletree.profiles import ChannelPlacement
from cabletree.sites import soma_site
from cabletree.solver import RunSettings, simulate
from cabletree.morphology import synthetic
from cabletree.errors import CableTreeError, NumericalInstabilityError
from cabletree.solver.reference import HeavyPathSolver, TreeMatrix, _heavy_paths


def _system(parent, seed):
    rng = np.random.default_rng(seed)
    n = parent.size
    g = rng.uniform(0.01, 2.0, n)
    g[0] = 0.0
    d = rng.uniform(0.001, 0.5, n) + g + np.bincount(parent[1:], g[1:], minlength=n)
    r = rng.normal(0.0, 1.0, n)
    return d, -g, r


def _matrix(parent, d, b):
    n = parent.size
    i = np.arange(1, n)
    a = sp.coo_matrix((np.concatenate([d, b[1:], b[1:]]),
                       (np.concatenate([np.arange(n), i, parent[1:]]),
                        np.concatenate([np.arange(n), parent[1:], i]))), shape=(n, n))
    return a.tocsr()


def _parents():
    yield "cable", np.arange(-1, 299)  # an unbranched chain
    yield "single", np.array([-1])
    yield "star", np.concatenate([[-1], np.zeros(7, np.int64)])  # only branch points
    for seed in range(3):
        grid = build_grid(synthetic.random_tree(40, seed=seed, samples_per_branch=3))
        yield f"random{seed}", grid.parent
    grid = build_grid(synthetic.pyramidal_cell())
    yield "pyramidal", grid.parent
    # a node with three children and a root with two single-compartment children:
    # several path heads of one level hang from the same compartment
    yield "fan", np.array([-1, 0, 0, 1, 1, 1, 3, 4, 5, 5])


@pytest.mark.parametrize("name,parent", list(_parents()))
def test_heavy_path_solver_matches_level_elimination(name, parent):
    levels = np.concatenate([[0], np.cumsum(np.bincount(_depth(parent)))]).astype(np.int64)
    for seed in range(2):
        d, b, r = _system(parent, seed)
        x_tree = TreeMatrix(parent, levels).solve(d, b, r)
        x_schur = HeavyPathSolver(parent, b).solve(d, b, r)
        scale = np.max(np.abs(x_tree))
        assert np.max(np.abs(x_schur - x_tree)) <= 1e-12 * scale
        a = _matrix(parent, d, b)
        assert np.max(np.abs(a @ x_schur - r)) <= 1e-12 * np.max(np.abs(r)) * 10


def _depth(parent):
    depth = np.zeros(parent.size, np.int64)
    for i in range(1, parent.size):
        depth[i] = depth[parent[i]] + 1
    assert np.all(np.diff(depth) >= 0)  # depth-ordered, as the grid stores them
    return depth


@pytest.mark.parametrize("name,parent", list(_parents()))
def test_heavy_path_solver_reuses_its_factorisation_only_for_the_same_diagonal(name, parent):
    # reference: the same Hines (1984) level elimination, solved afresh each time
    levels = np.concatenate([[0], np.cumsum(np.bincount(_depth(parent)))]).astype(np.int64)
    d, b, r = _system(parent, 0)
    _, _, r2 = _system(parent, 1)
    d2 = d + np.random.default_rng(1).uniform(0.0, 0.3, d.size)  # still diagonally dominant
    solver = HeavyPathSolver(parent, b)
    tree = TreeMatrix(parent, levels)
    work = d.copy()  # the caller may refill the same array between calls
    for diag, rhs in ((d, r), (d, r2), (d2, r2), (d2, r), (d, r)):
        work[:] = diag
        x = solver.solve(work, b, rhs)
        x_tree = tree.solve(diag, b, rhs)
        assert np.max(np.abs(x - x_tree)) <= 1e-12 * np.max(np.abs(x_tree))


@pytest.mark.parametrize("name,parent", list(_parents()))
def test_heavy_path_solver_matches_scipy_spsolve(name, parent):
    # reference: scipy.sparse.linalg.spsolve (SuperLU) on the independently assembled
    # matrix; tolerance 1e-12 relative to the largest |x| (both are direct solves of a
    # well-conditioned, diagonally dominant system)
    d, b, r = _system(parent, 3)
    exact = np.atleast_1d(spla.spsolve(_matrix(parent, d, b).tocsc(), r))
    out = np.full(parent.size, np.nan)
    x = HeavyPathSolver(parent, b).solve(d, b, r, out=out)
    assert x is out
    assert np.max(np.abs(x - exact)) <= 1e-12 * np.max(np.abs(exact))


@pytest.mark.parametrize("name,parent", list(_parents()))
def test_heavy_paths_cover_the_tree_in_at_most_log2_n_levels(name, parent):
    # reference: Sleator & Tarjan (1983, J Comput Syst Sci 26:362-391): a root-to-leaf
    # walk changes heavy path at most log2(n) times, so there are at most
    # floor(log2(n)) + 1 levels; each path runs from its far end to its head, every
    # compartment's successor on a path is its parent
    order, path_level, path_start = _heavy_paths(parent)
    n = parent.size
    assert np.array_equal(np.sort(order), np.arange(n))
    assert path_level[0] == 0 and np.all(np.diff(path_level) >= 0)
    assert path_level[-1] <= int(np.floor(np.log2(n)))
    assert path_start[0] == 0 and path_start[-1] == n and np.all(np.diff(path_start) > 0)
    for s, e in zip(path_start[:-1], path_start[1:]):
        assert np.all(parent[order[s:e - 1]] == order[s + 1:e])


def test_heavy_path_solver_rejects_a_matrix_that_is_not_positive_definite():
    # reference: a symmetric matrix with a negative diagonal entry is not positive
    # definite, which LAPACK dpttrf reports (info > 0)
    parent = np.arange(-1, 9)
    d, b, r = _system(parent, 0)
    d[4] = -1.0
    with pytest.raises(NumericalInstabilityError) as info:
        HeavyPathSolver(parent, b).solve(d, b, r)
    assert isinstance(info.value, CableTreeError)
    assert 0 <= info.value.compartment < parent.size


def test_tree_matrix_factor_then_solve_equals_solve():
    # reference: TreeMatrix.solve, which factors and solves in one call
    parent = build_grid(synthetic.random_tree(30, seed=4, samples_per_branch=3)).parent
    levels = np.concatenate([[0], np.cumsum(np.bincount(_depth(parent)))]).astype(np.int64)
    d, b, r = _system(parent, 2)
    tree = TreeMatrix(parent, levels)
    factors = tree.factor(d, b)
    d_before, r_before = d.copy(), r.copy()
    for rhs in (r, 2.0 * r - 1.0):
        assert np.array_equal(tree.solve_factored(factors, b, rhs), tree.solve(d, b, rhs))
    assert np.array_equal(d, d_before) and np.array_equal(r, r_before)  # inputs untouched


def test_injections_into_one_compartment_add_up():
    # reference: superposition of injected currents (Kirchhoff's current law at the
    # compartment): 0.25 nA + 0.5 nA + 0.25 nA (staggered onsets) into the soma acts
    # like their sum
    cell = build_cell(synthetic.random_tree(6, seed=3),
                      channels=[ChannelPlacement(hh_sodium, 0.12),
                                ChannelPlacement(hh_potassium, 0.036)])
    soma = soma_site(cell.grid)
    split = cell.with_inputs(injections=[CurrentInjection(soma, StepCurrent(0.25, 0.5, 5.0)),
                                         CurrentInjection(soma, StepCurrent(0.5, 0.5, 5.0)),
                                         CurrentInjection(soma, StepCurrent(0.25, 1.0, 5.0))],
                             recording_sites=[soma])
    joined = cell.with_inputs(injections=[CurrentInjection(soma, StepCurrent(0.75, 0.5, 0.5)),
                                          CurrentInjection(soma, StepCurrent(1.0, 1.0, 4.5)),
                                          CurrentInjection(soma, StepCurrent(0.25, 5.5, 0.5))],
                              recording_sites=[soma])
    settings = RunSettings(8.0, 0.025)
    a = simulate(split, settings, backend="reference").v_mV
    b = simulate(joined, settings, backend="reference").v_mV
    assert np.max(a) > 0.0  # the drive fires a spike, so the comparison is not trivial
    assert np.max(np.abs(a - b)) <= 1e-9 * np.max(np.abs(b))
