"""Dendritic channels of CA1 pyramidal cells in the Migliore et al (1999) model family.

Migliore M, Hoffman DA, Magee JC, Johnston D (1999). Role of an A-type K+
conductance in the back-propagation of action potentials in the dendrites of
hippocampal pyramidal neurons.  J Comput Neurosci 7:5-15.  The A-type density
gradient and the proximal/distal kinetic split follow the measurements of
Hoffman DA, Magee JC, Colbert CM, Johnston D (1997) Nature 387:869-875.

A-type potassium (``ka_proximal``, ``ka_distal``)
-------------------------------------------------
``I = gmax · n · l · (V - EK)``, EK = -90 mV.  With the thermal factor
``k(T) = 1e-3 F / (R (273.16 + T))`` per mV (F = 96480 C/mol, R = 8.315 J/(mol K),
T in °C) and ``V' = V - shift_mV``:

- activation ``n``: ``ζn = ζ0 - 1/(1 + exp((V' + 40)/5))``,
  ``αn = exp(ζn (V' - V½n) k)``, ``βn = exp(ζn gmn (V' - V½n) k)``,
  ``n∞ = 1/(1 + αn)``, ``τn = max(βn / (qt a0n (1 + αn)), 0.1 ms)``,
  ``qt = 5^((T - 24)/10)``;
- inactivation ``l``: ``αl = exp(ζl (V - V½l) k)``, ζl = 3, V½l = -56 mV,
  ``l∞ = 1/(1 + αl)``, ``τl = max(0.26 (V + 50), 2 ms)`` (not temperature scaled).

Proximal kinetics (used within 100 µm of the soma): V½n = +11 mV, ζ0 = -1.5,
gmn = 0.55, a0n = 0.05/ms.  Distal kinetics (100 µm and beyond): V½n = -1 mV,
ζ0 = -1.8, gmn = 0.39, a0n = 0.1/ms; the distal activation curve lies about 12 mV
more negative, as Hoffman et al (1997) measured beyond ~100 µm.  These constants are
from REFERENCES §3(b) (from memory of the paper, not verified against it).  The
floor of τn is not reliably remembered (0.1-0.2 ms); this library uses 0.1 ms.  The
floor is applied after temperature scaling, i.e. the scaled time constant never
drops below 0.1 ms.

Named parameters (each may vary over the tree through a profile):
``v_half_n_mV`` (the activation half-point V½n alone) and ``shift_mV``, which
translates the whole activation gate (n∞, τn and the ζn sigmoid) along the voltage
axis, so the n∞ half-point is at ``v_half_n_mV + shift_mV`` exactly.

Hoffman et al (1997) found the A-type density to rise about linearly, ~5-fold from
the soma to 350 µm; :func:`hoffman_gradient` gives that profile and
:func:`ka_placements` places the two kinetic types on either side of 100 µm.

Fast sodium (``na_dendritic``) and delayed rectifier (``kdr``) [from memory]
---------------------------------------------------------------------------
Migliore et al (1999) used an HH-type fast Na current (uniform density along the
trunk, after Magee & Johnston 1995, J Physiol 487:67-90) and a delayed rectifier
of the same thermal-factor form as the A current.  Their exact equations are not
reliably known to this library's authors; the kinetics below are HH-type kinetics
for pyramidal dendrites as remembered from that model family, **[from memory]**
throughout, not checked against the paper:

- ``na_dendritic``: ``I = gmax m³ h (V - ENa)``, ENa = +55 mV;
  ``αm = 0.4 (V+30)/(1 - exp(-(V+30)/7.2))``, ``βm = 0.124 (-(V+30))/(1 - exp((V+30)/7.2))``,
  ``m∞ = αm/(αm+βm)``, ``τm = max(1/(qt (αm+βm)), 0.02 ms)``;
  ``αh = 0.03 (V+45)/(1 - exp(-(V+45)/1.5))``, ``βh = 0.01 (-(V+45))/(1 - exp((V+45)/1.5))``,
  ``h∞ = 1/(1 + exp((V+50)/4))``, ``τh = max(1/(qt (αh+βh)), 0.5 ms)``;
  ``qt = 2^((T-24)/10)``.  The slow (prolonged) inactivation gate that some models of
  this family add for activity-dependent attenuation is not included.
- ``kdr``: ``I = gmax n (V - EK)``, EK = -90 mV;
  ``αn = exp(ζ (V - V½) k)``, ``βn = exp(ζ gm (V - V½) k)``, V½ = 13 mV, ζ = -3, gm = 0.7,
  ``n∞ = 1/(1 + αn)``, ``τn = max(βn / (a0 (1 + αn)), 2 ms)``, a0 = 0.02/ms; no Q10
  (the temperature enters only through k(T)).
"""

