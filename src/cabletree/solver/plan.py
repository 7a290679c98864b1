"""What the solver is asked to do: run settings, the step schedule and the state.

The schedule turns a cell's inputs into per-step arrays once, before the time
loop, so the backends (the numpy reference and the compiled kernel) share the
same input handling and differ only in how they step.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..cell import CellModel
from ..errors import SolverError

__all__ = ["METHODS", "RunSettings", "StepSchedule", "SolverState", "make_schedule",
           "check_threads", "is_uniform", "resting_state"]

#: Time-stepping methods.  ``backward_euler``: first order, L-stable.
#: ``crank_nicolson``: second order, gates staggered half a step from the voltage
#: (Hines 1984, Int J Biomed Comput 15:69-76), with Rannacher start-up smoothing
#: (two half-size backward-Euler steps at the start and after every input jump;
#: Rannacher 1984, Numer Math 43:309-327).
METHODS = ("backward_euler", "crank_nicolson")


@dataclass(frozen=True)
class RunSettings:
    """How long and how finely to integrate, and what to record.

    Parameters
    ----------
    t_stop_ms : float
        Duration of the run, ms.
    dt_ms : float
        Time step, ms.
    method : {"crank_nicolson", "backward_euler"}
        Time-stepping method (see :data:`METHODS`).
    record_interval_ms : float, optional
        Recording interval, ms, a multiple of ``dt_ms`` (default: every step).
    v_init_mV : float
        Initial membrane potential everywhere (gates start at their steady state),
        mV; ignored when an initial state is given.
    smoothing : bool
        Rannacher smoothing for Crank-Nicolson (on by default).
    max_abs_v_mV : float
        A potential beyond ± this value counts as runaway, mV.
    rate_table_step_mV : float, optional
        Opt-in: tabulate every gate's steady state and rate at this voltage
        spacing, mV, and interpolate them linearly during the run (see
        :mod:`cabletree.solver.tables`; faster, not exact).  ``None`` (default)
        evaluates the rate functions exactly.
    rate_table_range_mV : (float, float)
        Tabulated voltage range, mV; potentials outside it use the nearer end.
    """

    t_stop_ms: float
    dt_ms: float = 0.025
    method: str = "crank_nicolson"
    record_interval_ms: float | None = None
    v_init_mV: float = -65.0
    smoothing: bool = True
    max_abs_v_mV: float = 1000.0
    rate_table_step_mV: float | None = None
    rate_table_range_mV: tuple[float, float] = (-150.0, 100.0)

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise SolverError(f"unknown method {self.method!r}; expected one of {list(METHODS)}")
        if not (self.dt_ms > 0 and math.isfinite(self.dt_ms)):
            raise SolverError(f"dt_ms must be a positive number, got {self.dt_ms!r}")
        if not self.t_stop_ms > 0:
            raise SolverError(f"t_stop_ms must be > 0, got {self.t_stop_ms!r}")
        if self.record_interval_ms is not None:
            ratio = self.record_interval_ms / self.dt_ms
            if ratio < 1 - 1e-9 or abs(ratio - round(ratio)) > 1e-6:
                raise SolverError(
                    f"record_interval_ms ({self.record_interval_ms}) must be a whole multiple of "
                    f"dt_ms ({self.dt_ms})")
        lo, hi = (float(x) for x in self.rate_table_range_mV)
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise SolverError(f"rate_table_range_mV must be (low, high) with low < high, got "
                              f"{self.rate_table_range_mV!r}")
        h = self.rate_table_step_mV
        if h is not None and not (math.isfinite(h) and 0 < h <= (hi - lo) / 2):
            raise SolverError(f"rate_table_step_mV must be > 0 and at most half the tabulated "
                              f"range ({hi - lo:g} mV), got {h!r}")

    @property
    def n_steps(self) -> int:
        """Number of time steps."""
        return int(round(self.t_stop_ms / self.dt_ms))

    @property
    def record_every(self) -> int:
        """Steps between recordings."""
        if self.record_interval_ms is None:
            return 1
        return int(round(self.record_interval_ms / self.dt_ms))


@dataclass(frozen=True, eq=False)
class StepSchedule:
    """Per-step inputs, prepared once.

    Attributes
    ----------
    n_steps : int
    dt_ms : float
    t0_ms : float
        Time at the start of the run, ms.
    smoothing : ndarray of bool, shape (n_steps,)
        Steps done as two half-size backward-Euler steps.
    injection_compartment : ndarray of int64, shape (m,)
    injection_mid_nA, injection_end_nA : ndarray, shape (n_steps, m)
        Injected currents at the middle and the end of every step, nA.
    synapse_event_step : tuple of ndarray of int64
        Per synapse group, the step in which each event arrives
        (``t_n < t_event <= t_n+1``; events at or before ``t0`` go to step 0).
    synapse_event_offset_ms : tuple of ndarray
        Per group, ``t_n+1 - t_event`` for each event, ms.
    synapse_event_half : tuple of ndarray of bool
        Per group, whether the event falls in the first half of its step.
    record_every : int
    n_records : int
    """

    n_steps: int
    dt_ms: float
    t0_ms: float
    smoothing: np.ndarray
    injection_compartment: np.ndarray
    injection_mid_nA: np.ndarray
    injection_end_nA: np.ndarray
    synapse_event_step: tuple
    synapse_event_offset_ms: tuple
    synapse_event_half: tuple
    record_every: int
    n_records: int


def make_schedule(cell: CellModel, settings: RunSettings, t0_ms: float = 0.0,
                  smooth_first_step: bool = True) -> StepSchedule:
    """Prepare the per-step input arrays for a run starting at ``t0_ms``.

    Parameters
    ----------
    cell : CellModel
    settings : RunSettings
    t0_ms : float
        Start time, ms (non-zero when continuing from a saved state).
    smooth_first_step : bool
        Damp the first Crank-Nicolson step (a start or restart); False when the
        schedule continues a run seamlessly (a later chunk of one run).

    Returns
    -------
    StepSchedule
    """
    n = settings.n_steps
    dt = settings.dt_ms
    t_start = t0_ms + dt * np.arange(n)
    smoothing = np.zeros(n, dtype=bool)
    if settings.method == "crank_nicolson" and settings.smoothing and n:
        smoothing[0] = smooth_first_step
        for bp in cell.breakpoints_ms():
            k = (bp - t0_ms) / dt
            if k < -1e-9 or k >= n:
                continue
            kf = int(math.floor(k + 1e-9))
            smoothing[kf] = True
            if abs(k - round(k)) > 1e-9 and kf + 1 < n:  # jump inside a step: damp the next too
                smoothing[kf + 1] = True
    comp = np.array([inj.site.compartment for inj in cell.injections], dtype=np.int64)
    mid = np.zeros((n, len(comp)))
    end = np.zeros((n, len(comp)))
    for j, inj in enumerate(cell.injections):
        mid[:, j] = inj.waveform.current_nA(t_start + 0.5 * dt)
        end[:, j] = inj.waveform.current_nA(t_start + dt)
    steps, offsets, halves = [], [], []
    for group in cell.synapses:
        te = group.event_times_ms
        k = np.ceil((te - t0_ms) / dt - 1e-9).astype(np.int64) - 1
        k = np.maximum(k, 0)
        offset = np.maximum(t0_ms + (k + 1) * dt - te, 0.0)
        offset = np.minimum(offset, dt)
        keep = k < n
        steps.append(np.ascontiguousarray(k[keep]))
        offsets.append(np.ascontiguousarray(offset[keep]))
        halves.append(np.ascontiguousarray(offset[keep] >= 0.5 * dt))
    every = settings.record_every
    return StepSchedule(n, dt, float(t0_ms), smoothing, comp, mid, end, tuple(steps),
                        tuple(offsets), tuple(halves), every, n // every + 1)


@dataclass(frozen=True, eq=False)
class SolverState:
    """The full dynamical state of a cell, enough to continue a run exactly.

    Attributes
    ----------
    time_ms : float
        Time of the voltage, ms.
    v_mV : ndarray, shape (n_compartments,)
    gates : tuple of ndarray, each (n_gates, k)
        Gating variables per channel block.
    gate_lag_ms : float
        How far the gates lag behind the voltage in time (dt/2 after a staggered
        Crank-Nicolson step, 0 otherwise), ms.
    synapse_states : tuple of ndarray, each (2, s)
        The two linear state variables of every synapse group, nS.
    channel_names : tuple of str
        Channel of each gate array (checked on restore).
    """

    time_ms: float
    v_mV: np.ndarray
    gates: tuple
    gate_lag_ms: float
    synapse_states: tuple
    channel_names: tuple = field(default=())

    def save(self, path) -> None:
        """Write the state to a ``.npz`` file (atomically: temporary name, then rename)."""
        from ..fileio import write_atomically
        arrays = {"time_ms": np.array(self.time_ms), "v_mV": self.v_mV,
                  "gate_lag_ms": np.array(self.gate_lag_ms),
                  "channel_names": np.array(self.channel_names, dtype=str)}
        for i, g in enumerate(self.gates):
            arrays[f"gates_{i}"] = g
        for i, s in enumerate(self.synapse_states):
            arrays[f"synapses_{i}"] = s

        def write(tmp):
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays)

        write_atomically(path, write)

    @staticmethod
    def load(path) -> "SolverState":
        """Read a state written by :meth:`save`."""
        with np.load(path) as data:
            gates = tuple(data[f"gates_{i}"] for i in range(sum(k.startswith("gates_") for k in data)))
            syn = tuple(data[f"synapses_{i}"]
                        for i in range(sum(k.startswith("synapses_") for k in data)))
            return SolverState(float(data["time_ms"]), data["v_mV"].copy(), gates,
                               float(data["gate_lag_ms"]), syn,
                               tuple(str(x) for x in data["channel_names"]))


def resting_state(cell: CellModel, v_init_mV: float) -> SolverState:
    """Uniform potential with every gate at its steady state and no synaptic conductance."""
    n = cell.n_compartments
    gates = []
    for block in cell.channels:
        v = np.full(block.index.size, float(v_init_mV))
        ss = block.channel.steady_state(v, cell.celsius, block.parameter_tuple())
        gates.append(np.ascontiguousarray(np.array([np.broadcast_to(x, v.shape) for x in ss],
                                                   dtype=float).reshape(len(ss), v.size)))
    syn = tuple(np.zeros((2, g.compartment.size)) for g in cell.synapses)
    return SolverState(0.0, np.full(n, float(v_init_mV)), tuple(gates), 0.0, syn,
                       tuple(b.channel.name for b in cell.channels))


def is_uniform(values: np.ndarray) -> bool:
    """Whether every element of a per-compartment array equals the first.

    Both backends read such a parameter or reversal potential as one scalar (less
    memory traffic, the same numbers).  An empty array counts as uniform; NaN
    never does.

    Parameters
    ----------
    values : ndarray
        Values in any unit.

    Returns
    -------
    bool
    """
    return bool(values.size == 0 or np.all(values == values.flat[0]))


def check_threads(threads) -> int:
    """The number of threads asked for, as an int.

    Parameters
    ----------
    threads : int
        Threads for the compiled backend (dimensionless count).

    Returns
    -------
    int

    Raises
    ------
    SolverError
        Unless ``threads`` is a whole number >= 1 (a bool is refused).
    """
    if isinstance(threads, bool) or int(threads) != threads or threads < 1:
        raise SolverError(f"threads must be an integer >= 1, got {threads!r}")
    return int(threads)


def check_state(cell: CellModel, state: SolverState) -> None:
    """Raise SolverError if a state does not fit a cell."""
    if state.v_mV.shape != (cell.n_compartments,):
        raise SolverError(
            f"initial state has {state.v_mV.shape[0]} compartments; the cell has "
            f"{cell.n_compartments}")
    names = tuple(b.channel.name for b in cell.channels)
    if state.channel_names and tuple(state.channel_names) != names:
        raise SolverError(f"initial state holds channels {list(state.channel_names)}; the cell "
                          f"has {list(names)}")
    for b, g in zip(cell.channels, state.gates):
        if g.shape != (len(b.channel.gates), b.index.size):
            raise SolverError(f"initial state gates of {b.channel.name!r} have shape {g.shape}, "
                              f"expected {(len(b.channel.gates), b.index.size)}")
    for grp, s in zip(cell.synapses, state.synapse_states):
        if s.shape != (2, grp.compartment.size):
            raise SolverError(f"initial state of {grp.kinetics.name!r} synapses has shape "
                              f"{s.shape}, expected {(2, grp.compartment.size)}")
