"""Passive cable theory: the solver against closed-form solutions.

Sources: Rall 1959 (Exp Neurol 1:491-527), Rall 1962 (Ann NY Acad Sci
96:1071-1092), Hodgkin & Rushton 1946 (Proc R Soc Lond B 133:444-479), Jack,
Noble & Tsien 1975 (Electric Current Flow in Excitable Cells), Koch 1999
(Biophysics of Computation); values of REFERENCES §1.
"""

import math

import numpy as np
import pytest
from scipy.special import erf

from cabletree.cell import CurrentInjection
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.sites import Site
from cabletree.solver import RunSettings, simulate
from cabletree.solver.passive import (input_resistance_MOhm, steady_state_mV,
                                      transfer_resistance_MOhm)

from .cable_cases import (DIAMETER_UM, TAU_MS, length_constant_um, passive_cell,
                          r_infinity_MOhm)

LAMBDA = length_constant_um()


def test_worked_example_constants():
    # REFERENCES §1.1 / §1.2: λ = 816.50 µm and R∞ = 389.85 MΩ for the worked example.
    assert LAMBDA == pytest.approx(816.4966, rel=1e-6)
    assert r_infinity_MOhm() == pytest.approx(389.85, rel=1e-4)


@pytest.mark.parametrize("electrotonic_length", [0.5, 1.0, 2.0])
def test_sealed_cylinder_profile_and_input_resistance(electrotonic_length):
    # Sealed far end, current at X = 0: V(X)/V(0) = cosh(L - X)/cosh(L) and
    # R_in = R∞ coth(L) (Rall; Jack, Noble & Tsien 1975). Fine grid: within 0.5 %
    # (the bound); the vertex-centred error is ~1e-5 here.
    L = electrotonic_length
    morph = synthetic.cylinder(L * LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, L * LAMBDA / 200)
    inj = np.zeros(cell.n_compartments)
    inj[0] = 0.1
    v = steady_state_mV(cell, inj, holding_mV=0.0)
    X = cell.grid.path_distance_um / LAMBDA
    np.testing.assert_allclose(v / v[0], np.cosh(L - X) / math.cosh(L), rtol=5e-3)
    r_in = v[0] / 0.1
    assert r_in == pytest.approx(r_infinity_MOhm() / math.tanh(L), rel=1e-3)


def test_sealed_cylinder_reference_values():
    # REFERENCES §1 tests 2-3: R_in(L=1) = 511.88 MΩ within 0.01 % on >= 31 nodes;
    # V(L)/V(0) = 1/cosh(1) = 0.64805 within 0.05 % on 101 nodes.
    morph = synthetic.cylinder(LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, LAMBDA / 100)
    assert input_resistance_MOhm(cell, 0, holding_mV=0.0) == pytest.approx(511.88, rel=1e-4)
    tip = int(np.argmax(cell.grid.path_distance_um))
    ratio = transfer_resistance_MOhm(cell, 0, tip, 0.0) / input_resistance_MOhm(cell, 0, 0.0)
    assert ratio == pytest.approx(0.64805, rel=5e-4)


def test_time_stepping_reaches_the_steady_state():
    # The time stepper's late potential equals the direct O(N) steady-state solve
    # of the same grid (and so R∞ coth L, above).
    morph = synthetic.cylinder(LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, LAMBDA / 20, injections=[CurrentInjection(Site("x0", 0),
                                                                         StepCurrent(0.1, 0.0, 1e9))])
    out = simulate(cell, RunSettings(t_stop_ms=15 * TAU_MS, dt_ms=0.5, v_init_mV=0.0))
    inj = np.zeros(cell.n_compartments)
    inj[0] = 0.1
    v_ss = steady_state_mV(cell, inj, holding_mV=0.0)
    assert out.v_mV[-1, 0] == pytest.approx(v_ss[0], rel=1e-5)


