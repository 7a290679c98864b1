"""Gates with one function for steady state and time constant (rule 6 of channels.base).

The solvers call a gate's ``steady_state_and_tau_ms`` while the rate tables
(``solver/tables.py``) and :meth:`Channel.steady_state` call ``steady_state`` and
``tau_ms``: a result must not depend on which path computed the rates, so the
combined function of every built-in gate must equal the separate ones to the bit.
The rewritten rate expressions are compared, also to the bit, with the formulas
spelled as published (sources named beside each check).
"""

import numpy as np
import pytest

from cabletree.channels import CHANNELS, Channel, Gate, ka_distal, ka_proximal, linear_rate
from cabletree.channels import hh1952, migliore1999
from cabletree.errors import CableTreeError, ChannelError
from cabletree.solver import RunSettings, simulate

# singular points of linear_rate in the built-in channels (x = 0) and their neighbours,
# including the edges of linear_rate's series branch (|x/k| = 1e-6)
_SINGULAR = [(-40.0, 10.0), (-55.0, 10.0), (-30.0, 7.2), (-45.0, 1.5), (-29.7, 10.0),
             (-45.7, 10.0)]


def _voltage_grid():
    pts = []
    for c, k in _SINGULAR:
        for d in (0.0, 1e-6 * k, -1e-6 * k, 2e-6 * k, -2e-6 * k, 1e-9, -1e-9):
            x = c + d
            pts += [x, np.nextafter(x, np.inf), np.nextafter(x, -np.inf)]
    return np.concatenate([np.linspace(-150.0, 100.0, 250001), pts])


V = _voltage_grid()


def _bits_equal(a, b):
    a = np.broadcast_to(np.asarray(a, float), V.shape)
    b = np.broadcast_to(np.asarray(b, float), V.shape)
    return np.array_equal(a.view(np.int64), b.view(np.int64))


COMBINED = [(name, g) for name, ch in sorted(CHANNELS.items()) for g in ch.gates
            if g.steady_state_and_tau_ms is not None]


def test_the_expected_gates_share_their_evaluation():
    # the gates whose steady state and time constant share an exponent or rates
    assert {f"{n}.{g.name}" for n, g in COMBINED} == {
        "ka_proximal.n", "ka_distal.n", "kdr.n", "na_dendritic.m"}


@pytest.mark.parametrize("name,gate", COMBINED, ids=[f"{n}.{g.name}" for n, g in COMBINED])
@pytest.mark.parametrize("celsius", [6.3, 24.0, 35.0])
def test_combined_equals_separate_to_the_bit(name, gate, celsius):
    # reason: the solvers use the combined function, tables and resting states the
    # separate ones; they must give the same numbers
    p = CHANNELS[name].make_parameters()
    with np.errstate(all="ignore"):
        inf, tau = gate.steady_state_and_tau_ms(V, celsius, p)
        assert _bits_equal(inf, gate.steady_state(V, celsius, p))
        assert _bits_equal(tau, gate.tau_ms(V, celsius, p))


@pytest.mark.parametrize("ch,v_half,zeta0,gmn,a0n", [(ka_proximal, 11.0, -1.5, 0.55, 0.05),
                                                      (ka_distal, -1.0, -1.8, 0.39, 0.1)])
def test_ka_n_gate_matches_the_published_formula_to_the_bit(ch, v_half, zeta0, gmn, a0n):
    # Migliore et al (1999) J Comput Neurosci 7:5-15, constants as in REFERENCES §3(b)
    # [from memory]: n_inf = 1/(1 + alpha_n), tau_n = max(beta_n/(qt a0n (1 + alpha_n)), 0.1)
    # written here in the operation order of the formula (one expression per quantity)
    celsius, shift = 34.0, 2.5
    p = ch.make_parameters({"shift_mV": shift})
    k = 1e-3 * 96480.0 / (8.315 * (273.16 + celsius))
    vs = V - shift
    x = (zeta0 - 1.0 / (1.0 + np.exp((vs + 40.0) / 5.0))) * (vs - v_half) * k
    n_inf = 1.0 / (1.0 + np.exp(x))
    qt = np.exp(np.log(5.0) * (celsius - 24.0) / 10.0)
    tau = np.maximum(np.exp(gmn * x) * n_inf * (1.0 / a0n), 0.1 * qt)
    with np.errstate(all="ignore"):
        got_inf, got_tau = ch.gates[0].steady_state_and_tau_ms(V, celsius, p)
    assert _bits_equal(got_inf, n_inf)
    assert _bits_equal(got_tau, tau)


def test_linear_rate_matches_its_textbook_spelling_to_the_bit():
    # x / (1 - exp(-x/k)) with its removable singularity replaced by the first two
    # Taylor terms k (1 + u/2), u = x/k (series of u/(1 - e^-u) = 1 + u/2 + u²/12 + ...)
    for k in (10.0, 7.2, 1.5):
        x = V + 40.0
        u = x / k
        small = np.abs(u) < 1e-6
        textbook = np.where(small, k * (1.0 + 0.5 * u),
                            x / (1.0 - np.exp(-np.where(small, 1.0, u))))
        with np.errstate(all="ignore"):
            assert _bits_equal(linear_rate(x, k), textbook)
            assert _bits_equal(linear_rate(-x, k), np.where(
                small, k * (1.0 + 0.5 * -u), -x / (1.0 - np.exp(-np.where(small, 1.0, -u)))))


