"""The gate formalism: how a channel model is written.

A channel is data plus pure rate functions, in the spirit of Hodgkin & Huxley
(1952): the current through it is

.. math:: I = \\bar g \\, \\prod_j x_j^{p_j} \\, (V - E)

where each gating variable :math:`x_j` obeys
:math:`dx/dt = (x_\\infty(V) - x) / \\tau_x(V)`, given either by rate functions
:math:`\\alpha, \\beta` (then :math:`x_\\infty = \\alpha/(\\alpha+\\beta)`,
:math:`\\tau_x = 1/(\\alpha+\\beta)`) or directly by :math:`x_\\infty` and
:math:`\\tau_x`.  Temperature enters through a Q10 factor
:math:`\\phi = Q_{10}^{(T - T_{ref})/10}` that multiplies the rates.

Rules for writing a channel (built-in or your own)
--------------------------------------------------
1. Rate functions have the signature ``f(v_mV, celsius, p)`` and return rates in
   1/ms (``alpha``, ``beta``), a dimensionless steady state (``steady_state``) or a
   time constant in ms (``tau_ms``), *before* temperature scaling.
2. They are pure elementwise arithmetic with numpy functions (``np.exp``,
   ``np.log``, ...): ``v_mV`` may be a float or an array, and must give the same
   answer either way.  No Python ``if`` on values: use :func:`linear_rate` for
   rates of the form x/(1 - exp(-x/k)) and ``np.where``/``np.maximum`` for floors.
   The compiled solver compiles these same functions, so they must also be
   acceptable to numba (plain numpy math is).
3. ``p`` carries the channel's named parameters (declared in
   :attr:`Channel.parameters` with defaults) as attributes, e.g. ``p.shift_mV``.
   Each may vary over the tree through a profile.
4. Gate powers are non-negative integers; a power of 0 makes a state variable
   that evolves but does not enter the conductance.
5. Cite the published source in :attr:`Channel.reference`.
6. When a gate's steady state and time constant share work (the same exponent or
   exponential), write one function ``f(v_mV, celsius, p) -> (x_inf, tau_ms)``
   returning both (dimensionless, ms; the pair as a tuple), give it as
   ``steady_state_and_tau_ms`` and define ``steady_state`` and ``tau_ms`` as small
   named functions taking its first and second entry, so there is one source of
   truth.  The solvers then evaluate it once per step instead of the two
   functions separately.  :class:`Channel` checks it when it is constructed: it is
   called once at a few voltages with the default parameters and must return a
   pair whose entries match ``steady_state`` and ``tau_ms`` (relative 1e-12).

Gating variables are advanced by exponential (Rush & Larsen 1978, IEEE Trans
Biomed Eng 25:389-392) integration, exact for a voltage frozen over the step.
"""

from __future__ import annotations

from collections import namedtuple
from dataclasses import dataclass
from functools import cached_property
from typing import Any, Callable

import numpy as np

from ..errors import ChannelError

__all__ = ["Gate", "Channel", "linear_rate", "q10_factor"]

RateFunction = Callable[[Any, float, Any], Any]


def linear_rate(x_mV, slope_mV):
    """Rate of the form ``x / (1 - exp(-x / slope))`` with its removable singularity.

    At ``x = 0`` the limit is ``slope``; near it a two-term series is used so the
    value is smooth and exact to round-off.

    Parameters
    ----------
    x_mV : float or ndarray
        Voltage offset, mV (e.g. ``v + 40`` for the Hodgkin-Huxley m gate).
    slope_mV : float
        Slope factor, mV.

    Returns
    -------
    float or ndarray
        ``x / (1 - exp(-x/slope))``, mV (multiply by a coefficient in 1/(ms·mV)).
    """
    # w = -x/slope, spelled so that no array is negated: x / -slope is -(x / slope)
    # to the bit, and slope (1 - w/2) is slope (1 + u/2) with u = -w
    w = x_mV / -slope_mV
    small = np.abs(w) < 1e-6
    w_safe = np.where(small, -1.0, w)
    return np.where(small, slope_mV * (1.0 - 0.5 * w), x_mV / (1.0 - np.exp(w_safe)))


def q10_factor(q10: float, celsius: float, reference_celsius: float) -> float:
    """Temperature factor ``q10 ** ((celsius - reference_celsius) / 10)``.

    Parameters
    ----------
    q10 : float
        Ratio of rates for a 10 °C rise (dimensionless).
    celsius : float
        Temperature of the cell, °C.
    reference_celsius : float
        Temperature at which the rate functions were measured, °C.

    Returns
    -------
    float
        Dimensionless factor multiplying the rates (dividing the time constants).
    """
    return float(q10) ** ((float(celsius) - float(reference_celsius)) / 10.0)