from __future__ import annotations

import numpy as np

from ..profiles import ChannelPlacement, Linear, Selector
from .base import Channel, Gate, linear_rate

__all__ = [
    "ka_proximal", "ka_distal", "na_dendritic", "kdr", "thermal_factor_per_mV",
    "hoffman_gradient", "ka_placements", "PROXIMAL_DISTAL_BOUNDARY_UM", "MIGLIORE_EK_MV",
]

_REF = ("Migliore M, Hoffman DA, Magee JC, Johnston D (1999) J Comput Neurosci 7:5-15; "
        "gradient and kinetic split after Hoffman DA, Magee JC, Colbert CM, Johnston D "
        "(1997) Nature 387:869-875")
_REF_MEMORY = ("HH-type kinetics of the Migliore et al (1999, J Comput Neurosci 7:5-15) "
               "model family, constants from memory (not verified against the paper)")

#: Potassium reversal potential of the model, mV.
MIGLIORE_EK_MV = -90.0
#: Path distance, µm, at which the proximal kinetics give way to the distal ones.
PROXIMAL_DISTAL_BOUNDARY_UM = 100.0

_FARADAY = 96480.0       # C/mol, value used by the model
_GAS_CONSTANT = 8.315    # J/(mol K), value used by the model
_KA_TAU_N_FLOOR_MS = 0.1
_KA_ZETA_L = 3.0
_KA_V_HALF_L_MV = -56.0
_KA_TAU_L_FLOOR_MS = 2.0


def thermal_factor_per_mV(celsius):
    """The factor ``k(T) = 1e-3 F / (R (273.16 + T))`` of the Migliore et al (1999) rates.

    Parameters
    ----------
    celsius : float or ndarray
        Temperature, °C.

    Returns
    -------
    float or ndarray
        k(T), 1/mV (F/RT expressed per mV; 0.039046 at 24 °C).
    """
    return 1e-3 * _FARADAY / (_GAS_CONSTANT * (273.16 + celsius))


def _ka_exponent(v, celsius, shift_mV, v_half_n_mV, zeta0):
    """``ζn (V' - V½n) k(T)`` with ``V' = V - shift_mV`` (dimensionless)."""
    vs = v - shift_mV
    zeta = zeta0 - 1.0 / (1.0 + np.exp((vs + 40.0) / 5.0))
    return zeta * (vs - v_half_n_mV) * thermal_factor_per_mV(celsius)


