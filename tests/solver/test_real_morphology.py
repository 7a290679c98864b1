"""The solver on real reconstructions (tests/data, attribution in tests/data/SOURCES.md)."""

from pathlib import Path

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from cabletree.cell import CurrentInjection, Membrane, build_cell
from cabletree.inputs import StepCurrent
from cabletree.morphology import Repairs, read_swc
from cabletree.sites import Site
from cabletree.solver import RunSettings, simulate
from cabletree.solver.passive import (conductance_matrix, input_resistance_MOhm,
                                      membrane_conductance_uS, membrane_time_constant_ms,
                                      steady_state_mV)

DATA = Path(__file__).resolve().parents[1] / "data"
FILES = {
    "l5": ("l5_ttpc_pyramidal_rat_hay2013_cell4.swc", Repairs()),
    "l23": ("l23_pyramidal_rat_svoboda_gR004P1.swc", Repairs()),
    "contour": ("messy_contour_soma_martinotti_rat_TKB071114A2.swc", Repairs()),
    "purkinje": ("purkinje_guineapig_rapp_v_e_purk2.swc", Repairs(soma_radius_um=10.0)),
}
MEMBRANE = Membrane(cm_uF_per_cm2=1.0, axial_resistivity_ohm_cm=150.0, leak_S_per_cm2=1 / 20_000,
                    leak_reversal_mV=-65.0)


def _cell(key, **kwargs):
    name, repairs = FILES[key]
    return build_cell(read_swc(DATA / name, repairs=repairs), membrane=MEMBRANE, **kwargs)


@pytest.mark.parametrize("key", sorted(FILES))
def test_tree_elimination_matches_sparse_direct_solve(key, record_property):
    # The O(N) tree elimination (Hines 1984) gives the same passive steady state as
    # scipy.sparse.linalg.spsolve (SuperLU) on the same conductance matrix, to 1e-9.
    cell = _cell(key)
    rng = np.random.default_rng(1)
    inj = np.zeros(cell.n_compartments)
    inj[rng.integers(0, cell.n_compartments, 5)] = rng.uniform(-0.2, 0.2, 5)
    ours = steady_state_mV(cell, inj, holding_mV=-65.0)
    G = conductance_matrix(cell, -65.0)
    _, j = membrane_conductance_uS(cell, -65.0)
    direct = spla.spsolve(G.tocsc(), j + inj)
    np.testing.assert_allclose(ours, direct, rtol=1e-9, atol=1e-9)
    r_in = input_resistance_MOhm(cell, 0, -65.0)
    tau = membrane_time_constant_ms(cell, -65.0)
    record_property("n_compartments", cell.n_compartments)
    record_property("input_resistance_MOhm", r_in)
    record_property("tau_ms", tau)
    # uniform Rm, Cm and sealed ends: the slowest mode is τm = Rm Cm = 20 ms exactly
    # (Rall 1969; REFERENCES §1.6)
    assert tau == pytest.approx(20.0, rel=1e-6)
    assert 1.0 < r_in < 2000.0


@pytest.mark.slow
def test_time_stepping_on_a_reconstruction_approaches_the_steady_state():
    # A 200 ms step at the soma of the L5 cell: the potential at 200 ms is within
    # e^-10 of the linear steady state (τ = 20 ms), measured at soma and apical tip.
    cell0 = _cell("l5")
    tip = int(np.argmax(np.where(cell0.grid.swc_type == 4, cell0.grid.path_distance_um, -1)))
    cell = cell0.with_inputs(injections=[CurrentInjection(Site("soma", 0), StepCurrent(0.2, 0.0, 1e9))],
                             recording_sites=[Site("soma", 0), Site("tip", tip)])
    out = simulate(cell, RunSettings(t_stop_ms=200.0, dt_ms=0.1, record_interval_ms=10.0))
    inj = np.zeros(cell.n_compartments)
    inj[0] = 0.2
    ss = steady_state_mV(cell, inj, -65.0)
    np.testing.assert_allclose(out.v_mV[-1], ss[[0, tip]], atol=1e-3)
    assert ss[0] - ss[tip] > 0  # attenuation towards the tip
