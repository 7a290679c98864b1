"""Grid: spacing rule, geometry of compartments, ordering."""

import math

import numpy as np
import pytest

from cabletree.errors import GridError
from cabletree.grid import SpacingRule, ac_length_constant_um, build_grid
from cabletree.morphology import synthetic
from cabletree.morphology.samples import Morphology


def test_ac_length_constant_worked_example():
    # REFERENCES §6.1 / test 1: λ_100(d = 2 µm, Ri = 150 Ω·cm, Cm = 1 µF/cm²) =
    # 325.735 µm (Hines & Carnevale 2001 form, derived).
    assert ac_length_constant_um(2.0, 100.0, 150.0, 1.0) == pytest.approx(325.735, rel=1e-6)


def test_lambda_rule_piece_count():
    # A 1000 µm, 2 µm cable with the 0.1 λ_100 rule gets ceil(1000/32.57) = 31 pieces.
    morph = synthetic.cylinder(1000.0, 2.0, n_samples=2)
    grid = build_grid(morph, SpacingRule(max_length_um=None, lambda_fraction=0.1),
                      axial_resistivity_ohm_cm=150.0, cm_uF_per_cm2=1.0)
    assert grid.n_compartments == 32  # 31 pieces, 32 nodes


def test_areas_and_axial_resistance_of_a_frustum():
    # Frustum R1 = 1 -> R2 = 0.5 µm over 100 µm: lateral area
    # π (R1 + R2) sqrt(l² + (R1 - R2)²) = 471.245 µm² (REFERENCES §7 test 3) and
    # ∫ dx/(π r²) = l/(π R1 R2) (exact for a linear taper).
    morph = Morphology(np.array([1, 2]), np.array([3, 3]), np.array([[0, 0, 0], [100.0, 0, 0]]),
                       np.array([1.0, 0.5]), np.array([-1, 0]))
    grid = build_grid(morph, SpacingRule(max_length_um=7.0, lambda_fraction=None))
    slant = math.sqrt(100 ** 2 + 0.5 ** 2) / 100
    assert grid.area_um2.sum() == pytest.approx(math.pi * 1.5 * 100 * slant, rel=1e-12)
    assert grid.area_um2.sum() == pytest.approx(471.245, rel=1e-6)
    assert grid.resistance_integral_per_um.sum() == pytest.approx(100 / (math.pi * 0.5), rel=1e-12)


def test_ball_and_stick_soma_area():
    # Sphere area 4πr² plus the dendrite's π d L (derived).
    morph = synthetic.ball_and_stick(20.0, 200.0, 2.0)
    grid = build_grid(morph, SpacingRule(max_length_um=10.0, lambda_fraction=None))
    assert grid.has_soma and grid.swc_type[0] == 1
    assert grid.area_um2.sum() == pytest.approx(4 * math.pi * 100 + math.pi * 2 * 200, rel=1e-6)
    assert grid.path_distance_um.max() == pytest.approx(210.0, rel=1e-6)


def test_depth_ordering_parent_first():
    morph = synthetic.random_tree(60, seed=11)
    grid = build_grid(morph, SpacingRule(max_length_um=8.0, lambda_fraction=None))
    idx = np.arange(1, grid.n_compartments)
    assert np.all(grid.parent[1:] < idx)
    assert np.all(np.diff(grid.depth) >= 0)
    assert np.all(grid.depth[1:] == grid.depth[grid.parent[1:]] + 1)
    b = grid.level_bounds()
    assert b[0] == 0 and b[-1] == grid.n_compartments
    # every branch's node list starts at a node and runs distally
    for nodes in grid.branch_nodes:
        assert np.all(np.diff(grid.path_distance_um[nodes]) > 0)


def test_spacing_rule_validation_messages():
    with pytest.raises(GridError, match="max_length_um must be > 0"):
        SpacingRule(max_length_um=0.0)
    with pytest.raises(GridError, match="give max_length_um, lambda_fraction or both"):
        SpacingRule(max_length_um=None, lambda_fraction=None)


def test_compartment_at_branch_position():
    grid = build_grid(synthetic.ball_and_stick(20.0, 200.0, 2.0),
                      SpacingRule(max_length_um=10.0, lambda_fraction=None))
    end = grid.compartment_at(0, 1.0)
    assert grid.path_distance_um[end] == pytest.approx(210.0, rel=1e-6)
    with pytest.raises(GridError, match="branch 5 does not exist"):
        grid.compartment_at(5, 0.5)