@dataclass(frozen=True)
class Gate:
    """One gating variable of a channel.

    Give either ``alpha`` and ``beta`` (1/ms) or ``steady_state`` and ``tau_ms``;
    with the latter, optionally also ``steady_state_and_tau_ms`` (rule 6 of
    :mod:`cabletree.channels.base`).

    Parameters
    ----------
    name : str
        Name of the gating variable (e.g. "m").
    power : int
        Exponent of the variable in the conductance (>= 0).
    alpha, beta : callable, optional
        Opening and closing rates ``f(v_mV, celsius, p)`` in 1/ms.
    steady_state : callable, optional
        Steady-state value ``f(v_mV, celsius, p)``, dimensionless in [0, 1].
    tau_ms : callable, optional
        Time constant ``f(v_mV, celsius, p)``, ms.
    steady_state_and_tau_ms : callable, optional
        Both at once: ``f(v_mV, celsius, p) -> (x_inf, tau_ms)``, a tuple of the
        dimensionless steady state and the time constant in ms (before
        temperature scaling), equal to what ``steady_state`` and ``tau_ms``
        return.  Give it when the two share work; the solvers then call it
        instead of the pair.  Checked by :class:`Channel` at construction.
    temperature_scaled : bool
        Whether the channel's Q10 factor applies to this gate.
    """

    name: str
    power: int
    alpha: RateFunction | None = None
    beta: RateFunction | None = None
    steady_state: RateFunction | None = None
    tau_ms: RateFunction | None = None
    temperature_scaled: bool = True
    steady_state_and_tau_ms: RateFunction | None = None

    def __post_init__(self) -> None:
        has_ab = self.alpha is not None and self.beta is not None
        has_it = self.steady_state is not None and self.tau_ms is not None
        if has_ab == has_it:
            raise ChannelError(
                f"gate {self.name!r}: give either alpha and beta, or steady_state and "
                "tau_ms (exactly one pair)"
            )
        if self.steady_state_and_tau_ms is not None and not has_it:
            raise ChannelError(
                f"gate {self.name!r}: steady_state_and_tau_ms goes with steady_state and "
                "tau_ms (give those two as well, defined from it), not with alpha and beta"
            )
        if self.steady_state_and_tau_ms is not None and not callable(self.steady_state_and_tau_ms):
            raise ChannelError(
                f"gate {self.name!r}: steady_state_and_tau_ms must be a function "
                f"f(v_mV, celsius, p) -> (x_inf, tau_ms), got {self.steady_state_and_tau_ms!r}"
            )
        if int(self.power) != self.power or self.power < 0:
            raise ChannelError(
                f"gate {self.name!r}: power must be a non-negative integer, got {self.power!r}"
            )

    @property
    def uses_rates(self) -> bool:
        """True when the gate is given by alpha and beta."""
        return self.alpha is not None

    def inf_tau(self, v_mV, celsius: float, p, phi: float):
        """Steady state and time constant at voltage ``v_mV``.

        Parameters
        ----------
        v_mV : float or ndarray
            Membrane potential, mV.
        celsius : float
            Temperature, °C.
        p : namedtuple
            Channel parameters.
        phi : float
            Temperature factor of the channel (applied if ``temperature_scaled``).

        Returns
        -------
        (inf, tau_ms) : tuple of float or ndarray
            Steady state (dimensionless) and time constant (ms).
        """
        scale = phi if self.temperature_scaled else 1.0
        if self.uses_rates:
            a = self.alpha(v_mV, celsius, p)
            b = self.beta(v_mV, celsius, p)
            s = a + b
            return a / s, 1.0 / (scale * s)
        inf, tau = self.steady_state_and_tau_unscaled(v_mV, celsius, p)
        return inf, tau / scale

    def steady_state_and_tau_unscaled(self, v_mV, celsius: float, p):
        """Steady state and time constant of a steady-state gate, before temperature scaling.

        Calls ``steady_state_and_tau_ms`` once when the gate has it, else
        ``steady_state`` and ``tau_ms``.

        Parameters
        ----------
        v_mV : float or ndarray
            Membrane potential, mV.
        celsius : float
            Temperature, °C.
        p : namedtuple
            Channel parameters.

        Returns
        -------
        (inf, tau_ms) : tuple of float or ndarray
            Steady state (dimensionless) and unscaled time constant (ms; may be
            a scalar for a voltage-independent time constant).
        """
        if self.steady_state_and_tau_ms is not None:
            return self.steady_state_and_tau_ms(v_mV, celsius, p)
        return self.steady_state(v_mV, celsius, p), self.tau_ms(v_mV, celsius, p)


#: Voltages, mV, at which :class:`Channel` checks a gate's combined function.
_PROBE_V_MV = np.array([-100.0, -80.0, -65.0, -40.0, -20.0, 0.0, 30.0])


