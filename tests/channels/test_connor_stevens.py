"""Connor-Stevens channels (Dayan & Abbott 2001 ch. 6) against REFERENCES §3(a)."""

import numpy as np
import pytest

from cabletree.channels import (
    CS_A_GMAX_S_PER_CM2, CS_LEAK_REVERSAL_MV, CS_LEAK_S_PER_CM2, cs_a, cs_k, cs_na, hh_sodium,
)

P = cs_a.make_parameters()


def test_a_gates_at_minus_65():
    # REFERENCES §3(a) gate values at -65 mV [N]: a_inf 0.5557, b_inf 0.2280,
    # tau_a 1.070 ms, tau_b 3.164 ms
    (a, b) = cs_a.gates
    a_inf, tau_a = a.inf_tau(-65.0, 6.3, P, 1.0)
    b_inf, tau_b = b.inf_tau(-65.0, 6.3, P, 1.0)
    assert a_inf == pytest.approx(0.5557, abs=5e-5)
    assert b_inf == pytest.approx(0.2280, abs=5e-5)
    assert tau_a == pytest.approx(1.070, abs=5e-4)
    assert tau_b == pytest.approx(3.164, abs=5e-4)


def test_powers_and_constants():
    # REFERENCES §3(a): a^3 b, m^3 h, n^4; gA 47.7 mS/cm², gL 0.3, EL -17, EA -75 mV
    assert [g.power for g in cs_a.gates] == [3, 1]
    assert [g.power for g in cs_na.gates] == [3, 1]
    assert [g.power for g in cs_k.gates] == [4]
    assert (cs_na.reversal_mV, cs_k.reversal_mV, cs_a.reversal_mV) == (55.0, -72.0, -75.0)
    assert CS_A_GMAX_S_PER_CM2 == 0.0477 and CS_LEAK_S_PER_CM2 == 0.0003
    assert CS_LEAK_REVERSAL_MV == -17.0


def test_not_temperature_scaled():
    # the rates hold at the model's own temperature (module docstring)
    for ch in (cs_na, cs_k, cs_a):
        assert ch.temperature_factor(37.0) == 1.0


def test_na_opening_rates_are_shifted_hh_rates_times_3_8():
    # REFERENCES §3(a) [D], consistent with CWM 1977 [C]: the Na opening rates are the
    # HH rates x3.8, activation and inactivation shifted in opposite directions:
    # alpha_m(CS, v) = 3.8 alpha_m(HH, v - 10.3), alpha_h(CS, v) = 3.8 alpha_h(HH, v - 17).
    # (The other rates match only to the printed rounding, so they are not checked.)
    v = np.linspace(-90.0, 20.0, 23) + 0.01
    p = cs_na.make_parameters()
    np.testing.assert_allclose(cs_na.gates[0].alpha(v, 0, p),
                               3.8 * hh_sodium.gates[0].alpha(v - 10.3, 0, p), rtol=1e-12)
    np.testing.assert_allclose(cs_na.gates[1].alpha(v, 0, p),
                               3.8 * hh_sodium.gates[1].alpha(v - 17.0, 0, p), rtol=1e-12)
