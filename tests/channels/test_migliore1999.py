"""A-type K (Migliore et al 1999) formulas against REFERENCES §3(b) [D], and the
from-memory Na/Kdr kinetics for basic sanity (steady states in [0, 1])."""

import numpy as np
import pytest

from cabletree.channels import (
    hoffman_gradient, ka_distal, ka_placements, ka_proximal, kdr, na_dendritic,
    thermal_factor_per_mV,
)
from cabletree.profiles import Selector


def inf(ch, v, celsius=24.0, **params):
    return ch.steady_state(v, celsius, ch.make_parameters(params))


def tau(ch, gate_index, v, celsius=24.0, **params):
    p = ch.make_parameters(params)
    return ch.gates[gate_index].inf_tau(v, celsius, p, ch.temperature_factor(celsius))[1]


def test_half_points_exact():
    # REFERENCES §3(b) and §3 test 3 [D]: n_inf(V½n) = 0.5, l_inf(-56) = 0.5 to 1e-12
    assert inf(ka_proximal, 11.0)[0] == pytest.approx(0.5, abs=1e-12)
    assert inf(ka_distal, -1.0)[0] == pytest.approx(0.5, abs=1e-12)
    for ch in (ka_proximal, ka_distal):
        for celsius in (24.0, 35.0):
            assert inf(ch, -56.0, celsius)[1] == pytest.approx(0.5, abs=1e-12)


def test_worked_examples_at_24_celsius():
    # REFERENCES §3(b) [D]: proximal n_inf(0) = 0.3442, distal n_inf(0) = 0.5176,
    # l_inf(-40) = 0.1331, tau_l(0) = 13.0 ms
    assert inf(ka_proximal, 0.0)[0] == pytest.approx(0.3442, abs=5e-5)
    assert inf(ka_distal, 0.0)[0] == pytest.approx(0.5176, abs=5e-5)
    assert inf(ka_proximal, -40.0)[1] == pytest.approx(0.1331, abs=5e-5)
    assert tau(ka_proximal, 1, 0.0) == pytest.approx(13.0, abs=1e-12)
    assert thermal_factor_per_mV(24.0) == pytest.approx(96480.0e-3 / (8.315 * 297.16), rel=1e-15)


def test_tau_l_floor_and_no_temperature_scaling():
    # REFERENCES §3(b): tau_l = 0.26 (V + 50) floored at 2 ms, not temperature scaled
    assert tau(ka_distal, 1, -60.0) == 2.0
    assert tau(ka_distal, 1, 30.0, celsius=35.0) == pytest.approx(0.26 * 80.0, rel=1e-12)


def test_qt_at_35_celsius():
    # REFERENCES §3(b) / §3 test 3 [D]: qt(35 °C) = 5^(11/10) = 5.873
    assert ka_proximal.temperature_factor(35.0) == pytest.approx(5.873, abs=5e-4)
    # tau_n at 35 °C from the REFERENCES §3(b) formula, written out independently
    v, celsius = -20.0, 35.0
    k = 1e-3 * 96480.0 / (8.315 * (273.16 + celsius))
    zeta = -1.5 - 1.0 / (1.0 + np.exp((v + 40.0) / 5.0))
    alpha = np.exp(zeta * (v - 11.0) * k)
    beta = np.exp(zeta * 0.55 * (v - 11.0) * k)
    expected = beta / (5.0 ** ((celsius - 24.0) / 10.0) * 0.05 * (1.0 + alpha))
    assert expected > 0.1
    assert tau(ka_proximal, 0, v, celsius=celsius) == pytest.approx(expected, rel=1e-12)


def test_tau_n_floor_after_scaling():
    # module docstring: tau_n >= 0.1 ms after temperature scaling
    v = np.linspace(-100.0, 80.0, 181)
    for ch in (ka_proximal, ka_distal):
        t = tau(ch, 0, v, celsius=35.0)
        assert t.min() == pytest.approx(0.1, rel=1e-12)


