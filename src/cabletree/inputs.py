"""Inputs: current injections, synapses and the event trains that drive them.

Waveforms are small frozen dataclasses with two pure methods: ``current_nA(t_ms)``
(vectorised over time) and ``breakpoints_ms()`` (times where the waveform jumps,
after which the solver restarts Crank-Nicolson with damping steps).
Synaptic conductances are peak-normalised: a synapse of weight ``w`` nS driven by
one event has a conductance whose maximum is ``w``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = [
    "StepCurrent", "RampCurrent", "PulseTrainCurrent", "NoiseCurrent", "SampledCurrent",
    "SynapseKinetics", "AMPA", "NMDA", "alpha_kinetics", "double_exponential_peak",
    "mg_block", "EventTrain", "explicit_events", "regular_events", "burst_events",
    "poisson_events",
]


def _check_nonnegative(name: str, value: float) -> None:
    if not (value >= 0 and math.isfinite(value)):
        raise InputError(f"{name} must be a finite number >= 0, got {value!r}")


@dataclass(frozen=True)
class StepCurrent:
    """A rectangular current pulse.

    Parameters
    ----------
    amplitude_nA : float
        Current while on, nA (positive = depolarising, injected into the cell).
    delay_ms : float
        Onset time, ms.
    duration_ms : float
        Duration, ms.
    """

    amplitude_nA: float
    delay_ms: float
    duration_ms: float

    def __post_init__(self) -> None:
        _check_nonnegative("StepCurrent.delay_ms", self.delay_ms)
        _check_nonnegative("StepCurrent.duration_ms", self.duration_ms)

    def current_nA(self, t_ms):
        """Injected current at times ``t_ms`` (ms), nA."""
        t = np.asarray(t_ms, dtype=float)
        on = (t >= self.delay_ms) & (t < self.delay_ms + self.duration_ms)
        return np.where(on, float(self.amplitude_nA), 0.0)

    def breakpoints_ms(self) -> tuple[float, ...]:
        """Times where the current jumps, ms."""
        return (float(self.delay_ms), float(self.delay_ms + self.duration_ms))


@dataclass(frozen=True)
class RampCurrent:
    """A current rising linearly from ``start_nA`` to ``stop_nA`` over ``duration_ms``."""

    start_nA: float
    stop_nA: float
    delay_ms: float
    duration_ms: float

    def __post_init__(self) -> None:
        _check_nonnegative("RampCurrent.delay_ms", self.delay_ms)
        if not self.duration_ms > 0:
            raise InputError(f"RampCurrent.duration_ms must be > 0, got {self.duration_ms!r}")

    def current_nA(self, t_ms):
        """Injected current at times ``t_ms`` (ms), nA."""
        t = np.asarray(t_ms, dtype=float)
        frac = (t - self.delay_ms) / self.duration_ms
        on = (frac >= 0) & (frac < 1)
        return np.where(on, self.start_nA + (self.stop_nA - self.start_nA) * frac, 0.0)

    def breakpoints_ms(self) -> tuple[float, ...]:
        """Times where the current jumps, ms."""
        return (float(self.delay_ms), float(self.delay_ms + self.duration_ms))


@dataclass(frozen=True)
class PulseTrainCurrent:
    """``n_pulses`` rectangular pulses of ``pulse_duration_ms`` every ``interval_ms``."""

    amplitude_nA: float
    delay_ms: float
    pulse_duration_ms: float
    interval_ms: float
    n_pulses: int

    def __post_init__(self) -> None:
        _check_nonnegative("PulseTrainCurrent.delay_ms", self.delay_ms)
        if not 0 < self.pulse_duration_ms <= self.interval_ms:
            raise InputError(
                "PulseTrainCurrent: need 0 < pulse_duration_ms <= interval_ms, got "
                f"{self.pulse_duration_ms!r} and {self.interval_ms!r}")
        if int(self.n_pulses) != self.n_pulses or self.n_pulses < 1:
            raise InputError(f"PulseTrainCurrent.n_pulses must be an integer >= 1, got {self.n_pulses!r}")

    def current_nA(self, t_ms):
        """Injected current at times ``t_ms`` (ms), nA."""
        t = np.asarray(t_ms, dtype=float) - self.delay_ms
        k = np.floor(t / self.interval_ms)
        phase = t - k * self.interval_ms
        on = (t >= 0) & (k < self.n_pulses) & (phase < self.pulse_duration_ms)
        return np.where(on, float(self.amplitude_nA), 0.0)

    def breakpoints_ms(self) -> tuple[float, ...]:
        """Times where the current jumps, ms."""
        starts = self.delay_ms + self.interval_ms * np.arange(self.n_pulses)
        return tuple(float(x) for s in starts for x in (s, s + self.pulse_duration_ms))


@dataclass(frozen=True)
class NoiseCurrent:
    """Gaussian current noise, piecewise constant over ``sample_interval_ms``.

    Parameters
    ----------
    mean_nA, std_nA : float
        Mean and standard deviation, nA.
    delay_ms, duration_ms : float
        When the noise is on, ms.
    sample_interval_ms : float
        A new independent value is drawn every ``sample_interval_ms``, ms.
    seed : int
        Seed of the generator (numpy PCG64); the same seed gives the same noise.
    """

    mean_nA: float
    std_nA: float
    delay_ms: float
    duration_ms: float
    sample_interval_ms: float = 0.1
    seed: int = 0

    def __post_init__(self) -> None:
        _check_nonnegative("NoiseCurrent.std_nA", self.std_nA)
        _check_nonnegative("NoiseCurrent.delay_ms", self.delay_ms)
        if not self.sample_interval_ms > 0:
            raise InputError("NoiseCurrent.sample_interval_ms must be > 0")

    def _values(self) -> np.ndarray:
        n = int(math.ceil(self.duration_ms / self.sample_interval_ms))
        rng = np.random.default_rng(self.seed)
        return self.mean_nA + self.std_nA * rng.standard_normal(max(n, 1))

    def current_nA(self, t_ms):
        """Injected current at times ``t_ms`` (ms), nA."""
        t = np.asarray(t_ms, dtype=float) - self.delay_ms
        values = self._values()
        k = np.floor(t / self.sample_interval_ms).astype(np.int64)
        on = (t >= 0) & (t < self.duration_ms)
        return np.where(on, values[np.clip(k, 0, len(values) - 1)], 0.0)

    def breakpoints_ms(self) -> tuple[float, ...]:
        """Times where the current jumps (every sample boundary), ms."""
        n = len(self._values())
        return tuple(float(self.delay_ms + k * self.sample_interval_ms) for k in range(n + 1))


@dataclass(frozen=True)
class SampledCurrent:
    """An arbitrary waveform given as samples, linearly interpolated, 0 outside.

    Parameters
    ----------
    time_ms : tuple of float
        Strictly increasing sample times, ms.
    current_values_nA : tuple of float
        Current at each sample time, nA.
    """

    time_ms: tuple
    current_values_nA: tuple

    def __post_init__(self) -> None:
        t = np.asarray(self.time_ms, dtype=float)
        if t.ndim != 1 or len(t) < 2 or len(t) != len(self.current_values_nA):
            raise InputError("SampledCurrent: need >= 2 times and as many current values")
        if np.any(np.diff(t) <= 0):
            raise InputError("SampledCurrent.time_ms must be strictly increasing")

    def current_nA(self, t_ms):
        """Injected current at times ``t_ms`` (ms), nA."""
        t = np.asarray(t_ms, dtype=float)
        tt = np.asarray(self.time_ms, dtype=float)
        return np.interp(t, tt, np.asarray(self.current_values_nA, dtype=float), left=0.0, right=0.0)

    def breakpoints_ms(self) -> tuple[float, ...]:
        """Times where the current may jump (first and last sample), ms."""
        return (float(self.time_ms[0]), float(self.time_ms[-1]))


# --- synapses ---------------------------------------------------------------

def double_exponential_peak(tau_rise_ms: float, tau_decay_ms: float) -> tuple[float, float]:
    """Peak time and normalisation factor of a double-exponential conductance.

    ``g(t) = f [exp(-t/τd) - exp(-t/τr)]`` peaks at
    ``t_peak = τr τd / (τd - τr) · ln(τd / τr)`` and ``f = 1 / (exp(-t_peak/τd) -
    exp(-t_peak/τr))`` makes the peak 1 (REFERENCES §4.4, derived).

    Parameters
    ----------
    tau_rise_ms, tau_decay_ms : float
        Time constants, ms, with ``tau_decay_ms > tau_rise_ms > 0``.

    Returns
    -------
    (t_peak_ms, factor) : tuple of float
    """
    tr, td = float(tau_rise_ms), float(tau_decay_ms)
    if not 0 < tr < td:
        raise InputError(f"need 0 < tau_rise_ms < tau_decay_ms, got {tr} and {td}")
    t_peak = tr * td / (td - tr) * math.log(td / tr)
    return t_peak, 1.0 / (math.exp(-t_peak / td) - math.exp(-t_peak / tr))


def mg_block(v_mV, mg_mM: float = 1.0):
    """Magnesium block of the NMDA conductance, ``1 / (1 + [Mg]/3.57 · exp(-0.062 V))``.

    Parameters
    ----------
    v_mV : float or ndarray
        Membrane potential, mV.
    mg_mM : float
        Extracellular magnesium concentration, mM.

    Returns
    -------
    float or ndarray
        Unblocked fraction (dimensionless).

    References
    ----------
    Jahr CE, Stevens CF (1990) J Neurosci 10:3178-3182.
    """
    return 1.0 / (1.0 + (mg_mM / 3.57) * np.exp(-0.062 * np.asarray(v_mV, dtype=float)))


@dataclass(frozen=True)
class SynapseKinetics:
    """Time course and reversal of a conductance-based synapse.

    Parameters
    ----------
    name : str
        Label (e.g. "ampa").
    shape : {"alpha", "double_exponential"}
        ``alpha``: ``g = w (t/τ) exp(1 - t/τ)`` (Rall 1967, J Neurophysiol
        30:1138-1168), τ = ``tau_decay_ms``; ``double_exponential``: peak-normalised
        difference of exponentials.
    tau_rise_ms, tau_decay_ms : float
        Time constants, ms (``tau_rise_ms`` unused for ``alpha``).
    reversal_mV : float
        Reversal potential, mV.
    mg_mM : float or None
        With a value, the conductance is multiplied by the Jahr & Stevens (1990)
        magnesium block :func:`mg_block` at that concentration (NMDA).
    """

    name: str
    shape: str
    tau_rise_ms: float
    tau_decay_ms: float
    reversal_mV: float = 0.0
    mg_mM: float | None = None

    def __post_init__(self) -> None:
        if self.shape not in ("alpha", "double_exponential"):
            raise InputError(
                f"synapse {self.name!r}: shape must be 'alpha' or 'double_exponential', "
                f"got {self.shape!r}")
        if not self.tau_decay_ms > 0:
            raise InputError(f"synapse {self.name!r}: tau_decay_ms must be > 0")
        if self.shape == "double_exponential":
            double_exponential_peak(self.tau_rise_ms, self.tau_decay_ms)
        if self.mg_mM is not None:
            _check_nonnegative(f"synapse {self.name!r}: mg_mM", self.mg_mM)

    def conductance(self, t_since_event_ms, weight_nS: float = 1.0):
        """Conductance after one event, nS (0 before the event)."""
        t = np.asarray(t_since_event_ms, dtype=float)
        tc = np.maximum(t, 0.0)
        if self.shape == "alpha":
            tau = self.tau_decay_ms
            g = (tc / tau) * np.exp(1.0 - tc / tau)
        else:
            _, f = double_exponential_peak(self.tau_rise_ms, self.tau_decay_ms)
            g = f * (np.exp(-tc / self.tau_decay_ms) - np.exp(-tc / self.tau_rise_ms))
        return np.where(t >= 0, weight_nS * g, 0.0)


def alpha_kinetics(tau_ms: float, reversal_mV: float = 0.0, name: str = "alpha") -> SynapseKinetics:
    """An alpha-function synapse of time constant ``tau_ms`` (peak at t = τ)."""
    return SynapseKinetics(name, "alpha", tau_ms, tau_ms, reversal_mV)


#: AMPA-type kinetics, typical model values (common practice; REFERENCES §4.4).
AMPA = SynapseKinetics("ampa", "double_exponential", 0.2, 2.0, 0.0)
#: NMDA-type kinetics with the Jahr & Stevens (1990) block at 1 mM Mg (typical values, common practice).
NMDA = SynapseKinetics("nmda", "double_exponential", 2.0, 80.0, 0.0, mg_mM=1.0)


# --- event trains -------------------------------------------------------------

@dataclass(frozen=True)
class EventTrain:
    """Presynaptic event times, ms (sorted)."""

    times_ms: tuple

    def __post_init__(self) -> None:
        t = np.asarray(self.times_ms, dtype=float)
        if np.any(~np.isfinite(t)) or np.any(t < 0):
            raise InputError("event times must be finite and >= 0 ms")
        if np.any(np.diff(t) < 0):
            raise InputError("event times must be sorted in increasing order")

    def as_array(self) -> np.ndarray:
        """Event times as a float array, ms."""
        return np.asarray(self.times_ms, dtype=float)


def explicit_events(times_ms) -> EventTrain:
    """Events at the given times, ms (sorted for you)."""
    return EventTrain(tuple(sorted(float(t) for t in times_ms)))


def regular_events(start_ms: float, interval_ms: float, count: int) -> EventTrain:
    """``count`` events every ``interval_ms`` from ``start_ms``."""
    if not interval_ms > 0 or count < 0:
        raise InputError("regular events need interval_ms > 0 and count >= 0")
    return EventTrain(tuple(float(start_ms + k * interval_ms) for k in range(int(count))))


def burst_events(start_ms: float, n_bursts: int, burst_interval_ms: float,
                 spikes_per_burst: int, spike_interval_ms: float) -> EventTrain:
    """Regular bursts: ``n_bursts`` bursts of ``spikes_per_burst`` events."""
    times = [start_ms + b * burst_interval_ms + s * spike_interval_ms
             for b in range(int(n_bursts)) for s in range(int(spikes_per_burst))]
    return explicit_events(times)


def poisson_events(rate_hz: float, start_ms: float, stop_ms: float, seed: int) -> EventTrain:
    """A homogeneous Poisson train of ``rate_hz`` between ``start_ms`` and ``stop_ms``.

    Reproducible: the same seed gives the same times (numpy PCG64).
    """
    _check_nonnegative("poisson rate_hz", rate_hz)
    if stop_ms < start_ms:
        raise InputError("poisson events need stop_ms >= start_ms")
    rng = np.random.default_rng(seed)
    n = rng.poisson(rate_hz * (stop_ms - start_ms) / 1000.0)
    return explicit_events(np.sort(rng.uniform(start_ms, stop_ms, n)))
