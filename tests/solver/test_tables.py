"""Opt-in tabulated rates against exact rates and interpolation theory.

Outside references: linear interpolation is exact at the grid points and its
error between them is at most h² max|f''| / 8, so it falls four-fold when the
spacing halves (Burden & Faires, Numerical Analysis, 9th ed. 2011, Theorem 3.3);
the exact-rate run of the same cell is the reference for the tabulated one.
"""

from __future__ import annotations

import numpy as np
import pytest

from cabletree.analysis import spike_times
from cabletree.cell import CurrentInjection, Membrane, build_cell
from cabletree.channels import Channel, Gate, hh_potassium, hh_sodium, ih
from cabletree.errors import SolverError
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.profiles import ChannelPlacement, Linear
from cabletree.results import make_dataset
from cabletree.sites import all_compartment_sites, soma_site
from cabletree.solver import RunSettings, available_backends, simulate
from cabletree.solver.tables import interpolate, rate_tables, tabulate_block

RANGE = (-150.0, 100.0)


def _hh_cell(**extra):
    base = build_cell(synthetic.random_tree(9, seed=3, samples_per_branch=3),
                      membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-54.387),
                      channels=[ChannelPlacement(hh_sodium, 0.12),
                                ChannelPlacement(hh_potassium, 0.036)], **extra)
    return base.with_inputs(
        injections=[CurrentInjection(soma_site(base.grid), StepCurrent(0.3, 1.0, 30.0))],
        recording_sites=all_compartment_sites(base.grid))


def _exact(block, v):
    """Steady state and rate of every gate straight from the rate functions."""
    p = block.channel.make_parameters()
    out = []
    for gate in block.channel.gates:
        if gate.uses_rates:
            a, b = gate.alpha(v, 6.3, p), gate.beta(v, 6.3, p)
            out.append((a / (a + b), a + b))
        else:
            out.append((gate.steady_state(v, 6.3, p), 1.0 / gate.tau_ms(v, 6.3, p)))
    return out


def test_exact_at_grid_points():
    # interpolation reproduces the tabulated function at its nodes
    cell = _hh_cell()
    for block, table in zip(cell.channels, rate_tables(cell, 0.1, RANGE)):
        v = table.v_min_mV + table.step_mV * np.arange(0, table.n_points, 7)
        inf, rate = interpolate(table, v)
        for j, (inf_x, rate_x) in enumerate(_exact(block, v)):
            np.testing.assert_allclose(inf[j], inf_x, rtol=1e-12, atol=1e-300)
            np.testing.assert_allclose(rate[j], rate_x, rtol=1e-12)


def test_error_between_nodes_is_second_order():
    # Burden & Faires Thm 3.3: error <= h^2 max|f''| / 8, i.e. four-fold per halving
    cell = _hh_cell()
    block = cell.channels[0]  # HH sodium: m and h
    v = np.linspace(-100.0, 60.0, 4001) + 0.0123
    errs = []
    for h in (0.2, 0.1):
        table = tabulate_block(block, 6.3, h, RANGE)
        inf, _ = interpolate(table, v)
        errs.append(max(np.max(np.abs(inf[j] - x)) for j, (x, _) in enumerate(_exact(block, v))))
    assert 3.0 < errs[0] / errs[1] < 5.0
    # and the bound itself, with f'' of m_inf from a fine central difference
    fine = np.linspace(-100.0, 60.0, 160001)
    m_inf = _exact(block, fine)[0][0]
    d2 = np.max(np.abs(np.diff(m_inf, 2))) / (fine[1] - fine[0]) ** 2
    table = tabulate_block(block, 6.3, 0.1, RANGE)
    err_m = np.max(np.abs(interpolate(table, v)[0][0] - _exact(block, v)[0][0]))
    assert err_m <= 1.01 * 0.1 ** 2 * d2 / 8


def test_outside_the_range_and_nan_use_the_end_values():
    cell = _hh_cell()
    table = rate_tables(cell, 0.5, RANGE)[1]
    inf, rate = interpolate(table, np.array([-400.0, RANGE[0], np.nan, 300.0, RANGE[1]]))
    assert inf[0, 0] == inf[0, 1] == inf[0, 2] == table.values[0, 0, 0]
    assert inf[0, 3] == inf[0, 4] == table.values[0, -1, 0]
    assert np.all(np.isfinite(rate))


@pytest.mark.slow
def test_tabulated_run_converges_to_the_exact_run():
    # the exact-rate run is the reference; the largest potential difference falls
    # about four-fold per halving of the spacing and the spikes stay put
    cell = _hh_cell()
    settings = RunSettings(40.0, 0.025)
    exact = simulate(cell, settings, backend="reference")
    t_exact = spike_times(exact.v_mV[:, 0], exact.time_ms)
    assert len(t_exact) >= 2
    diffs = []
    for h in (0.1, 0.05):
        tab = simulate(cell, RunSettings(40.0, 0.025, rate_table_step_mV=h), backend="reference")
        diffs.append(np.max(np.abs(tab.v_mV - exact.v_mV)))
        t_tab = spike_times(tab.v_mV[:, 0], tab.time_ms)
        assert len(t_tab) == len(t_exact)
        assert np.max(np.abs(np.asarray(t_tab) - t_exact)) <= 0.025  # within one step
    assert 3.0 < diffs[0] / diffs[1] < 5.0
    assert diffs[1] < 0.05  # mV, measured 0.012 at 0.05 mV spacing


