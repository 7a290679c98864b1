"""Density profiles, selectors and placements (cabletree.profiles).

Profiles are checked against their closed-form definitions (module docstring of
cabletree.profiles) at arbitrary points; selectors on a small hand-built tree whose
path distances and branch orders are known by construction.
"""

import math

import numpy as np
import pytest

from cabletree.channels import hoffman_gradient, ka_distal, ka_proximal
from cabletree.errors import ProfileError
from cabletree.grid import SpacingRule, build_grid
from cabletree.morphology.soma import make_morphology
from cabletree.profiles import (
    PROFILES, ChannelPlacement, Exponential, Linear, MembranePlacement, Selector, Sigmoid,
    SpineCorrection, Step, Table, Uniform, as_profile, evaluate, make_profile,
)

X = np.array([0.0, 3.7, 55.5, 99.9, 100.0, 250.25, 612.0])


@pytest.fixture(scope="module")
def grid():
    """Soma (r = 10 µm), a straight apical trunk of 400 µm forking at its end into two
    100 µm daughters, and one basal stem of 100 µm, all along axes so that path
    distances are known exactly."""
    xyz = [(0, 0, 0), (10, 0, 0), (410, 0, 0), (510, 0, 0), (410, 100, 0), (-10, 0, 0),
           (-110, 0, 0)]
    kinds = [1, 4, 4, 4, 4, 3, 3]
    radius = [10, 1, 1, 0.5, 0.5, 0.8, 0.8]
    parent = [-1, 0, 1, 2, 2, 0, 5]
    morph = make_morphology(np.arange(1, 8), np.array(kinds), np.array(xyz, float),
                            np.array(radius, float), np.array(parent))
    return build_grid(morph, SpacingRule(max_length_um=10.0, lambda_fraction=None))


@pytest.mark.parametrize("profile, formula", [
    (Uniform(0.04), lambda x: np.full_like(x, 0.04)),
    (Linear(0.01, 2e-4), lambda x: 0.01 + 2e-4 * x),
    (Exponential(2.0, 150.0), lambda x: 2.0 * np.exp(x / 150.0)),
    (Exponential(2.0, -80.0, baseline=0.5), lambda x: 0.5 + 2.0 * np.exp(-x / 80.0)),
    (Sigmoid(1.0, 7.0, 260.0, 30.0), lambda x: 1.0 + 6.0 / (1.0 + np.exp(-(x - 260.0) / 30.0))),
    (Step(0.3, 0.9, 100.0), lambda x: np.where(x < 100.0, 0.3, 0.9)),
])
def test_profile_equals_formula(profile, formula):
    np.testing.assert_allclose(profile(X), formula(X), rtol=1e-15, atol=0)
    assert profile(X).shape == X.shape
    assert float(profile(42.0)) == pytest.approx(float(formula(np.array(42.0))), rel=1e-15)


def test_step_threshold_belongs_above():
    assert Step(1.0, 2.0, 100.0)(np.array([99.999, 100.0])).tolist() == [1.0, 2.0]


def test_table_interpolates_and_holds_ends():
    t = Table(x=(0.0, 100.0, 300.0), values=(1.0, 3.0, 2.0))
    np.testing.assert_allclose(t(np.array([-50.0, 0.0, 25.0, 100.0, 200.0, 300.0, 1e4])),
                               [1.0, 1.0, 1.5, 3.0, 2.5, 2.0, 2.0], rtol=1e-15)
    assert Table(x=[5.0], values=[7.0])(np.array([0.0, 9.0])).tolist() == [7.0, 7.0]


def test_floor_and_ceiling_clip_after_evaluation():
    p = Linear(1.0, -0.01, floor=0.2, ceiling=0.9)
    np.testing.assert_allclose(p(np.array([0.0, 50.0, 500.0])), [0.9, 0.5, 0.2])
    assert Exponential(1.0, 100.0, ceiling=2.0)(np.array([1000.0]))[0] == 2.0


def test_registry_and_make_profile():
    assert set(PROFILES) == {"uniform", "linear", "exponential", "sigmoid", "step", "table"}
    assert make_profile("sigmoid", low=0, high=1, midpoint_um=10, width_um=2) == \
        Sigmoid(0.0, 1.0, 10.0, 2.0)
    assert make_profile("table", x=[0, 1], values=[2, 3], variable="branch_order") == \
        Table(x=(0.0, 1.0), values=(2.0, 3.0), variable="branch_order")
    assert as_profile(0.5) == Uniform(0.5)
    p = Linear(1.0, 2.0)
    assert as_profile(p) is p