def test_isopotential_compartment_charging():
    # Isopotential cell, current step: V(t) = I R (1 - exp(-t/τ)), τ = Rm Cm
    # (textbook RC circuit). A single-point soma is one compartment.
    from cabletree.morphology.samples import Morphology
    morph = Morphology(np.array([1]), np.array([1]), np.zeros((1, 3)), np.array([10.0]),
                       np.array([-1]), soma_center_um=np.zeros(3), soma_radius_um=10.0,
                       soma_kind="single_point")
    cell = passive_cell(morph, 10.0, injections=[CurrentInjection(Site("soma", 0),
                                                                  StepCurrent(0.01, 0.0, 1e9))])
    assert cell.n_compartments == 1
    out = simulate(cell, RunSettings(t_stop_ms=60.0, dt_ms=0.01, v_init_mV=0.0))
    area_cm2 = 4 * math.pi * 10.0 ** 2 * 1e-8
    r_MOhm = 20_000.0 / area_cm2 * 1e-6
    expected = 0.01 * r_MOhm * (1 - np.exp(-out.time_ms / TAU_MS))
    # CN with two damping half-steps at the start: global error O(dt²), far below 1e-5 of V∞
    np.testing.assert_allclose(out.v_mV[:, 0], expected, rtol=0, atol=1e-5 * 0.01 * r_MOhm)
    # REFERENCES §1.2: a 20 µm sphere has R = Rm/(π D²) = 1.5915 GΩ.
    assert r_MOhm == pytest.approx(1591.5, rel=1e-4)


@pytest.mark.slow
def test_semi_infinite_cable_charging():
    # Semi-infinite cable, step at X = 0: V(0, T) = I R∞ erf(sqrt(T)) (Hodgkin &
    # Rushton 1946; Jack, Noble & Tsien 1975). A sealed cable 5 λ long stands in
    # for the semi-infinite one (coth 5 = 1.00009). REFERENCES §1 test 6:
    # V(0,τ)/V∞ = 0.8427 within 0.5 %, V(0,τ/4)/V∞ = 0.5205 within 1 %.
    morph = synthetic.cylinder(5 * LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, LAMBDA / 50, injections=[CurrentInjection(Site("x0", 0),
                                                                         StepCurrent(0.1, 0.0, 1e9))])
    out = simulate(cell, RunSettings(t_stop_ms=TAU_MS, dt_ms=TAU_MS / 1000, v_init_mV=0.0,
                                     record_interval_ms=TAU_MS / 4))
    v_inf = 0.1 * r_infinity_MOhm()
    got = out.v_mV[:, 0] / v_inf
    T = out.time_ms / TAU_MS
    assert got[-1] == pytest.approx(0.84270, rel=5e-3)
    assert got[1] == pytest.approx(0.52050, rel=1e-2)
    np.testing.assert_allclose(got[1:], erf(np.sqrt(T[1:])), rtol=1e-2)


# --- Rall's 3/2-power rule and the equivalent cylinder (REFERENCES §1.5) -------------
D0, L0_UM = 2.0, 200.0
D1 = 2.0 * 2.0 ** (-2.0 / 3.0)  # 1.25992 µm: d0^(3/2) = 2 d1^(3/2)
LAMBDA1 = length_constant_um(D1)
L1_UM = 0.5 * LAMBDA1  # each daughter L1 = 0.5


def _y_cell(daughter_diameters=(D1, D1), piece_um=2.0, **kwargs):
    from cabletree.morphology.samples import Morphology
    # trunk along x, daughters at ±30°; built here so the two daughters can differ
    pts = [np.zeros(3), np.array([L0_UM, 0, 0])]
    types, radius, parent = [3, 3], [D0 / 2, D0 / 2], [-1, 0]
    for sign, dd in zip((1, -1), daughter_diameters):
        direction = np.array([math.cos(math.radians(30)), sign * math.sin(math.radians(30)), 0])
        pts.append(pts[1] + L1_UM * direction)
        types.append(3)
        radius.append(dd / 2)
        parent.append(1)
    # each daughter leaves the branch point with its own radius (grid convention)
    xyz, rad, par, typ = pts, radius, parent, types
    morph = Morphology(np.arange(1, len(xyz) + 1), np.array(typ), np.array(xyz), np.array(rad),
                       np.array(par))
    return passive_cell(morph, piece_um, **kwargs)


