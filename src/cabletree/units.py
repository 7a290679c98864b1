"""Unit conversions used once, at the boundary between geometry and the solver.

Internal units: µm, ms, mV, nA, µS, nF; densities in µF/cm² and S/cm²; axial
resistivity in Ω·cm.  With these, ``C dV/dt = I`` reads nF · mV/ms = nA and
``I = g V`` reads µS · mV = nA, so the solver needs no further factors.
"""

from __future__ import annotations

__all__ = [
    "UM2_TO_CM2",
    "capacitance_nF",
    "conductance_uS",
    "axial_conductance_uS",
    "current_density_to_nA",
]

#: 1 µm² = 1e-8 cm².
UM2_TO_CM2 = 1e-8


def capacitance_nF(cm_uF_per_cm2, area_um2):
    """Membrane capacitance, nF, of ``area_um2`` µm² with specific capacitance in µF/cm²."""
    return cm_uF_per_cm2 * area_um2 * UM2_TO_CM2 * 1e3


def conductance_uS(g_S_per_cm2, area_um2):
    """Membrane conductance, µS, of ``area_um2`` µm² with a density in S/cm²."""
    return g_S_per_cm2 * area_um2 * UM2_TO_CM2 * 1e6


def current_density_to_nA(i_uA_per_cm2, area_um2):
    """Current, nA, through ``area_um2`` µm² carrying a density in µA/cm²."""
    return i_uA_per_cm2 * area_um2 * UM2_TO_CM2 * 1e3


def axial_conductance_uS(axial_resistivity_ohm_cm, resistance_integral_per_um):
    """Axial conductance, µS, of a core conductor.

    Parameters
    ----------
    axial_resistivity_ohm_cm : float or ndarray
        Cytoplasmic resistivity, Ω·cm.
    resistance_integral_per_um : float or ndarray
        ``∫ dx / (π r(x)²)`` along the conductor, 1/µm (for a frustum of length
        ``l`` and end radii ``r1``, ``r2``: ``l / (π r1 r2)``).

    Returns
    -------
    float or ndarray
        Conductance, µS.  Resistance is ``Ri · integral`` with 1 Ω·cm/µm = 1e4 Ω.
    """
    return 1e6 / (axial_resistivity_ohm_cm * resistance_integral_per_um * 1e4)
