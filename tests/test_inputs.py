"""Synaptic inputs: NMDA magnesium block, alpha and double-exponential time courses as
simulated, Poisson trains reproducible from their seed."""

from __future__ import annotations

import numpy as np
import pytest

from cabletree.inputs import mg_block, poisson_events
from cabletree.scenario import run_scenario, scenario_from_dict


@pytest.mark.parametrize("v_mV, expected", [(-80.0, 0.02442), (-65.0, 0.05967), (-40.0, 0.23016),
                                            (-20.0, 0.50814), (0.0, 0.78118), (20.0, 0.92502),
                                            (40.0, 0.97708)])
def test_nmda_block_matches_jahr_stevens_1990(v_mV, expected):
    # Jahr & Stevens 1990, J Neurosci 10:3178-3182; values for 1 mM Mg from REFERENCES §4.3.
    assert mg_block(v_mV, 1.0) == pytest.approx(expected, abs=1e-5)


def test_nmda_block_half_point():
    # REFERENCES §4.3: B = 0.5 at V = -20.53 mV for 1 mM Mg.
    assert mg_block(-20.53, 1.0) == pytest.approx(0.5, abs=1e-4)


def clamped_conductance(kinetics: dict, dt_ms=0.005, t_stop_ms=30.0):
    """Simulate one synapse on a soma whose huge leak holds V near rest (tau_m = 0.1 µs).

    Then V - E_rest = g(t) (E_syn - V) / G_leak, proportional to g(t) to 1e-5.
    """
    data = {
        "morphology": {"synthetic": "ball_and_stick",
                       "parameters": {"dendrite_length_um": 1.0, "dendrite_diameter_um": 0.1}},
        "membrane": {"leak_S_per_cm2": 10.0, "leak_reversal_mV": -65.0},
        "sites": {"soma": {"soma": True}},
        "inputs": {"syn": {"type": "synapse", "site": "soma", "weight_nS": 1.0,
                           "events": {"kind": "explicit", "times_ms": [1.0]}, **kinetics}},
        "run": {"t_stop_ms": t_stop_ms, "dt_ms": dt_ms, "method": "backward_euler",
                "v_init_mV": -65.0},
    }
    ds = run_scenario(scenario_from_dict(data), backend="reference")
    t = ds["time"].values
    dv = ds["v"].sel(site="soma").values + 65.0
    return t - 1.0, dv


@pytest.mark.parametrize("tr, td, t_peak, integral", [(0.2, 2.0, 0.51169, 2.58310),
                                                      (1.0, 5.0, 2.01180, 7.47674)])
def test_double_exponential_peak_time_and_integral(tr, td, t_peak, integral):
    # Peak time and integral/peak of the peak-normalised double exponential: REFERENCES §4.4.
    t, dv = clamped_conductance({"kinetics": "double_exponential", "tau_rise_ms": tr,
                                 "tau_decay_ms": td}, t_stop_ms=1.0 + 12 * td)
    k = int(np.argmax(dv))
    assert t[k] == pytest.approx(t_peak, abs=0.006)
    area = np.trapezoid(dv, t) if hasattr(np, "trapezoid") else np.trapz(dv, t)
    assert area / dv[k] == pytest.approx(integral, rel=2e-3)


def test_alpha_peak_time_and_integral():
    # Rall 1967 (J Neurophysiol 30:1138-1168): g = w (t/tau) exp(1 - t/tau) peaks at tau with
    # integral e tau w (REFERENCES §4.4).
    tau = 1.5
    t, dv = clamped_conductance({"kinetics": "alpha", "tau_ms": tau}, t_stop_ms=1.0 + 20 * tau)
    k = int(np.argmax(dv))
    assert t[k] == pytest.approx(tau, abs=0.006)
    area = np.trapezoid(dv, t) if hasattr(np, "trapezoid") else np.trapz(dv, t)
    assert area / dv[k] == pytest.approx(np.e * tau, rel=2e-3)


def test_ampa_peak_conductance_is_the_weight():
    # Peak-normalised: one event of weight w gives a peak conductance w (REFERENCES §4.4), so the
    # clamped deflection peaks at w (E_syn - V) / (G_leak + w) with G_leak = g_leak * soma area.
    t, dv = clamped_conductance({"kinetics": "ampa"}, t_stop_ms=10.0)
    area_um2 = 4 * np.pi * 10.0 ** 2 + np.pi * 0.1 * 1.0
    g_leak_uS = 10.0 * area_um2 * 1e-8 * 1e6
    w_uS = 1e-3
    assert dv.max() == pytest.approx(w_uS * 65.0 / (g_leak_uS + w_uS), rel=3e-3)


def test_poisson_trains_reproducible_from_seed():
    a = poisson_events(50.0, 0.0, 1000.0, seed=11).as_array()
    b = poisson_events(50.0, 0.0, 1000.0, seed=11).as_array()
    c = poisson_events(50.0, 0.0, 1000.0, seed=12).as_array()
    assert np.array_equal(a, b)
    assert not np.array_equal(a, c)
    assert np.all(np.diff(a) >= 0) and a.min() >= 0 and a.max() <= 1000.0
    # Poisson count over 1 s at 50 Hz: mean 50, sd ~7 (a 5-sd band cannot fail by chance)
    assert 15 <= len(a) <= 85