def _ka_channel(name, v_half_n_mV, zeta0, gmn, a0n, where):
    """One A-type kinetic type: activation n and inactivation l, EK = -90 mV.

    The rate functions capture only numbers and call only module-level functions,
    so a compiler can treat them like the other channels' rate functions.
    """

    def n_inf_tau(v, celsius, p):
        # steady state and unscaled tau from one exponent and one reciprocal:
        # betan / (a0n (1 + alphan)) = betan n_inf / a0n; the floor is multiplied by
        # qt so that tau / qt >= floor
        x = _ka_exponent(v, celsius, p.shift_mV, p.v_half_n_mV, zeta0)
        qt = np.exp(np.log(5.0) * (celsius - 24.0) / 10.0)
        n_inf_value = 1.0 / (1.0 + np.exp(x))
        tau = np.maximum(np.exp(gmn * x) * n_inf_value * (1.0 / a0n), _KA_TAU_N_FLOOR_MS * qt)
        return n_inf_value, tau

    def n_inf(v, celsius, p):
        return n_inf_tau(v, celsius, p)[0]

    def n_tau(v, celsius, p):
        return n_inf_tau(v, celsius, p)[1]

    def l_inf(v, celsius, p):
        return 1.0 / (1.0 + np.exp(_KA_ZETA_L * (v - _KA_V_HALF_L_MV)
                                   * thermal_factor_per_mV(celsius)))

    def l_tau(v, celsius, p):
        return np.maximum(0.26 * (v + 50.0), _KA_TAU_L_FLOOR_MS)

    return Channel(
        name=name,
        gates=(Gate("n", 1, steady_state=n_inf, tau_ms=n_tau, temperature_scaled=True,
                    steady_state_and_tau_ms=n_inf_tau),
               Gate("l", 1, steady_state=l_inf, tau_ms=l_tau, temperature_scaled=False)),
        reversal_mV=MIGLIORE_EK_MV,
        q10=5.0,
        reference_celsius=24.0,
        parameters=(("v_half_n_mV", v_half_n_mV), ("shift_mV", 0.0)),
        reference=_REF,
        description=f"A-type potassium current, {where}",
    )


ka_proximal = _ka_channel("ka_proximal", 11.0, zeta0=-1.5, gmn=0.55, a0n=0.05,
                          where="proximal kinetics (< 100 µm from the soma)")
ka_distal = _ka_channel("ka_distal", -1.0, zeta0=-1.8, gmn=0.39, a0n=0.1,
                        where="distal kinetics (>= 100 µm from the soma)")


_NA_Q10 = 2.0
_NA_TAU_M_FLOOR_MS = 0.02
_NA_TAU_H_FLOOR_MS = 0.5


# ``-30.0 - v`` is ``-(v + 30.0)`` to the bit (round-to-nearest is symmetric in
# sign; only the sign of a zero differs, which linear_rate maps to the same value)
# with one array pass fewer.

def _na_alpha_m(v):
    return 0.4 * linear_rate(v + 30.0, 7.2)


def _na_beta_m(v):
    return 0.124 * linear_rate(-30.0 - v, 7.2)


def _na_alpha_h(v):
    return 0.03 * linear_rate(v + 45.0, 1.5)


def _na_beta_h(v):
    return 0.01 * linear_rate(-45.0 - v, 1.5)


def _na_qt(celsius):
    return np.exp(np.log(_NA_Q10) * (celsius - 24.0) / 10.0)


def _na_m_inf_tau(v, celsius, p):
    a = _na_alpha_m(v)
    s = a + _na_beta_m(v)
    return a / s, np.maximum(1.0 / s, _NA_TAU_M_FLOOR_MS * _na_qt(celsius))


def _na_m_inf(v, celsius, p):
    return _na_m_inf_tau(v, celsius, p)[0]


def _na_m_tau(v, celsius, p):
    return _na_m_inf_tau(v, celsius, p)[1]


def _na_h_inf(v, celsius, p):
    return 1.0 / (1.0 + np.exp((v + 50.0) / 4.0))


def _na_h_tau(v, celsius, p):
    return np.maximum(1.0 / (_na_alpha_h(v) + _na_beta_h(v)), _NA_TAU_H_FLOOR_MS * _na_qt(celsius))


na_dendritic = Channel(
    name="na_dendritic",
    gates=(Gate("m", 3, steady_state=_na_m_inf, tau_ms=_na_m_tau,
                steady_state_and_tau_ms=_na_m_inf_tau),
           Gate("h", 1, steady_state=_na_h_inf, tau_ms=_na_h_tau)),
    reversal_mV=55.0,
    q10=_NA_Q10,
    reference_celsius=24.0,
    reference=_REF_MEMORY,
    description="fast sodium current of pyramidal dendrites (kinetics from memory)",
)


_KDR_V_HALF_MV = 13.0
_KDR_ZETA = -3.0
_KDR_GM = 0.7
_KDR_A0 = 0.02
_KDR_TAU_FLOOR_MS = 2.0


def _kdr_exponent(v, celsius):
    return _KDR_ZETA * (v - _KDR_V_HALF_MV) * thermal_factor_per_mV(celsius)


