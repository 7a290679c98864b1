"""Hyperpolarisation-activated cation current Ih (HCN) of CA1 pyramidal dendrites.

Magee JC (1998). Dendritic hyperpolarization-activated currents modify the
integrative properties of hippocampal CA1 pyramidal neurons.  J Neurosci
18:7613-7624.

Magee (1998) found, in cell-attached patches, an Ih density rising more than
sixfold from the soma to the distal apical dendrite, a mixed Na/K current
(reversal near -30 mV) that is partly open at rest, with an activation range more
hyperpolarised distally and voltage- and temperature-dependent kinetics
(REFERENCES §4.1, abstract confirmed).  The model is one non-inactivating gate:

``I = gmax · q · (V - E)``, E = -30 mV (from memory of the paper);

- ``q∞ = 1 / (1 + exp((V - v_half_mV) / 8))`` (opens on hyperpolarisation); the
  half-activation ``v_half_mV`` defaults to -82 mV (proximal; the paper's range is
  about -80 to -90 mV, more negative distally, so give it a profile over path
  distance for a cell).  Slope factor 8 mV **[from memory]**.
- ``τq = exp(0.0378 ζ gm (V - V½τ)) / (a0 (1 + exp(0.0378 ζ (V - V½τ))))`` with
  V½τ = -75 mV, ζ = 2.2, gm = 0.4, a0 = 0.011/ms at 33 °C (τ peaks near 45 ms at
  -75 mV), scaled by Q10 = 4.5 **[from memory]**: these kinetic constants are as
  remembered from the HCN models built on Magee's data, not checked against the
  paper.
"""

from __future__ import annotations

import numpy as np

from .base import Channel, Gate

__all__ = ["ih", "IH_REVERSAL_MV"]

#: Reversal potential of Ih, mV (Magee 1998, from memory).
IH_REVERSAL_MV = -30.0

_SLOPE_MV = 8.0
_TAU_V_HALF_MV = -75.0
_TAU_ZETA = 2.2
_TAU_GM = 0.4
_TAU_A0 = 0.011
_TAU_FACTOR_PER_MV = 0.0378


def _q_inf(v, celsius, p):
    return 1.0 / (1.0 + np.exp((v - p.v_half_mV) / _SLOPE_MV))


def _q_tau(v, celsius, p):
    x = _TAU_FACTOR_PER_MV * _TAU_ZETA * (v - _TAU_V_HALF_MV)
    return np.exp(_TAU_GM * x) / (_TAU_A0 * (1.0 + np.exp(x)))


ih = Channel(
    name="ih",
    gates=(Gate("q", 1, steady_state=_q_inf, tau_ms=_q_tau),),
    reversal_mV=IH_REVERSAL_MV,
    q10=4.5,
    reference_celsius=33.0,
    parameters=(("v_half_mV", -82.0),),
    reference="Magee JC (1998) J Neurosci 18:7613-7624 (slope and kinetics from memory)",
    description="hyperpolarisation-activated mixed cation current (HCN)",
)