def test_hh_exponential_rates_match_the_published_spelling_to_the_bit():
    # Hodgkin & Huxley (1952) J Physiol 117:500-544, modern convention: the rates as
    # printed with -(V + 65)/18 etc.; the module divides by the negative constant instead
    p = None
    assert _bits_equal(hh1952._beta_m(V, 6.3, p), 4.0 * np.exp(-(V + 65.0) / 18.0))
    assert _bits_equal(hh1952._alpha_h(V, 6.3, p), 0.07 * np.exp(-(V + 65.0) / 20.0))
    assert _bits_equal(hh1952._beta_h(V, 6.3, p), 1.0 / (1.0 + np.exp(-(V + 35.0) / 10.0)))
    assert _bits_equal(hh1952._beta_n(V, 6.3, p), 0.125 * np.exp(-(V + 65.0) / 80.0))


def test_dendritic_na_closing_rates_match_their_spelling_to_the_bit():
    # -(V + 30) and -(V + 45) as in the module docstring (kinetics from memory)
    with np.errstate(all="ignore"):
        assert _bits_equal(migliore1999._na_beta_m(V), 0.124 * linear_rate(-(V + 30.0), 7.2))
        assert _bits_equal(migliore1999._na_beta_h(V), 0.01 * linear_rate(-(V + 45.0), 1.5))


# --- malformed combined functions ---------------------------------------------------

def _inf(v, celsius, p):
    return 1.0 / (1.0 + np.exp((v + 40.0) / -5.0))


def _tau(v, celsius, p):
    return 3.0 + 0.0 * v


def _channel(combined):
    return Channel(name="probe", gates=(Gate("y", 1, steady_state=_inf, tau_ms=_tau,
                                             steady_state_and_tau_ms=combined),),
                   reversal_mV=-80.0, reference="illustration only")


def test_combined_function_returning_one_array_is_rejected_at_construction():
    with pytest.raises(ChannelError) as info:
        _channel(lambda v, c, p: _inf(v, c, p))
    msg = str(info.value)
    assert "'probe'" in msg and "'y'" in msg
    assert "must return a pair (x_inf, tau_ms), got ndarray of shape (7,)" in msg
    assert isinstance(info.value, CableTreeError)


def test_combined_function_returning_three_values_is_rejected():
    with pytest.raises(ChannelError, match="must return a pair .* got a tuple of length 3"):
        _channel(lambda v, c, p: (_inf(v, c, p), _tau(v, c, p), v))


def test_combined_function_with_wrong_shape_is_rejected():
    with pytest.raises(ChannelError, match=r"tau_ms has shape \(2,\) for 7 voltages"):
        _channel(lambda v, c, p: (_inf(v, c, p), np.array([3.0, 3.0])))


def test_combined_function_disagreeing_with_the_pair_is_rejected():
    with pytest.raises(ChannelError, match="x_inf differs from steady_state"):
        _channel(lambda v, c, p: (1.0 - _inf(v, c, p), _tau(v, c, p)))


def test_combined_function_needs_the_steady_state_pair():
    with pytest.raises(ChannelError, match="goes with steady_state and tau_ms"):
        Gate("y", 1, alpha=_inf, beta=_inf, steady_state_and_tau_ms=lambda v, c, p: (v, v))


def test_a_constant_time_constant_is_accepted():
    ch = _channel(lambda v, c, p: (_inf(v, c, p), 3.0))
    assert ch.gates[0].inf_tau(-40.0, 6.3, ch.make_parameters(), 1.0) == (0.5, 3.0)


def test_reference_backend_calls_only_the_combined_function():
    from cabletree.cell import build_cell
    from cabletree.morphology import synthetic
    from cabletree.profiles import ChannelPlacement
    calls = {"separate": 0, "combined": 0}

    def both(v, celsius, p):
        calls["combined"] += 1
        return _inf(v, celsius, p), _tau(v, celsius, p)

    def inf(v, celsius, p):
        calls["separate"] += 1
        return both(v, celsius, p)[0]

    def tau(v, celsius, p):
        calls["separate"] += 1
        return both(v, celsius, p)[1]

    ch = Channel(name="counted", gates=(Gate("y", 1, steady_state=inf, tau_ms=tau,
                                             steady_state_and_tau_ms=both),),
                 reversal_mV=-80.0, reference="illustration only")
    cell = build_cell(synthetic.random_tree(5, seed=1, samples_per_branch=3),
                      channels=[ChannelPlacement(ch, 0.001)])
    calls.update(separate=0, combined=0)  # construction checked the function
    simulate(cell, RunSettings(0.25, 0.025), backend="reference")
    assert calls["separate"] == 0 and calls["combined"] >= 10
