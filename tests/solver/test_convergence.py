"""Orders of accuracy in time and space.

Temporal references are the exact solution of the same semi-discrete linear
system ``C dV/dt = -G V + I`` from scipy's eigensolver (scipy.linalg.eigh), so
only the time-stepping error is measured.  Spatial reference: the sealed-cable
input resistance R∞ coth L (Rall; REFERENCES §6 test 2: vertex-centred errors
fall about 4× per halving of Δx).  Expected orders: backward Euler 1 and
Crank-Nicolson 2 (Mascagni & Sherman 1998; Hines 1984).
"""

import math

import numpy as np
import pytest
import scipy.linalg

from cabletree.cell import CurrentInjection
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.sites import Site
from cabletree.solver import RunSettings, simulate
from cabletree.solver.passive import conductance_matrix, input_resistance_MOhm

from .cable_cases import DIAMETER_UM, length_constant_um, passive_cell, r_infinity_MOhm

LAMBDA = length_constant_um()


def _exact_semidiscrete(cell, current_nA, t_ms, compartment=0):
    """Exact V(t) of C dV/dt = -G V + I e_k with V(0) = 0 (eigen-decomposition)."""
    G = conductance_matrix(cell, 0.0).toarray()
    C = cell.capacitance_nF
    s = 1 / np.sqrt(C)
    w, U = scipy.linalg.eigh(s[:, None] * G * s[None, :])
    b = np.zeros(len(C))
    b[compartment] = current_nA
    coef = U.T @ (s * b)  # modal forcing
    modal = coef[:, None] / w[:, None] * (1 - np.exp(-w[:, None] * t_ms[None, :]))
    return (s[:, None] * (U @ modal))[compartment]


def _order(errors, dts):
    return np.polyfit(np.log(dts), np.log(errors), 1)[0]


@pytest.mark.parametrize("method,expected", [("backward_euler", 1.0), ("crank_nicolson", 2.0)])
def test_temporal_order(method, expected):
    # Step current switched on at t = 1 ms (an input discontinuity the CN
    # scheme must damp: Rannacher smoothing), recorded at t = 6 ms.
    morph = synthetic.cylinder(LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, LAMBDA / 40, injections=[
        CurrentInjection(Site("x0", 0), StepCurrent(0.1, 1.0, 1e9))])
    exact = _exact_semidiscrete(cell, 0.1, np.array([5.0]))[0]
    dts = np.array([0.2, 0.1, 0.05, 0.025])
    errors = []
    for dt in dts:
        out = simulate(cell, RunSettings(t_stop_ms=6.0, dt_ms=dt, v_init_mV=0.0, method=method))
        errors.append(abs(out.v_mV[-1, 0] - exact))
    order = _order(np.array(errors), dts)
    assert order == pytest.approx(expected, abs=0.15 if expected == 1 else 0.2)


def test_crank_nicolson_rings_without_smoothing_but_not_with_it():
    # Known artefact (REFERENCES §6 test 5): plain CN with a large dt shows a
    # decaying ± oscillation after a current step; backward Euler and smoothed
    # CN do not.
    morph = synthetic.cylinder(LAMBDA, DIAMETER_UM, n_samples=2)
    cell = passive_cell(morph, LAMBDA / 100, injections=[
        CurrentInjection(Site("x0", 0), StepCurrent(0.1, 0.0, 1e9))])
    def first_steps(method, smoothing):
        out = simulate(cell, RunSettings(t_stop_ms=5.0, dt_ms=1.0, v_init_mV=0.0, method=method,
                                         smoothing=smoothing))
        return np.diff(out.v_mV[:, 0])
    plain = first_steps("crank_nicolson", False)
    assert np.any(plain < 0), "expected the CN overshoot-and-ring signature"
    assert np.all(first_steps("crank_nicolson", True) > 0)
    assert np.all(first_steps("backward_euler", True) > 0)


def test_spatial_order():
    # Sealed cable L = 1: R_in error vs R∞ coth 1 falls as Δx² (order 2.0 ± 0.1).
    exact = r_infinity_MOhm() / math.tanh(1.0)
    morph = synthetic.cylinder(LAMBDA, DIAMETER_UM, n_samples=2)
    pieces = np.array([20, 40, 80])
    errors = [abs(input_resistance_MOhm(passive_cell(morph, LAMBDA / k), 0, 0.0) - exact)
              for k in pieces]
    # The error constant depends on the end treatment (REFERENCES §6 [N] quotes
    # -0.10 % at 10 segments for its own vertex-centred scheme; ours is -0.084 %),
    # so only the order and a size bound are asserted.
    assert errors[0] / exact < 3e-4
    assert _order(np.array(errors), 1.0 / pieces) == pytest.approx(2.0, abs=0.1)
