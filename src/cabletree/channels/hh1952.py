"""Hodgkin-Huxley (1952) squid-axon sodium, potassium and leak.

Hodgkin AL, Huxley AF (1952). A quantitative description of membrane current and
its application to conduction and excitation in nerve. J Physiol 117:500-544.

Written in the modern convention (membrane potential V, rest near -65 mV,
depolarisation positive): the original equations in the displacement
V_HH = -(V + 65) give exactly these rate functions.  Rates hold at 6.3 °C and scale
with Q10 = 3.  Parameters of the original membrane: C = 1 µF/cm², gNa = 0.120,
gK = 0.036, gL = 0.0003 S/cm²; ENa = +50, EK = -77, EL = -54.387 mV.
"""

from __future__ import annotations

import numpy as np

from .base import Channel, Gate, linear_rate

__all__ = ["hh_sodium", "hh_potassium", "HH_LEAK_S_PER_CM2", "HH_LEAK_REVERSAL_MV",
           "HH_SODIUM_GMAX_S_PER_CM2", "HH_POTASSIUM_GMAX_S_PER_CM2", "HH_CM_UF_PER_CM2"]

_REF = ("Hodgkin AL, Huxley AF (1952) J Physiol 117:500-544 "
        "(modern voltage convention)")

HH_SODIUM_GMAX_S_PER_CM2 = 0.120
HH_POTASSIUM_GMAX_S_PER_CM2 = 0.036
HH_LEAK_S_PER_CM2 = 0.0003
HH_LEAK_REVERSAL_MV = -54.387
HH_CM_UF_PER_CM2 = 1.0


# Exponents are written ``(v + c) / -k`` rather than ``-(v + c) / k``: the same
# number to the bit (IEEE division is symmetric in sign) with one array pass fewer.

def _alpha_m(v, celsius, p):
    return 0.1 * linear_rate(v + 40.0, 10.0)


def _beta_m(v, celsius, p):
    return 4.0 * np.exp((v + 65.0) / -18.0)


def _alpha_h(v, celsius, p):
    return 0.07 * np.exp((v + 65.0) / -20.0)


def _beta_h(v, celsius, p):
    return 1.0 / (1.0 + np.exp((v + 35.0) / -10.0))


def _alpha_n(v, celsius, p):
    return 0.01 * linear_rate(v + 55.0, 10.0)


def _beta_n(v, celsius, p):
    return 0.125 * np.exp((v + 65.0) / -80.0)


hh_sodium = Channel(
    name="hh_na",
    gates=(Gate("m", 3, alpha=_alpha_m, beta=_beta_m), Gate("h", 1, alpha=_alpha_h, beta=_beta_h)),
    reversal_mV=50.0,
    q10=3.0,
    reference_celsius=6.3,
    reference=_REF,
    description="squid-axon transient sodium current",
)

hh_potassium = Channel(
    name="hh_k",
    gates=(Gate("n", 4, alpha=_alpha_n, beta=_beta_n),),
    reversal_mV=-77.0,
    q10=3.0,
    reference_celsius=6.3,
    reference=_REF,
    description="squid-axon delayed-rectifier potassium current",
)