@pytest.mark.parametrize("ch, v_half", [(ka_proximal, 11.0), (ka_distal, -1.0)])
@pytest.mark.parametrize("shift", [-11.0, 3.5, 10.0])
def test_shift_moves_half_point_exactly(ch, v_half, shift):
    assert inf(ch, v_half + shift, shift_mV=shift)[0] == pytest.approx(0.5, abs=1e-12)
    # the whole activation curve is translated
    v = np.linspace(-80.0, 40.0, 25)
    np.testing.assert_allclose(inf(ch, v + shift, shift_mV=shift)[0], inf(ch, v)[0], rtol=1e-12)
    assert inf(ch, v_half - 4.0, v_half_n_mV=v_half - 4.0)[0] == pytest.approx(0.5, abs=1e-12)


def test_distal_activation_more_negative():
    # Hoffman et al 1997 [M]: distal activation ~10-12 mV more hyperpolarised
    v = np.linspace(-60.0, 40.0, 21)
    assert np.all(inf(ka_distal, v)[0] > inf(ka_proximal, v)[0])


def test_hoffman_gradient_ratio():
    # REFERENCES §3 test 4 [D]: g(350)/g(0) = 5 +- 0.01
    g = hoffman_gradient(0.01)
    assert g(350.0) / g(0.0) == pytest.approx(5.0, abs=1e-12)
    assert g(175.0) == pytest.approx(0.03, rel=1e-12)
    assert hoffman_gradient(0.02, fold=6.0, at_um=300.0)(300.0) == pytest.approx(0.12)


def test_ka_placements_split_at_100_um():
    # REFERENCES §3 test 4: 99 µm proximal kinetics, 101 µm distal; 100 µm is distal
    prox, dist = ka_placements(hoffman_gradient(0.01), Selector(swc_types=(1, 4)))
    assert prox.channel is ka_proximal and dist.channel is ka_distal
    assert prox.where.path_distance_um == (0.0, 100.0)
    assert dist.where.path_distance_um == (100.0, np.inf)
    assert prox.where.swc_types == (1, 4)
    (only,) = ka_placements(0.01, Selector(path_distance_um=(150.0, 400.0)))
    assert only.channel is ka_distal and only.where.path_distance_um == (150.0, 400.0)


@pytest.mark.parametrize("ch", [na_dendritic, kdr, ka_proximal, ka_distal])
def test_scalar_and_array_agree(ch):
    # channels/base.py rule 2: same answer for a float and an array
    v = np.linspace(-100.0, 60.0, 33)
    p = ch.make_parameters()
    for gate in ch.gates:
        arr = gate.inf_tau(v, 35.0, p, ch.temperature_factor(35.0))
        for k in (0, 7, 32):
            one = gate.inf_tau(float(v[k]), 35.0, p, ch.temperature_factor(35.0))
            assert one[0] == pytest.approx(arr[0][k], rel=1e-14)
            assert one[1] == pytest.approx(arr[1][k], rel=1e-14)
        assert np.all((arr[0] >= 0) & (arr[0] <= 1)) and np.all(arr[1] > 0)


def test_na_dendritic_and_kdr_shapes():
    # [from memory] kinetics: Na activates with depolarisation and inactivates;
    # half-inactivation at -50 mV by construction of h_inf; Kdr activates above rest
    m_inf, h_inf = inf(na_dendritic, np.array([-70.0, -20.0]))
    assert m_inf[0] < 0.05 < 0.5 < m_inf[1]
    assert inf(na_dendritic, -50.0)[1] == pytest.approx(0.5, abs=1e-12)
    assert inf(kdr, 13.0)[0] == pytest.approx(0.5, abs=1e-12)
    assert tau(na_dendritic, 1, 0.0, celsius=35.0) >= 0.5
    assert tau(kdr, 0, 40.0) >= 2.0
