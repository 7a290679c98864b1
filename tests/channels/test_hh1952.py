"""Hodgkin & Huxley (1952) rate functions against REFERENCES §2.1."""

import numpy as np
import pytest

from cabletree.channels import hh_potassium, hh_sodium

M, H = hh_sodium.gates
(N,) = hh_potassium.gates
P = hh_sodium.make_parameters()


def test_removable_singularities_exact():
    # REFERENCES §2.1: alpha_m(-40) = 1.0, alpha_n(-55) = 0.1 exactly
    assert M.alpha(-40.0, 6.3, P) == 1.0
    assert N.alpha(-55.0, 6.3, P) == pytest.approx(0.1, abs=1e-15)
    # smooth across the singularity
    assert M.alpha(-40.0 + 1e-7, 6.3, P) == pytest.approx(1.0, rel=1e-7)


@pytest.mark.parametrize("v, gate, inf, tau", [
    # REFERENCES §2.1 gate values at rest and at -40, 0 mV [N]
    (-65.0, M, 0.05293, 0.2368), (-65.0, H, 0.59612, 8.5160), (-65.0, N, 0.31768, 5.4586),
    (-40.0, M, 0.50065, 0.5006),
    (0.0, M, 0.97416, None), (0.0, H, 0.00279, None), (0.0, N, 0.90873, None),
])
def test_gate_table(v, gate, inf, tau):
    x, t = gate.inf_tau(v, 6.3, P, 1.0)
    assert x == pytest.approx(inf, abs=1e-5)
    if tau is not None:
        assert t == pytest.approx(tau, abs=1e-4)  # table given to 4 decimals


def test_original_sign_convention_identity():
    # REFERENCES §2.1 [M][D]: original rates in V_HH = -(V + 65) equal the modern ones
    v = np.linspace(-100.0, 50.0, 301) + 0.0123  # avoid the exact singular points
    vhh = -(v + 65.0)
    original = {
        "am": 0.1 * (vhh + 25) / (np.exp((vhh + 25) / 10) - 1), "bm": 4 * np.exp(vhh / 18),
        "ah": 0.07 * np.exp(vhh / 20), "bh": 1 / (np.exp((vhh + 30) / 10) + 1),
        "an": 0.01 * (vhh + 10) / (np.exp((vhh + 10) / 10) - 1), "bn": 0.125 * np.exp(vhh / 80),
    }
    modern = {"am": M.alpha(v, 6.3, P), "bm": M.beta(v, 6.3, P), "ah": H.alpha(v, 6.3, P),
              "bh": H.beta(v, 6.3, P), "an": N.alpha(v, 6.3, P), "bn": N.beta(v, 6.3, P)}
    for key in original:
        np.testing.assert_allclose(modern[key], original[key], rtol=1e-12, err_msg=key)


def test_q10_three_at_16_3_celsius():
    # REFERENCES §2.1: phi = 3^((T - 6.3)/10); at 16.3 °C every rate is 3x (exact)
    v = np.linspace(-90.0, 30.0, 13)
    for ch in (hh_sodium, hh_potassium):
        assert ch.temperature_factor(16.3) == 3.0
        for gate in ch.gates:
            _, tau_ref = gate.inf_tau(v, 6.3, P, ch.temperature_factor(6.3))
            _, tau_hot = gate.inf_tau(v, 16.3, P, ch.temperature_factor(16.3))
            np.testing.assert_allclose(tau_ref / tau_hot, 3.0, rtol=1e-14)
    assert hh_sodium.temperature_factor(37.0) == pytest.approx(29.158, abs=1e-3)
