"""Opt-in tabulated rates: gate steady states and rates on a voltage grid.

Both backends spend most of an active step in the exponentials of the channels'
rate functions (three per gate for the Hodgkin-Huxley gates).  With
``RunSettings(rate_table_step_mV=h)`` every gate's steady state x∞(V) and rate
r(V) (α + β for a gate given by rates, 1/τ for one given by x∞ and τ; before
temperature scaling) are evaluated once on a voltage grid of spacing ``h`` over
``RunSettings.rate_table_range_mV`` and linearly interpolated during the run.
Only the Rush-Larsen factor ``exp(-dt φ r)`` is still computed per compartment,
so the gate update is the same formula with interpolated x∞ and r.

Accuracy: linear interpolation of a function with a bounded second derivative
errs by at most ``h² max|f''| / 8`` between grid points and is exact at them
(Burden & Faires, Numerical Analysis, 9th ed. 2011, Theorem 3.3); halving ``h``
quarters the error.  ``benchmarks/run.py`` reports the effect on potentials and
spike times against exact rates.  Potentials outside the range use the value at
its nearer end (a NaN potential uses the lower end; it stops the run anyway).

A channel block whose parameters vary over the tree (a profile on a rate
parameter) cannot share one table; it keeps exact rates, and
:func:`rate_tables` returns ``None`` for it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..cell import CellModel, ChannelBlock
from ..errors import SolverError

__all__ = ["RateTable", "tabulate_block", "rate_tables", "tables_for_settings", "interpolate"]


@dataclass(frozen=True, eq=False)
class RateTable:
    """Steady states and rates of one channel block's gates on a voltage grid.

    Attributes
    ----------
    v_min_mV : float
        First grid voltage, mV.
    step_mV : float
        Grid spacing, mV.
    values : ndarray, shape (n_gates, n_points, 2)
        ``values[j, i] = (x∞, r)`` of gate ``j`` at ``v_min_mV + i * step_mV``;
        r in 1/ms before temperature scaling.
    """

    v_min_mV: float
    step_mV: float
    values: np.ndarray

    @property
    def n_points(self) -> int:
        """Number of grid voltages."""
        return int(self.values.shape[1])

    def lookup_constants(self) -> np.ndarray:
        """``[v_min_mV, 1 / step_mV, n_points - 1, n_points - 2]``, as the kernels use them."""
        return np.array([self.v_min_mV, 1.0 / self.step_mV, self.n_points - 1.0,
                         self.n_points - 2.0])


def _uniform_parameters(block: ChannelBlock) -> bool:
    par = block.parameters
    return par.shape[0] == 0 or par.shape[1] == 0 or bool(np.all(par == par[:, :1]))


def _fill(values: np.ndarray, channel, v: np.ndarray, celsius: float, p) -> None:
    """``values[j, :] = (x∞, r)`` of every gate of ``channel`` at voltages ``v``."""
    for j, gate in enumerate(channel.gates):
        if gate.uses_rates:
            a = gate.alpha(v, celsius, p)
            s = a + gate.beta(v, celsius, p)
            values[j, :, 0] = a / s
            values[j, :, 1] = s
        else:
            values[j, :, 0] = gate.steady_state(v, celsius, p)
            values[j, :, 1] = 1.0 / gate.tau_ms(v, celsius, p)


def tabulate_block(block: ChannelBlock, celsius: float, step_mV: float,
                   range_mV: tuple[float, float]) -> RateTable | None:
    """Tabulate the gates of one channel block, or ``None`` if its parameters vary.

    Parameters
    ----------
    block : ChannelBlock
    celsius : float
        Temperature of the cell, °C (rate functions may depend on it).
    step_mV : float
        Grid spacing, mV.
    range_mV : (float, float)
        Lowest and highest tabulated voltage, mV.

    Returns
    -------
    RateTable or None

    Raises
    ------
    SolverError
        When a rate function is not finite (or a time constant not positive)
        somewhere on the grid; the message names the gate and the voltage.
    """
    if not _uniform_parameters(block):
        return None
    lo, hi = float(range_mV[0]), float(range_mV[1])
    n = int(np.floor((hi - lo) / step_mV + 1e-9)) + 1
    v = lo + step_mV * np.arange(n)
    ch = block.channel
    p = ch.parameter_tuple(*(float(x) for x in block.parameters[:, 0])) if block.parameters.size \
        else ch.make_parameters()
    values = np.empty((len(ch.gates), n, 2))
    with np.errstate(all="ignore"):  # checked below, with the voltage named
        _fill(values, ch, v, celsius, p)
    for j, gate in enumerate(ch.gates):
        bad = ~(np.isfinite(values[j]).all(axis=1) & (values[j, :, 1] > 0))
        if bad.any():
            raise SolverError(
                f"channel {ch.name!r} gate {gate.name!r}: steady state or rate is not finite and "
                f"positive at {v[np.argmax(bad)]:.6g} mV, inside the tabulated range "
                f"[{lo:g}, {hi:g}] mV; narrow rate_table_range_mV or use exact rates")
    return RateTable(lo, float(step_mV), values)


def rate_tables(cell: CellModel, step_mV: float,
                range_mV: tuple[float, float]) -> tuple[RateTable | None, ...]:
    """:func:`tabulate_block` for every channel block of a cell (``None`` where exact)."""
    return tuple(tabulate_block(b, cell.celsius, step_mV, range_mV) for b in cell.channels)


def tables_for_settings(cell: CellModel, settings, cache: dict) -> tuple[RateTable | None, ...]:
    """The rate tables ``settings`` ask for, one per channel block, kept in ``cache``.

    Parameters
    ----------
    cell : CellModel
    settings : RunSettings
        ``rate_table_step_mV`` None means exact rates (every entry ``None``).
    cache : dict
        The caller's memo, keyed by spacing and range.
    """
    if settings.rate_table_step_mV is None:
        return (None,) * len(cell.channels)
    key = (settings.rate_table_step_mV, tuple(settings.rate_table_range_mV))
    if key not in cache:
        cache[key] = rate_tables(cell, *key)
    return cache[key]


def interpolate(table: RateTable, v_mV: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Steady states and rates of every gate at ``v_mV`` by linear interpolation.

    Parameters
    ----------
    table : RateTable
    v_mV : ndarray, shape (k,)
        Membrane potentials, mV.

    Returns
    -------
    (inf, rate) : (ndarray of shape (n_gates, k), ndarray of shape (n_gates, k))
        Dimensionless steady states and rates in 1/ms (before temperature scaling).
    """
    v0, inv_h, top, last = table.lookup_constants()
    u = (np.asarray(v_mV, dtype=float) - v0) * inv_h
    u = np.where(u >= 0.0, u, 0.0)  # also NaN -> 0, like the compiled kernel
    u = np.minimum(u, top)
    i = np.minimum(u.astype(np.int64), int(last))
    f = u - i
    steady, rate = table.values[:, :, 0], table.values[:, :, 1]
    s0, s1 = np.take(steady, i, axis=1), np.take(steady, i + 1, axis=1)
    r0, r1 = np.take(rate, i, axis=1), np.take(rate, i + 1, axis=1)
    return s0 + f * (s1 - s0), r0 + f * (r1 - r0)
