"""Passive test cells shared by the cable-theory tests.

The worked example of REFERENCES §1 ("the worked example"): d = 2 µm,
Rm = 20 kΩ·cm², Ri = 150 Ω·cm, Cm = 1 µF/cm², so λ = 816.497 µm, τ = 20 ms and
R∞ = 389.85 MΩ (all derived from the standard cable formulas, Rall 1959;
Jack, Noble & Tsien 1975).
"""

import math

import numpy as np

from cabletree.cell import Membrane, build_cell
from cabletree.grid import SpacingRule, build_grid

RM_OHM_CM2 = 20_000.0
RI_OHM_CM = 150.0
CM_UF_PER_CM2 = 1.0
DIAMETER_UM = 2.0
TAU_MS = RM_OHM_CM2 * CM_UF_PER_CM2 * 1e-3  # 20 ms


def length_constant_um(d_um=DIAMETER_UM, rm=RM_OHM_CM2, ri=RI_OHM_CM):
    """λ = sqrt(Rm d / (4 Ri)), µm (textbook cable theory)."""
    return math.sqrt(rm * d_um * 1e-4 / (4.0 * ri)) * 1e4


def r_infinity_MOhm(d_um=DIAMETER_UM, rm=RM_OHM_CM2, ri=RI_OHM_CM):
    """R∞ = (2/π) sqrt(Rm Ri) d^(-3/2), MΩ (semi-infinite cable input resistance)."""
    d_cm = d_um * 1e-4
    return (2.0 / math.pi) * math.sqrt(rm * ri) * d_cm ** -1.5 * 1e-6


PASSIVE = Membrane(cm_uF_per_cm2=CM_UF_PER_CM2, axial_resistivity_ohm_cm=RI_OHM_CM,
                   leak_S_per_cm2=1.0 / RM_OHM_CM2, leak_reversal_mV=0.0)


def uniform_rule(piece_um):
    """Spacing rule giving pieces of at most ``piece_um`` (no AC rule)."""
    return SpacingRule(max_length_um=piece_um * (1 + 1e-9), lambda_fraction=None)


def passive_cell(morph, piece_um, **kwargs):
    """A passive cell (rest 0 mV) on ``morph`` with pieces of at most ``piece_um``."""
    grid = build_grid(morph, uniform_rule(piece_um))
    return build_cell(grid, membrane=PASSIVE, **kwargs)