def _check_combined_function(channel: "Channel", gate: Gate) -> None:
    """Check a gate's ``steady_state_and_tau_ms`` at :data:`_PROBE_V_MV` (rule 6).

    It must return a pair whose entries are scalars or arrays of the voltages'
    shape and equal ``steady_state`` and ``tau_ms`` to a relative 1e-12, at the
    channel's reference temperature with its default parameters.

    Raises
    ------
    ChannelError
        Naming the channel, the gate and what was expected.
    """
    where = f"channel {channel.name!r}, gate {gate.name!r}: steady_state_and_tau_ms"
    p = channel.make_parameters()
    v, celsius = _PROBE_V_MV.copy(), float(channel.reference_celsius)
    with np.errstate(all="ignore"):
        both = gate.steady_state_and_tau_ms(v, celsius, p)
        if not isinstance(both, tuple) or len(both) != 2:
            got = (f"a tuple of length {len(both)}" if isinstance(both, tuple)
                   else f"{type(both).__name__} of shape {np.shape(both)}")
            raise ChannelError(f"{where} must return a pair (x_inf, tau_ms), got {got}")
        separate = (gate.steady_state(v, celsius, p), gate.tau_ms(v, celsius, p))
    for label, value, expected in zip(("x_inf", "tau_ms"), both, separate):
        if np.shape(value) not in ((), v.shape):
            raise ChannelError(
                f"{where}: {label} has shape {np.shape(value)} for {v.size} voltages; "
                f"expected a scalar or shape {v.shape}")
        if not np.allclose(value, expected, rtol=1e-12, atol=0.0, equal_nan=True):
            name = "steady_state" if label == "x_inf" else "tau_ms"
            raise ChannelError(
                f"{where}: {label} differs from {name} at the probe voltages "
                f"{_PROBE_V_MV.tolist()} mV (got {np.broadcast_to(value, v.shape).tolist()}, "
                f"{name} gives {np.broadcast_to(expected, v.shape).tolist()}); define "
                f"{name} from the combined function (rule 6)")


@dataclass(frozen=True)
class Channel:
    """A kinetic model of one ionic current.

    Parameters
    ----------
    name : str
        Short identifier, used as a key in scenarios and in result variables.
    gates : tuple of Gate
        Gating variables, in order.
    reversal_mV : float
        Default reversal potential, mV (may be overridden per placement).
    q10 : float
        Temperature coefficient of the rates (dimensionless).
    reference_celsius : float
        Temperature at which the rate functions hold, °C.
    parameters : tuple of (str, float)
        Extra named parameters of the rate functions with their defaults; each can
        be given a profile over the tree.
    reference : str
        Published source of the model (authors, year, journal).
    description : str
        One line saying what the current is.
    """

    name: str
    gates: tuple[Gate, ...]
    reversal_mV: float
    q10: float = 1.0
    reference_celsius: float = 6.3
    parameters: tuple[tuple[str, float], ...] = ()
    reference: str = ""
    description: str = ""

    def __post_init__(self) -> None:
        if not self.name.isidentifier():
            raise ChannelError(
                f"channel name {self.name!r} must be a Python identifier (letters, digits, _)"
            )
        if not self.gates:
            raise ChannelError(f"channel {self.name!r}: needs at least one gate")
        names = [g.name for g in self.gates] + [n for n, _ in self.parameters]
        dupes = {n for n in names if names.count(n) > 1}
        if dupes:
            raise ChannelError(f"channel {self.name!r}: repeated gate/parameter names {sorted(dupes)}")
        for pname, _ in self.parameters:
            if not pname.isidentifier():
                raise ChannelError(
                    f"channel {self.name!r}: parameter name {pname!r} must be an identifier"
                )
        for gate in self.gates:
            if gate.steady_state_and_tau_ms is not None:
                _check_combined_function(self, gate)

    @property
    def gate_names(self) -> tuple[str, ...]:
        """Names of the gating variables, in order."""
        return tuple(g.name for g in self.gates)

    @property
    def parameter_names(self) -> tuple[str, ...]:
        """Names of the extra parameters, in order."""
        return tuple(n for n, _ in self.parameters)

    @property
    def parameter_defaults(self) -> dict[str, float]:
        """Default value of each extra parameter."""
        return {n: float(v) for n, v in self.parameters}

    @cached_property
    def parameter_tuple(self):
        """The namedtuple type passed to the rate functions as ``p``."""
        return namedtuple(f"{self.name}_parameters", self.parameter_names)

    def make_parameters(self, values=None):
        """Build the ``p`` argument of the rate functions.

        Parameters
        ----------
        values : mapping of str to float or ndarray, optional
            Values overriding the defaults.

        Returns
        -------
        namedtuple
            One field per parameter.
        """
        merged = self.parameter_defaults
        if values:
            unknown = set(values) - set(merged)
            if unknown:
                raise ChannelError(
                    f"channel {self.name!r}: unknown parameters {sorted(unknown)}; "
                    f"known: {sorted(merged)}"
                )
            merged.update(values)
        return self.parameter_tuple(**merged)

    def temperature_factor(self, celsius: float) -> float:
        """Q10 factor of this channel at ``celsius`` (dimensionless)."""
        return q10_factor(self.q10, celsius, self.reference_celsius)

    def steady_state(self, v_mV, celsius: float, p=None) -> tuple:
        """Steady-state value of every gate at ``v_mV`` (tuple, one entry per gate)."""
        p = self.make_parameters() if p is None else p
        phi = self.temperature_factor(celsius)
        return tuple(g.inf_tau(v_mV, celsius, p, phi)[0] for g in self.gates)

    def open_fraction(self, gate_values) -> Any:
        """Product of gate values raised to their powers (dimensionless)."""
        out = 1.0
        for g, x in zip(self.gates, gate_values):
            if g.power:
                out = out * x ** g.power
        return out
