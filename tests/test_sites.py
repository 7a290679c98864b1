"""Sites: named compartments for recording and injection."""

import numpy as np
import pytest

from cabletree.errors import CellModelError
from cabletree.grid import SpacingRule, build_grid
from cabletree.morphology import synthetic
from cabletree.sites import site_at_distance, site_on_branch, soma_site


@pytest.fixture(scope="module")
def grid():
    return build_grid(synthetic.pyramidal_cell(seed=0), SpacingRule(max_length_um=20.0))


def test_sites_fall_on_the_apical_trunk(grid):
    # On a pyramidal cell "apical 200 µm" means the trunk (common practice in
    # dendritic recordings): the chosen nodes lie on one path from the soma and
    # are the thickest apical compartments near each distance.
    chosen = [site_at_distance(grid, d, swc_types=(4,)).compartment for d in (50, 150, 250, 350)]
    for c, d in zip(chosen, (50, 150, 250, 350)):
        near = np.nonzero((grid.swc_type == 4) & (abs(grid.path_distance_um - d) <= 10.0))[0]
        assert grid.diameter_um[c] >= 0.9 * grid.diameter_um[near].max()
        assert abs(grid.path_distance_um[c] - d) <= 0.5 * grid.length_um[grid.swc_type == 4].max() + 1e-9
    # each later site descends from the earlier one (same path)
    for proximal, distal in zip(chosen, chosen[1:]):
        node = distal
        while node > 0 and node != proximal:
            node = int(grid.parent[node])
        assert node == proximal
    assert np.all(np.diff(grid.diameter_um[chosen]) <= 0)  # a tapering trunk


def test_site_errors_and_names(grid):
    assert soma_site(grid).compartment == 0
    assert site_at_distance(grid, 100.0).name == "apical_100um"
    with pytest.raises(CellModelError, match=r"no compartment of SWC type\(s\) \(4,\) within"):
        site_at_distance(grid, 5000.0)
    with pytest.raises(CellModelError, match=r"no compartment of SWC type\(s\) \(7,\)"):
        site_at_distance(grid, 10.0, swc_types=(7,))
    s = site_on_branch(grid, 0, 1.0)
    assert s.compartment == grid.branch_nodes[0][-1]
