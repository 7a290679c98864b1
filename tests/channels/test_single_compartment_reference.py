"""Single-compartment behaviour of the channel equations, integrated with scipy.

The channels are integrated here by ``scipy.integrate.solve_ivp`` (a reference ODE
integrator outside the project), so these tests check the channel equations
themselves; the same checks through the cabletree solver belong to the solver's
tests.  Units: mV, ms, µA/cm², S/cm² (×1000 for mS/cm²), µF/cm².
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq, minimize_scalar

from cabletree.channels import (
    CS_A_GMAX_S_PER_CM2, CS_CM_UF_PER_CM2, CS_LEAK_REVERSAL_MV, CS_LEAK_S_PER_CM2,
    CS_POTASSIUM_GMAX_S_PER_CM2, CS_SODIUM_GMAX_S_PER_CM2, HH_CM_UF_PER_CM2,
    HH_LEAK_REVERSAL_MV, HH_LEAK_S_PER_CM2, HH_POTASSIUM_GMAX_S_PER_CM2,
    HH_SODIUM_GMAX_S_PER_CM2, cs_a, cs_k, cs_na, hh_potassium, hh_sodium,
)

SPIKE_LEVEL_MV = -20.0  # upward crossing; spikes in both models peak far above it


def hh_membrane():
    return dict(chans=((hh_sodium, HH_SODIUM_GMAX_S_PER_CM2),
                       (hh_potassium, HH_POTASSIUM_GMAX_S_PER_CM2)),
                g_leak=HH_LEAK_S_PER_CM2, e_leak=HH_LEAK_REVERSAL_MV, cm=HH_CM_UF_PER_CM2,
                celsius=6.3)


def cs_membrane(ga_factor=1.0):
    chans = ((cs_na, CS_SODIUM_GMAX_S_PER_CM2), (cs_k, CS_POTASSIUM_GMAX_S_PER_CM2))
    if ga_factor:
        chans += ((cs_a, ga_factor * CS_A_GMAX_S_PER_CM2),)
    return dict(chans=chans, g_leak=CS_LEAK_S_PER_CM2, e_leak=CS_LEAK_REVERSAL_MV,
                cm=CS_CM_UF_PER_CM2, celsius=6.3)


def steady_current(v, chans, g_leak, e_leak, cm, celsius):
    """Steady-state ionic current density at clamped v, µA/cm²."""
    total = 1000.0 * g_leak * (v - e_leak)
    for ch, g in chans:
        total += 1000.0 * g * ch.open_fraction(ch.steady_state(v, celsius)) * (v - ch.reversal_mV)
    return total


def rest_mV(m, lo=-90.0, hi=-50.0):
    return brentq(lambda v: steady_current(v, **m), lo, hi, xtol=1e-10)


def initial_state(v, m):
    y = [v]
    for ch, _ in m["chans"]:
        y += [float(x) for x in ch.steady_state(v, m["celsius"])]
    return np.array(y)


def simulate(m, current_uA_per_cm2, duration_ms, v0=None, first_spike_only=False,
             y0=None, method="LSODA", rtol=1e-8):
    """Integrate from the steady state at v0 (default: rest); returns the solve_ivp result."""
    chans, celsius = m["chans"], m["celsius"]
    params = [ch.make_parameters() for ch, _ in chans]
    phis = [ch.temperature_factor(celsius) for ch, _ in chans]

    def rhs(t, y):
        v = y[0]
        dy = np.empty_like(y)
        i_ion = 1000.0 * m["g_leak"] * (v - m["e_leak"])
        k = 1
        for (ch, g), p, phi in zip(chans, params, phis):
            x = y[k:k + len(ch.gates)]
            i_ion += 1000.0 * g * ch.open_fraction(x) * (v - ch.reversal_mV)
            for j, gate in enumerate(ch.gates):
                inf, tau = gate.inf_tau(v, celsius, p, phi)
                dy[k + j] = (inf - x[j]) / tau
            k += len(ch.gates)
        dy[0] = (current_uA_per_cm2 - i_ion) / m["cm"]
        return dy

    def spike(t, y):
        return y[0] - SPIKE_LEVEL_MV

    spike.direction = 1.0
    spike.terminal = first_spike_only
    if y0 is None:
        y0 = initial_state(rest_mV(m) if v0 is None else v0, m)
    return solve_ivp(rhs, (0.0, duration_ms), y0, method=method, events=spike,
                     rtol=rtol, atol=1e-8, max_step=1.0, dense_output=True)


def rate_hz(spike_times_ms, last=3):
    return 1000.0 / float(np.mean(np.diff(spike_times_ms[-(last + 1):])))


def cs_rheobase():
    """Fold of the steady-state I-V curve (saddle-node on the cycle): REFERENCES §3(a)."""
    m = cs_membrane()
    res = minimize_scalar(lambda v: -steady_current(v, **m), bounds=(-65.0, -50.0),
                          method="bounded", options={"xatol": 1e-8})
    return -res.fun, res.x


# --- Hodgkin-Huxley 1952 ---------------------------------------------------------------

def test_hh_rest_is_minus_65():
    # REFERENCES §2.2: rest -65.0 mV (-64.996 with EL = -54.387) [M][N]; test 3 of §2
    m = hh_membrane()
    assert rest_mV(m) == pytest.approx(-65.0, abs=0.01)
    sol = simulate(m, 0.0, 100.0, v0=-65.0)
    assert np.max(np.abs(sol.y[0] + 65.0)) < 0.01
    assert sol.t_events[0].size == 0


@pytest.mark.slow
def test_hh_repetitive_firing_onset_is_discontinuous():
    # REFERENCES §2.2 and §2 test 7: onset of stable repetitive firing 6.26 µA/cm²
    # (Rinzel & Miller 1980 [M], [N]) at about 50 Hz (type II); 6.0 gives <= 3 spikes
    # in 500 ms; 6.5 fires at 55 +- 2 Hz [N].
    m = hh_membrane()
    below = simulate(m, 6.0, 500.0, v0=-65.0).t_events[0]
    assert below.size <= 3
    above = simulate(m, 6.5, 500.0, v0=-65.0).t_events[0]
    assert above.size > 10 and above[-1] > 450.0  # sustained to the end
    rate = rate_hz(above)
    assert rate >= 45.0
    assert rate == pytest.approx(55.0, abs=2.0)


def test_hh_original_sign_convention_gives_the_same_trajectory():
    # REFERENCES §2.1 [M][D]: the original HH equations in V_HH = -(V + 65) with
    # V_Na = -115, V_K = +12, V_L = -10.613 mV, written out independently here.
    def alpha_beta(vhh):
        an = 0.01 * (vhh + 10) / (np.exp((vhh + 10) / 10) - 1)
        bn = 0.125 * np.exp(vhh / 80)
        am = 0.1 * (vhh + 25) / (np.exp((vhh + 25) / 10) - 1)
        bm = 4 * np.exp(vhh / 18)
        ah = 0.07 * np.exp(vhh / 20)
        bh = 1 / (np.exp((vhh + 30) / 10) + 1)
        return am, bm, ah, bh, an, bn

    pulse = lambda t: 20.0 if t < 1.0 else 0.0  # µA/cm², depolarising in modern terms

    def rhs_hh(t, y):
        vhh, mm, hh, nn = y
        am, bm, ah, bh, an, bn = alpha_beta(vhh)
        i_ion = (120 * mm ** 3 * hh * (vhh + 115) + 36 * nn ** 4 * (vhh - 12)
                 + 0.3 * (vhh + 10.613))
        # in the original convention a depolarising (inward) stimulus makes V_HH negative
        return [(-pulse(t) - i_ion) / 1.0, am * (1 - mm) - bm * mm, ah * (1 - hh) - bh * hh,
                an * (1 - nn) - bn * nn]

    m = hh_membrane()
    params = [ch.make_parameters() for ch, _ in m["chans"]]

    def rhs_modern(t, y):
        v = y[0]
        dy = np.empty(4)
        i_ion = 1000 * m["g_leak"] * (v - m["e_leak"])
        k = 1
        for (ch, g), p in zip(m["chans"], params):
            x = y[k:k + len(ch.gates)]
            i_ion += 1000 * g * ch.open_fraction(x) * (v - ch.reversal_mV)
            for j, gate in enumerate(ch.gates):
                inf, tau = gate.inf_tau(v, 6.3, p, 1.0)
                dy[k + j] = (inf - x[j]) / tau
            k += len(ch.gates)
        dy[0] = pulse(t) - i_ion
        return dy

    y0 = initial_state(-65.0, m)
    t_eval = np.linspace(0.0, 12.0, 1201)
    opts = dict(method="DOP853", rtol=1e-11, atol=1e-12, max_step=0.05, t_eval=t_eval)
    modern = solve_ivp(rhs_modern, (0, 12), y0, **opts)
    original = solve_ivp(rhs_hh, (0, 12), [0.0, *y0[1:]], **opts)
    assert modern.y[0].max() > 30.0  # a full spike (REFERENCES §2.2: peak ~ +40 mV)
    assert np.max(np.abs(modern.y[0] - (-original.y[0] - 65.0))) < 1e-5


# --- Connor-Stevens (Dayan & Abbott 2001, ch. 6) ---------------------------------------

def test_cs_rest_is_minus_68():
    # REFERENCES §3(a) / §3 test 1: rest -67.98 mV [N], tolerance +- 0.1
    m = cs_membrane()
    v = rest_mV(m)
    assert v == pytest.approx(-68.0, abs=0.1)
    sol = simulate(m, 0.0, 200.0)
    assert np.max(np.abs(sol.y[0] - v)) < 1e-3


def test_cs_rheobase_is_fold_of_steady_state_curve():
    # REFERENCES §3(a): rheobase 8.114 µA/cm² at V = -57.1 mV [N]; §3 test 1: 8.11 +- 0.02
    i_rheo, v_fold = cs_rheobase()
    assert i_rheo == pytest.approx(8.11, abs=0.02)
    assert v_fold == pytest.approx(-57.1, abs=0.2)


@pytest.mark.slow
def test_cs_type_one_onset_and_long_latency():
    # REFERENCES §3(a) [N] and D&A ch. 6 [M]: continuous f-I onset (type I); at
    # 1.05 x rheobase the rate is below 12 Hz (9.7 Hz at 8.5); at 0.99 x rheobase
    # there is no spike from rest; CWM 1977 [C]: rates down to ~2 spikes/s.
    i_rheo, _ = cs_rheobase()
    m = cs_membrane()
    assert simulate(m, 0.99 * i_rheo, 1000.0).t_events[0].size == 0
    spikes = simulate(m, 1.05 * i_rheo, 1000.0).t_events[0]
    assert spikes.size >= 4 and spikes[-1] > 800.0
    assert 0.0 < rate_hz(spikes) < 12.0


def cs_latency_ms(current, ga_factor=1.0):
    sol = simulate(cs_membrane(ga_factor), current, 600.0, first_spike_only=True)
    return float(sol.t_events[0][0]) if sol.t_events[0].size else np.inf


def test_cs_first_spike_latency_long_and_growing_with_ga():
    # REFERENCES §3(a), §3 test 2: latency at 8.5 µA/cm² 119 ms [N] (>= 100 ms); the
    # A current delays the first spike (D&A ch. 6 [M]; CWM 1977 [C]), so the latency
    # grows with gA.
    latencies = [cs_latency_ms(8.5, f) for f in (0.8, 0.9, 1.0)]
    assert latencies[-1] >= 100.0
    assert latencies[0] < latencies[1] < latencies[2]
    # and decreases with current (REFERENCES §3 test 2 [N])
    assert cs_latency_ms(10.0) < latencies[-1]


@pytest.mark.slow
def test_cs_without_ga_loses_low_rate_firing():
    # D&A ch. 6 [M], CWM 1977 [C]: the A current is what lets the model fire at low
    # rates.  With gA = 0 the model, kicked 1 mV above its steady state, fires only
    # at high rates over the whole current range from its onset (scanned downwards
    # to where firing stops), never below 50 Hz; with gA it fires below 12 Hz.
    m = cs_membrane(0.0)
    rates = []
    for current in np.arange(-5.0, -9.01, -0.5):
        v_ss = brentq(lambda v: steady_current(v, **m) - current, -90.0, -40.0)
        y0 = initial_state(v_ss, m)
        y0[0] += 1.0
        spikes = simulate(m, current, 200.0, y0=y0).t_events[0]
        if spikes.size < 4 or spikes[-1] < 150.0:
            break
        rates.append(rate_hz(spikes))
    assert len(rates) >= 2 and spikes.size < 4  # found the onset inside the scan
    assert min(rates) > 50.0