def _tips(cell):
    g = cell.grid
    return [int(nodes[-1]) for nodes in g.branch_nodes if len(nodes) > 1 and g.branch[nodes[-1]] != 0][-2:]


def test_equivalent_cylinder_steady_state():
    # Rall 1962 equivalent cylinder: the Y tree obeying the 3/2 rule with equal
    # electrotonic lengths (L = 0.24495 + 0.5) behaves, seen from the trunk origin,
    # like one cylinder of the trunk diameter. REFERENCES §1 test 7.
    cell = _y_cell()
    r_origin = input_resistance_MOhm(cell, 0, 0.0)
    assert r_origin == pytest.approx(616.73, rel=1e-3)
    tip_a, tip_b = _tips(cell)
    va = transfer_resistance_MOhm(cell, 0, tip_a, 0.0)
    vb = transfer_resistance_MOhm(cell, 0, tip_b, 0.0)
    assert va == pytest.approx(vb, rel=1e-9)
    assert va / r_origin == pytest.approx(0.77487, rel=1e-3)  # 1/cosh(0.74495)
    # tip -> origin transfer resistance = R∞/sinh(L) (Rall & Rinzel 1973 principle)
    assert transfer_resistance_MOhm(cell, tip_a, 0, 0.0) == pytest.approx(477.88, rel=1e-3)
    # the tip's own input resistance is NOT the cylinder's: R∞ [coth L + tanh L1]
    assert input_resistance_MOhm(cell, tip_a, 0.0) == pytest.approx(796.88, rel=1e-3)
    ratio = transfer_resistance_MOhm(cell, tip_a, tip_b, 0.0) / input_resistance_MOhm(cell, tip_a, 0.0)
    assert ratio == pytest.approx(0.54785, rel=1e-3)


def test_equivalent_cylinder_negative_control():
    # Perturbing one daughter diameter by 10 % breaks the equal-tip property.
    cell = _y_cell((D1 * 1.1, D1))
    tip_a, tip_b = _tips(cell)
    va = transfer_resistance_MOhm(cell, 0, tip_a, 0.0)
    vb = transfer_resistance_MOhm(cell, 0, tip_b, 0.0)
    assert abs(va / vb - 1) > 1e-3


def test_equivalent_cylinder_transient():
    # Transients at the trunk origin equal those of the equivalent cylinder
    # (Rall 1962; REFERENCES §1.5 item 5): same step response within 0.5 %.
    step = [CurrentInjection(Site("origin", 0), StepCurrent(0.1, 0.0, 1e9))]
    tree = _y_cell(injections=step)
    L_total_um = (L0_UM / LAMBDA + 0.5) * LAMBDA
    cyl = passive_cell(synthetic.cylinder(L_total_um, D0, n_samples=2), 2.0, injections=step)
    settings = RunSettings(t_stop_ms=30.0, dt_ms=0.025, v_init_mV=0.0, record_interval_ms=0.5)
    v_tree = simulate(tree, settings).v_mV[1:, 0]
    v_cyl = simulate(cyl, settings).v_mV[1:, 0]
    np.testing.assert_allclose(v_tree, v_cyl, rtol=5e-3)


def test_reciprocity_on_a_random_tree():
    # Transfer-resistance reciprocity K_ij = K_ji of any linear passive tree
    # (Koch 1999); REFERENCES §1 test 5: to 1e-9 relative.
    morph = synthetic.random_tree(40, seed=3)
    cell = passive_cell(morph, 10.0)
    rng = np.random.default_rng(0)
    for i, j in rng.integers(0, cell.n_compartments, size=(5, 2)):
        kij = transfer_resistance_MOhm(cell, int(i), int(j), 0.0)
        kji = transfer_resistance_MOhm(cell, int(j), int(i), 0.0)
        assert kij == pytest.approx(kji, rel=1e-9)
