"""Connor-Stevens model: sodium, potassium and transient A-type potassium currents.

Connor JA, Walter D, McKown R (1977). Neural repetitive firing: modifications of
the Hodgkin-Huxley axon suggested by experimental results from crustacean axons.
Biophys J 18:81-102.  Equations as presented by Dayan P, Abbott LF (2001),
*Theoretical Neuroscience*, MIT Press, ch. 6 (§6.2 and the chapter appendix).

The Na and K rates are the Hodgkin-Huxley (1952) rates at 18 °C with the Na
activation and inactivation curves moved apart in voltage, the K curve shifted and
its rates halved (τn doubled); a fifth, transient outward K conductance (the A
current, gates ``a`` (power 3) and ``b`` (power 1)) is added.  The result fires
repetitively from arbitrarily low rates (a continuous, "type I" frequency-current
curve) with a long first-spike latency near threshold.

Units: V in mV, t in ms.  Dayan & Abbott give densities per mm²; here they are per
cm² (1 mS/mm² = 100 mS/cm² = 0.1 S/cm², 10 nF/mm² = 1 µF/cm²):
C = 1 µF/cm²; gNa = 0.120, gK = 0.020, gA = 0.0477, gL = 0.0003 S/cm²;
ENa = +55, EK = -72, EA = -75, EL = -17 mV.

The A gates are given as steady state and time constant:
``a∞ = [0.0761 exp(0.0314 (V+94.22)) / (1 + exp(0.0346 (V+1.17)))]^(1/3)``,
``τa = 0.3632 + 1.158 / (1 + exp(0.0497 (V+55.96)))``,
``b∞ = [1 / (1 + exp(0.0688 (V+53.3)))]^4``,
``τb = 1.24 + 2.678 / (1 + exp(0.0624 (V+50)))``.
The cube root sits inside a power-3 gate (so ``a∞³`` is the bracket) and the
fourth power inside a power-1 gate, as printed by Dayan & Abbott (this placement
is from memory of the printed appendix, see REFERENCES §3(a) caution; the test
values at -65 mV follow from it).

Temperature: the rates already include the model's temperature (the original
fitted crustacean axons); they are not temperature scaled (``q10 = 1``), so the
``celsius`` of a simulation has no effect on these channels.
"""

from __future__ import annotations

import numpy as np

from .base import Channel, Gate, linear_rate

__all__ = [
    "cs_na", "cs_k", "cs_a",
    "CS_SODIUM_GMAX_S_PER_CM2", "CS_POTASSIUM_GMAX_S_PER_CM2", "CS_A_GMAX_S_PER_CM2",
    "CS_LEAK_S_PER_CM2", "CS_LEAK_REVERSAL_MV", "CS_CM_UF_PER_CM2",
]

_REF = ("Connor JA, Walter D, McKown R (1977) Biophys J 18:81-102; equations as in "
        "Dayan P, Abbott LF (2001) Theoretical Neuroscience, MIT Press, ch. 6")

#: Default maximal conductance densities, S/cm² (Dayan & Abbott 2001, ch. 6).
CS_SODIUM_GMAX_S_PER_CM2 = 0.120
CS_POTASSIUM_GMAX_S_PER_CM2 = 0.020
CS_A_GMAX_S_PER_CM2 = 0.0477
#: Leak conductance density, S/cm², and its reversal potential, mV.
CS_LEAK_S_PER_CM2 = 0.0003
CS_LEAK_REVERSAL_MV = -17.0
#: Specific membrane capacitance, µF/cm².
CS_CM_UF_PER_CM2 = 1.0


def _alpha_m(v, celsius, p):
    return 0.38 * linear_rate(v + 29.7, 10.0)


def _beta_m(v, celsius, p):
    return 15.2 * np.exp(-0.0556 * (v + 54.7))


def _alpha_h(v, celsius, p):
    return 0.266 * np.exp(-0.05 * (v + 48.0))


def _beta_h(v, celsius, p):
    return 3.8 / (1.0 + np.exp(-0.1 * (v + 18.0)))


def _alpha_n(v, celsius, p):
    return 0.02 * linear_rate(v + 45.7, 10.0)


def _beta_n(v, celsius, p):
    return 0.25 * np.exp(-0.0125 * (v + 55.7))


def _a_inf(v, celsius, p):
    bracket = 0.0761 * np.exp(0.0314 * (v + 94.22)) / (1.0 + np.exp(0.0346 * (v + 1.17)))
    return np.cbrt(bracket)


def _a_tau(v, celsius, p):
    return 0.3632 + 1.158 / (1.0 + np.exp(0.0497 * (v + 55.96)))


def _b_inf(v, celsius, p):
    return (1.0 / (1.0 + np.exp(0.0688 * (v + 53.3)))) ** 4


def _b_tau(v, celsius, p):
    return 1.24 + 2.678 / (1.0 + np.exp(0.0624 * (v + 50.0)))


cs_na = Channel(
    name="cs_na",
    gates=(Gate("m", 3, alpha=_alpha_m, beta=_beta_m),
           Gate("h", 1, alpha=_alpha_h, beta=_beta_h)),
    reversal_mV=55.0,
    q10=1.0,
    reference_celsius=18.0,
    reference=_REF,
    description="Connor-Stevens transient sodium current",
)

cs_k = Channel(
    name="cs_k",
    gates=(Gate("n", 4, alpha=_alpha_n, beta=_beta_n),),
    reversal_mV=-72.0,
    q10=1.0,
    reference_celsius=18.0,
    reference=_REF,
    description="Connor-Stevens delayed-rectifier potassium current",
)

cs_a = Channel(
    name="cs_a",
    gates=(Gate("a", 3, steady_state=_a_inf, tau_ms=_a_tau),
           Gate("b", 1, steady_state=_b_inf, tau_ms=_b_tau)),
    reversal_mV=-75.0,
    q10=1.0,
    reference_celsius=18.0,
    reference=_REF,
    description="Connor-Stevens transient (A-type) potassium current",
)