def _kdr_n_inf_tau(v, celsius, p):
    # one exponent, one reciprocal: betan / (a0 (1 + alphan)) = betan n_inf / a0
    x = _kdr_exponent(v, celsius)
    n_inf_value = 1.0 / (1.0 + np.exp(x))
    tau = np.maximum(np.exp(_KDR_GM * x) * n_inf_value * (1.0 / _KDR_A0), _KDR_TAU_FLOOR_MS)
    return n_inf_value, tau


def _kdr_n_inf(v, celsius, p):
    return _kdr_n_inf_tau(v, celsius, p)[0]


def _kdr_n_tau(v, celsius, p):
    return _kdr_n_inf_tau(v, celsius, p)[1]


kdr = Channel(
    name="kdr",
    gates=(Gate("n", 1, steady_state=_kdr_n_inf, tau_ms=_kdr_n_tau,
                steady_state_and_tau_ms=_kdr_n_inf_tau),),
    reversal_mV=MIGLIORE_EK_MV,
    q10=1.0,
    reference_celsius=24.0,
    reference=_REF_MEMORY,
    description="delayed-rectifier potassium current of pyramidal dendrites (from memory)",
)


def hoffman_gradient(gmax_soma_S_per_cm2: float, fold: float = 5.0,
                     at_um: float = 350.0) -> Linear:
    """Linear A-type density profile rising ``fold``-fold from the soma to ``at_um``.

    ``g(x) = g0 (1 + (fold - 1) x / at_um)``; the defaults give the ~5-fold increase
    at 350 µm measured by Hoffman et al (1997, Nature 387:869-875) [from memory], the
    gradient used by Migliore et al (1999).

    Parameters
    ----------
    gmax_soma_S_per_cm2 : float
        Density at the soma (path distance 0), S/cm².
    fold : float
        Ratio g(at_um) / g(0) (dimensionless, > 0).
    at_um : float
        Path distance at which the ratio is reached, µm (> 0).

    Returns
    -------
    Linear
        Profile over path distance, S/cm² (floored at 0 where ``fold < 1`` would make
        it negative far out).
    """
    return Linear(value_at_zero=float(gmax_soma_S_per_cm2),
                  slope_per_um=float(gmax_soma_S_per_cm2) * (float(fold) - 1.0) / float(at_um),
                  floor=0.0)


def ka_placements(gmax_S_per_cm2, where: Selector = Selector(),
                  boundary_um: float = PROXIMAL_DISTAL_BOUNDARY_UM,
                  parameters=()) -> tuple[ChannelPlacement, ...]:
    """Place the A-type current with proximal kinetics below, distal at/after ``boundary_um``.

    Migliore et al (1999) switch from the proximal to the distal kinetic type at
    100 µm path distance, following Hoffman et al (1997).

    Parameters
    ----------
    gmax_S_per_cm2 : Profile or float
        Density profile for both types, S/cm² (e.g. :func:`hoffman_gradient`).
    where : Selector
        Where the current is present at all; its path-distance range, if any, is
        intersected with ``[0, boundary_um)`` and ``[boundary_um, inf)``.
    boundary_um : float
        Path distance of the switch, µm (a compartment at exactly this distance is
        distal).
    parameters : mapping of str to Profile or float
        Parameters for both types (``v_half_n_mV`` is then shared; usually leave it).

    Returns
    -------
    tuple of ChannelPlacement
        The proximal then the distal placement; a side that ``where`` excludes
        entirely is left out.
    """
    lo, hi = (0.0, np.inf) if where.path_distance_um is None else where.path_distance_um
    out = []
    if lo < min(hi, boundary_um):
        out.append(ChannelPlacement(
            ka_proximal, gmax_S_per_cm2,
            Selector(where.swc_types, (lo, min(hi, boundary_um)), where.branch_order),
            parameters))
    if max(lo, boundary_um) < hi:
        out.append(ChannelPlacement(
            ka_distal, gmax_S_per_cm2,
            Selector(where.swc_types, (max(lo, boundary_um), hi), where.branch_order),
            parameters))
    return tuple(out)
