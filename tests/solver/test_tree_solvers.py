"""The reference backend's tree solvers against a dense solve (numpy.linalg.solve).

REFERENCES §6 test 4: the O(N) leaf-to-root elimination (Hines 1984, Int J Biomed
Comput 15:69-76) matches a dense solve to 1e-10 relative on random trees.
"""

import numpy as np
import pytest

from cabletree.grid import SpacingRule, build_grid
from cabletree.morphology import synthetic
from cabletree.solver.reference import HeavyPathSolver, TreeMatrix


def _system(grid, seed):
    rng = np.random.default_rng(seed)
    n = grid.n_compartments
    b = -rng.uniform(0.5, 2.0, n)
    b[0] = 0.0
    d = -b + np.bincount(grid.parent[1:], -b[1:], minlength=n) + rng.uniform(0.01, 1.0, n)
    r = rng.normal(size=n)
    A = np.diag(d)
    for i in range(1, n):
        A[i, grid.parent[i]] = A[grid.parent[i], i] = b[i]
    return A, d, b, r


GRIDS = {
    "soma_only_plus_one": lambda: synthetic.ball_and_stick(20.0, 10.0, 2.0, n_samples=2),
    "ball_and_stick": lambda: synthetic.ball_and_stick(20.0, 200.0, 2.0),
    "cable": lambda: synthetic.cylinder(300.0, 2.0, n_samples=2),
    "y_tree": lambda: synthetic.y_tree(100.0, 2.0, 80.0, 1.26),
    "random": lambda: synthetic.random_tree(80, seed=5),
}


@pytest.mark.parametrize("name", sorted(GRIDS))
@pytest.mark.parametrize("piece_um", [5.0, 1e3])
def test_solvers_match_dense(name, piece_um):
    grid = build_grid(GRIDS[name](), SpacingRule(max_length_um=piece_um, lambda_fraction=None))
    A, d, b, r = _system(grid, seed=grid.n_compartments)
    exact = np.linalg.solve(A, r)
    level = TreeMatrix(grid.parent, grid.level_bounds()).solve(d, b, r)
    schur = HeavyPathSolver(grid.parent, b).solve(d, b, r)
    np.testing.assert_allclose(level, exact, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(schur, exact, rtol=1e-10, atol=1e-12)