@pytest.mark.parametrize("call, message", [
    (lambda: make_profile("linaer", value_at_zero=1, slope_per_um=0),
     "unknown profile kind 'linaer'; did you mean 'linear'?"),
    (lambda: make_profile("linear", value_at_zero=1, slope=2),
     "profile 'linear': unknown parameter 'slope'; did you mean 'slope_per_um'?"),
    (lambda: make_profile("step", below=1, above=2),
     "profile 'step': missing parameter 'threshold_um'"),
    (lambda: Sigmoid(0, 1, 10, 0), "Sigmoid: field 'width_um' must be > 0, got 0.0"),
    (lambda: Exponential(1, 0), "Exponential: field 'length_constant_um' must be non-zero"),
    (lambda: Linear(1, float("nan")), "Linear: field 'slope_per_um' must be a finite number"),
    (lambda: Uniform("a"), "Uniform: field 'value' must be a finite number, got 'a'"),
    (lambda: Uniform(1, floor=2, ceiling=1), "Uniform: field 'floor' (2.0) must not exceed"),
    (lambda: Uniform(1, variable="distance"), "Uniform: field 'variable' must be one of"),
    (lambda: Table(x=(0, 2, 1), values=(1, 2, 3)),
     "Table: field 'x' must be strictly increasing, but x[2] = 1.0 follows x[1] = 2.0"),
    (lambda: Table(x=(0, 1), values=(1,)), "Table: fields 'x' and 'values' must have the same"),
    (lambda: as_profile("x"), "expected a number or a profile, got 'x'"),
    (lambda: Selector(path_distance_um=(100, 50)), "Selector: field 'path_distance_um' must have lo < hi"),
    (lambda: Selector(branch_order=(0.5, 2)), "Selector: field 'branch_order' must hold integers"),
    (lambda: Selector(swc_types=()), "Selector: field 'swc_types' is empty"),
    (lambda: ChannelPlacement(ka_distal, 0.01, parameters={"shift": 1.0}),
     "ChannelPlacement of 'ka_distal': unknown parameter 'shift'; did you mean 'shift_mV'?"),
    (lambda: ChannelPlacement(ka_distal, "big"),
     "ChannelPlacement of 'ka_distal': field 'gmax_S_per_cm2' must be a number or a profile"),
    (lambda: MembranePlacement("cm", 1.0),
     "MembranePlacement: unknown parameter 'cm'; did you mean 'cm_uF_per_cm2'?"),
])
def test_pinned_error_messages(call, message):
    with pytest.raises(ProfileError) as info:
        call()
    assert message in str(info.value)


def test_evaluate_uses_profile_variable(grid):
    pd = grid.path_distance_um
    np.testing.assert_allclose(evaluate(Linear(1.0, 0.5), grid, None), 1.0 + 0.5 * pd)
    idx = np.nonzero(grid.swc_type == 4)[0]
    np.testing.assert_allclose(evaluate(Linear(1.0, 0.5), grid, idx), 1.0 + 0.5 * pd[idx])
    by_order = evaluate(Table(x=(0, 1, 2), values=(5, 6, 7), variable="branch_order"), grid, None)
    np.testing.assert_allclose(by_order, 5.0 + grid.branch_order)
    assert evaluate(0.25, grid, idx).tolist() == [0.25] * idx.size


def test_selector_masks_on_known_tree(grid):
    pd, t, order = grid.path_distance_um, grid.swc_type, grid.branch_order
    # by construction: trunk 10..410 µm (order 1), daughters 410..510 µm (order 2),
    # basal 10..110 µm (order 1), soma at 0 (order 0)
    assert pd.max() == pytest.approx(510.0)
    assert np.all(Selector().mask(grid))
    np.testing.assert_array_equal(Selector(swc_types=(4,)).mask(grid), t == 4)
    np.testing.assert_array_equal(Selector(swc_types=(1, 3)).mask(grid), (t == 1) | (t == 3))
    m = Selector(path_distance_um=(100.0, 410.0)).mask(grid)
    np.testing.assert_array_equal(m, (pd >= 100.0) & (pd < 410.0))
    assert np.any(pd == 100.0) and np.all(m[pd == 100.0])        # lower bound inclusive
    assert np.any(pd == 410.0) and not np.any(m[pd == 410.0])      # upper bound exclusive
    daughters = Selector(swc_types=(4,), branch_order=(2, 3)).mask(grid)
    np.testing.assert_array_equal(daughters, (t == 4) & (order == 2))
    assert daughters.sum() == 20  # two 100 µm daughters at 10 µm spacing (fork node is order 1)
    both = Selector(swc_types=(4,), path_distance_um=(0, 100)).mask(grid)
    np.testing.assert_array_equal(both, (t == 4) & (pd < 100))
    # adjacent half-open ranges partition the tree
    a = Selector(path_distance_um=(0, 100)).mask(grid)
    b = Selector(path_distance_um=(100, math.inf)).mask(grid)
    assert not np.any(a & b) and np.all(a | b)


def test_channel_placement_normalises_and_validates():
    pl = ChannelPlacement(ka_proximal, 0.01, Selector(swc_types=[4]),
                          parameters={"shift_mV": Linear(0.0, -0.02)}, reversal_mV=-85)
    assert pl.gmax_S_per_cm2 == Uniform(0.01)
    assert pl.parameters == (("shift_mV", Linear(0.0, -0.02)),)
    assert pl.reversal_mV == Uniform(-85.0)
    assert pl.where.swc_types == (4,)
    assert ChannelPlacement(ka_proximal, 0.01).parameters == ()
    assert dict(ChannelPlacement(ka_proximal, 0.01, parameters=(("v_half_n_mV", 9.0),))
                .parameters) == {"v_half_n_mV": Uniform(9.0)}


def test_membrane_placement_and_spine_correction():
    sc = SpineCorrection(2.0, Selector(path_distance_um=(100, math.inf)))
    assert sc == MembranePlacement("spine_factor", 2.0, Selector(path_distance_um=(100, math.inf)))
    assert sc.value == Uniform(2.0)


def test_hoffman_gradient_on_grid(grid):
    # REFERENCES §3 test 4 [D]: g(350)/g(0) = 5 +- 0.01 for the gradient used
    g = evaluate(hoffman_gradient(0.005), grid, None)
    pd = grid.path_distance_um
    at350 = np.nonzero(np.isclose(pd, 350.0))[0]
    assert at350.size == 1
    assert g[at350[0]] / g[0] == pytest.approx(5.0, abs=0.01)