def test_results_say_how_rates_were_computed():
    cell = _hh_cell()
    exact = simulate(cell, RunSettings(0.5, 0.025), backend="reference")
    tab = simulate(cell, RunSettings(0.5, 0.025, rate_table_step_mV=0.05), backend="reference")
    assert make_dataset(cell, exact).attrs["rates"] == "exact"
    assert make_dataset(cell, tab).attrs["rates"].startswith("tabulated every 0.05 mV over [-150, 100]")


@pytest.mark.skipif("compiled" not in available_backends(), reason="numba not installed")
def test_compiled_and_reference_agree_with_tables():
    # the kernel issue asks the backends to agree to 1e-9 relative
    cell = _hh_cell()
    settings = RunSettings(15.0, 0.025, rate_table_step_mV=0.05)
    ref = simulate(cell, settings, backend="reference")
    comp = simulate(cell, settings, backend="compiled")
    assert ref.v_mV[:, 0].max() > 0.0
    scale = np.max(np.abs(ref.v_mV))
    assert np.max(np.abs(ref.v_mV - comp.v_mV)) <= 1e-9 * scale
    for gr, gc in zip(ref.final_state.gates, comp.final_state.gates):
        assert np.max(np.abs(gr - gc)) <= 1e-9


def test_block_with_a_parameter_profile_keeps_exact_rates():
    # Ih with its half-activation varying over the tree cannot share one table
    base = build_cell(synthetic.random_tree(6, seed=1),
                      channels=[ChannelPlacement(ih, 1e-4, parameters={"v_half_mV":
                                                                       Linear(-82.0, -0.02)})])
    table = rate_tables(base, 0.1, RANGE)[0]
    assert table is None
    cell = base.with_inputs(
        injections=[CurrentInjection(soma_site(base.grid), StepCurrent(-0.1, 1.0, 20.0))],
        recording_sites=[soma_site(base.grid)])
    exact = simulate(cell, RunSettings(30.0, 0.05), backend="reference")
    tab = simulate(cell, RunSettings(30.0, 0.05, rate_table_step_mV=0.1), backend="reference")
    np.testing.assert_array_equal(exact.v_mV, tab.v_mV)


def test_a_rate_that_is_not_finite_on_the_grid_is_named():
    def tau_zero_at_0(v, celsius, p):
        return np.abs(v) * 0.1

    def inf(v, celsius, p):
        return 1.0 / (1.0 + np.exp(-v / 5.0))

    odd = Channel("odd", (Gate("w", 1, steady_state=inf, tau_ms=tau_zero_at_0),), reversal_mV=0.0)
    cell = build_cell(synthetic.random_tree(3, seed=1), channels=[ChannelPlacement(odd, 1e-4)])
    with pytest.raises(SolverError, match=r"channel 'odd' gate 'w'.* 0 mV"):
        rate_tables(cell, 0.5, RANGE)


@pytest.mark.parametrize("kwargs", [dict(rate_table_step_mV=0.0), dict(rate_table_step_mV=-1.0),
                                    dict(rate_table_step_mV=200.0),
                                    dict(rate_table_step_mV=0.1, rate_table_range_mV=(50.0, -50.0))])
def test_settings_are_validated(kwargs):
    with pytest.raises(SolverError, match="rate_table"):
        RunSettings(1.0, 0.025, **kwargs)


@pytest.mark.skipif("compiled" not in available_backends(), reason="numba not installed")
def test_two_threads_with_tables_agree_with_the_reference(monkeypatch):
    # non-contiguous A-type blocks shared by both threads' compartment ranges, each
    # thread with its own lookup scratch; the reference backend is the semantics
    from cabletree.channels import hoffman_gradient, ka_placements
    from cabletree.solver import compiled
    from cabletree.solver.compiled import CompiledStepper
    from cabletree.solver.plan import make_schedule, resting_state
    from cabletree.solver.reference import ReferenceStepper
    monkeypatch.setattr(compiled, "MIN_COMPARTMENTS_PER_THREAD", 1)  # a small tree, threaded
    channels = [ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036),
                *ka_placements(hoffman_gradient(0.005), boundary_um=60.0)]
    base = build_cell(synthetic.random_tree(9, seed=3, samples_per_branch=3),
                      membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-65.0),
                      channels=channels, celsius=24.0)
    cell = base.with_inputs(recording_sites=all_compartment_sites(base.grid),
                            injections=[CurrentInjection(soma_site(base.grid),
                                                         StepCurrent(0.5, 1.0, 6.0))])
    settings = RunSettings(8.0, 0.025, rate_table_step_mV=0.05)
    idx = np.arange(cell.n_compartments)
    out = {}
    for name, stepper in (("ref", ReferenceStepper(cell)), ("two", CompiledStepper(cell, threads=2))):
        out[name], _ = stepper.run(settings, make_schedule(cell, settings),
                                   resting_state(cell, -65.0), idx)
    assert out["ref"][:, 0].max() > 0.0
    scale = np.max(np.abs(out["ref"]))
    assert np.max(np.abs(out["ref"] - out["two"])) <= 1e-9 * scale
