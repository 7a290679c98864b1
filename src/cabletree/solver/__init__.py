"""The implicit tree solver.

:func:`simulate` integrates a :class:`~cabletree.cell.CellModel` and returns the
recorded potentials and the final state.  Backends share the step schedule
(:mod:`cabletree.solver.plan`) and differ only in how they step:

- ``"reference"``: numpy, vectorised over compartments (:mod:`.reference`);
- ``"compiled"``: the numba kernel (:mod:`.compiled`), when available;
- ``"auto"``: the compiled kernel if numba imports, else the reference.
"""

from __future__ import annotations

import time as _time
from dataclasses import dataclass

import numpy as np

from ..cell import CellModel
from ..errors import SolverError
from .plan import (METHODS, RunSettings, SolverState, check_state, check_threads, make_schedule,
                   resting_state)

__all__ = ["simulate", "RunOutput", "RunSettings", "SolverState", "METHODS", "BACKENDS",
           "resting_state", "available_backends"]

BACKENDS = ("auto", "reference", "compiled")


@dataclass(frozen=True, eq=False)
class RunOutput:
    """What a run produced.

    Attributes
    ----------
    time_ms : ndarray, shape (n_records,)
    v_mV : ndarray, shape (n_records, n_sites)
        Membrane potential at the recording sites.
    sites : tuple of Site
    final_state : SolverState
    settings : RunSettings
    backend : str
        Backend that ran.
    wall_time_s : float
        Time spent stepping, s.
    """

    time_ms: np.ndarray
    v_mV: np.ndarray
    sites: tuple
    final_state: SolverState
    settings: RunSettings
    backend: str
    wall_time_s: float


def available_backends() -> tuple[str, ...]:
    """Backends usable on this machine."""
    out = ["reference"]
    try:
        from .compiled import CompiledStepper  # noqa: F401
        out.append("compiled")
    except ImportError:
        pass
    return tuple(out)


def _stepper(cell: CellModel, backend: str, threads: int = 1):
    if backend not in BACKENDS:
        raise SolverError(f"unknown backend {backend!r}; expected one of {list(BACKENDS)}")
    threads = check_threads(threads)
    if backend == "auto":
        backend = "compiled" if "compiled" in available_backends() else "reference"
    if backend == "compiled":
        try:
            from .compiled import CompiledStepper
        except ImportError as exc:
            raise SolverError(f"the compiled backend is not available here ({exc}); use "
                              "backend='reference'") from exc
        return CompiledStepper(cell, threads=threads), backend
    from .reference import ReferenceStepper
    return ReferenceStepper(cell), backend


def simulate(cell: CellModel, settings: RunSettings, *, initial_state: SolverState | None = None,
             backend: str = "auto", progress=None, progress_chunks: int = 20,
             threads: int = 1) -> RunOutput:
    """Integrate a cell model in time.

    Parameters
    ----------
    cell : CellModel
        The assembled cell, with its inputs and recording sites.
    settings : RunSettings
        Duration, time step, method and recording interval.
    initial_state : SolverState, optional
        Continue from this state (e.g. a saved steady state); by default the run
        starts at ``settings.v_init_mV`` with gates at steady state at t = 0.
    backend : {"auto", "reference", "compiled"}
        Which implementation steps the equations (they agree to round-off).
    progress : callable, optional
        Called as ``progress(fraction_done, time_ms)``: once with 0 when the
        backend is ready (the first run of a new channel set compiles its
        kernel first), then after each of ``progress_chunks`` pieces of the run.
        The run is then integrated piece by piece, continuing the exact state,
        so the result is unchanged.
    progress_chunks : int
        Number of pieces when ``progress`` is given.
    threads : int
        Threads for the compiled backend (>= 1; each updates and solves its own
        part of the tree, used where it pays off, see
        :class:`cabletree.solver.compiled.CompiledStepper`).  The reference
        backend always runs serially.  Leave
        it at 1 for sweeps, which run many cells in parallel instead.

    Returns
    -------
    RunOutput

    Raises
    ------
    NumericalInstabilityError
        When the potential becomes NaN or leaves ±``settings.max_abs_v_mV``; the
        message names the time and the compartment.

    Examples
    --------
    A Hodgkin-Huxley soma fires when a 10 µA/cm² step is injected:

    >>> from cabletree.cell import CurrentInjection, Membrane, build_cell
    >>> from cabletree.channels import hh_potassium, hh_sodium
    >>> from cabletree.inputs import StepCurrent
    >>> from cabletree.morphology import synthetic
    >>> from cabletree.profiles import ChannelPlacement
    >>> from cabletree.sites import Site
    >>> cell = build_cell(synthetic.ball_and_stick(20.0, 50.0, 2.0),
    ...                   membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-54.387),
    ...                   channels=[ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036)],
    ...                   injections=[CurrentInjection(Site("soma", 0), StepCurrent(0.2, 1.0, 10.0))])
    >>> out = simulate(cell, RunSettings(t_stop_ms=10.0, dt_ms=0.025), backend="reference")
    >>> bool(out.v_mV[:, 0].max() > 20.0)
    True
    """
    from dataclasses import replace

    state = initial_state if initial_state is not None else resting_state(cell, settings.v_init_mV)
    check_state(cell, state)
    stepper, used = _stepper(cell, backend, threads)
    record_index = np.array([s.compartment for s in cell.recording_sites], dtype=np.int64)
    every = settings.record_every
    n_records_total = settings.n_steps // every
    if progress is None or n_records_total < 2:
        pieces = [n_records_total]
    else:
        k = max(1, min(int(progress_chunks), n_records_total))
        pieces = [len(c) for c in np.array_split(np.arange(n_records_total), k)]
    start = _time.perf_counter()
    stepper.prepare(settings)
    if progress is not None:
        progress(0.0, float(state.time_ms))
    chunks = []
    t0 = state.time_ms
    done = 0
    for j, n_rec in enumerate(pieces):
        n_steps = n_rec * every if j < len(pieces) - 1 else settings.n_steps - done
        if n_steps <= 0:
            continue
        piece = replace(settings, t_stop_ms=n_steps * settings.dt_ms)
        sched = make_schedule(cell, piece, t0_ms=state.time_ms, smooth_first_step=(j == 0))
        records, state = stepper.run(piece, sched, state, record_index)
        chunks.append(records if j == 0 else records[1:])
        done += n_steps
        if progress is not None:
            progress(done / settings.n_steps, float(state.time_ms))
    wall = _time.perf_counter() - start
    records = np.concatenate(chunks, axis=0)
    times = t0 + settings.dt_ms * every * np.arange(records.shape[0])
    return RunOutput(times, records, tuple(cell.recording_sites), state, settings, used, wall)
