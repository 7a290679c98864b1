"""Ih after Magee 1998 (REFERENCES §4.1): reversal -30 mV [M], half-activation
-80..-90 mV [M], opens on hyperpolarisation, non-inactivating."""

import numpy as np
import pytest

from cabletree.channels import ih


def test_reversal_and_single_gate():
    assert ih.reversal_mV == -30.0  # Magee 1998 [M]
    assert len(ih.gates) == 1 and ih.gates[0].power == 1


def test_half_activation_parameter():
    assert ih.parameter_defaults["v_half_mV"] == -82.0
    assert -90.0 <= ih.parameter_defaults["v_half_mV"] <= -80.0  # REFERENCES §4.1 [M]
    for vh in (-80.0, -90.0):
        (q,) = ih.steady_state(vh, 33.0, ih.make_parameters({"v_half_mV": vh}))
        assert q == pytest.approx(0.5, abs=1e-12)


def test_opens_with_hyperpolarisation_and_partly_open_at_rest():
    # Magee 1998 [C: abstract]: a significant fraction is open at rest
    v = np.linspace(-120.0, -40.0, 17)
    (q,) = ih.steady_state(v, 33.0)
    assert np.all(np.diff(q) < 0)
    (q_rest,) = ih.steady_state(-65.0, 33.0)
    assert 0.02 < q_rest < 0.5


def test_kinetics_temperature_dependent():
    # Magee 1998 [C]: kinetics voltage- and temperature-dependent; [M] tau ~45 ms at -75 mV, 33 °C
    gate = ih.gates[0]
    p = ih.make_parameters()
    _, t33 = gate.inf_tau(-75.0, 33.0, p, ih.temperature_factor(33.0))
    _, t23 = gate.inf_tau(-75.0, 23.0, p, ih.temperature_factor(23.0))
    assert t33 == pytest.approx(1.0 / (2 * 0.011), rel=1e-12)
    assert t23 / t33 == pytest.approx(4.5, rel=1e-12)
