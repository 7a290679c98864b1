"""Linear (passive) analysis of a cell model without time stepping.

The cell is linearised at a holding potential with every gate frozen at its
steady state there (chord conductances), giving the conductance matrix
``G = diag(g_membrane) + L_axial`` of the compartments.  Steady states are solved
in O(N) with the same tree elimination as the time stepper (Hines 1984); the
membrane time constant is the slowest mode of ``C dV/dt = -G V`` (Rall 1969,
Biophys J 9:1483-1508: the slowest equalising time constant).

These functions compute properties *of the model* directly.  Their namesakes in
:mod:`cabletree.analysis` (``input_resistance_MOhm``, ``membrane_time_constant_ms``)
measure the same quantities *from recorded traces*, as an experimenter would;
for a passive cell the two agree (tests/test_analysis.py checks it).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..cell import CellModel
from .plan import resting_state
from .reference import TreeMatrix

__all__ = ["membrane_conductance_uS", "conductance_matrix", "steady_state_mV",
           "input_resistance_MOhm", "transfer_resistance_MOhm", "membrane_time_constant_ms"]


def membrane_conductance_uS(cell: CellModel, holding_mV: float = -65.0):
    """Total membrane chord conductance and driving current at a holding potential.

    Parameters
    ----------
    cell : CellModel
    holding_mV : float
        Potential at which the gates are frozen at steady state, mV.

    Returns
    -------
    (g_uS, j_nA) : tuple of ndarray, shape (n_compartments,)
        Conductance and ``Σ g E`` of every compartment (µS, nA).
    """
    g = cell.leak_uS.copy()
    j = cell.leak_uS * cell.leak_reversal_mV
    state = resting_state(cell, holding_mV)
    for block, x in zip(cell.channels, state.gates):
        gb = block.gmax_uS * block.channel.open_fraction(x)
        g[block.index] += gb
        j[block.index] += gb * block.reversal_mV
    return g, j


def conductance_matrix(cell: CellModel, holding_mV: float = -65.0) -> sp.csr_matrix:
    """Sparse conductance matrix ``G`` (µS) of the linearised cell.

    ``G @ v`` is the net current (nA) leaving each compartment through its
    membrane (relative to 0 mV) and to its neighbours.
    """
    n = cell.n_compartments
    g_mem, _ = membrane_conductance_uS(cell, holding_mV)
    parent = cell.grid.parent
    ga = cell.axial_conductance_uS
    child = np.arange(1, n)
    rows = np.concatenate([child, parent[1:], child, parent[1:]])
    cols = np.concatenate([parent[1:], child, child, parent[1:]])
    vals = np.concatenate([-ga[1:], -ga[1:], ga[1:], ga[1:]])
    lap = sp.coo_matrix((vals, (rows, cols)), shape=(n, n))
    return (lap + sp.diags(g_mem)).tocsr()


def _tree_solve(cell: CellModel, g_mem: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    grid = cell.grid
    ga = cell.axial_conductance_uS
    diag = g_mem + cell.axial_diagonal_uS
    return TreeMatrix(grid.parent, grid.level_bounds()).solve(diag, -ga, rhs)


def steady_state_mV(cell: CellModel, injected_nA=None, holding_mV: float = -65.0) -> np.ndarray:
    """Steady-state potential of the linearised cell with constant injected currents.

    Parameters
    ----------
    cell : CellModel
    injected_nA : ndarray, shape (n_compartments,), optional
        Current injected into each compartment, nA.
    holding_mV : float
        Potential at which gates are frozen, mV.

    Returns
    -------
    ndarray, shape (n_compartments,)
        Potential, mV.
    """
    g_mem, j = membrane_conductance_uS(cell, holding_mV)
    rhs = j.copy()
    if injected_nA is not None:
        rhs = rhs + np.asarray(injected_nA, dtype=float)
    return _tree_solve(cell, g_mem, rhs)


def transfer_resistance_MOhm(cell: CellModel, inject_compartment: int, record_compartment: int,
                             holding_mV: float = -65.0) -> float:
    """Steady-state transfer resistance between two compartments, MΩ (mV/nA).

    Parameters
    ----------
    cell : CellModel
    inject_compartment, record_compartment : int
    holding_mV : float

    Returns
    -------
    float
    """
    g_mem, _ = membrane_conductance_uS(cell, holding_mV)
    rhs = np.zeros(cell.n_compartments)
    rhs[inject_compartment] = 1.0
    return float(_tree_solve(cell, g_mem, rhs)[record_compartment])


def input_resistance_MOhm(cell: CellModel, compartment: int = 0, holding_mV: float = -65.0) -> float:
    """Steady-state input resistance at a compartment, MΩ.

    Examples
    --------
    A sealed cable one length constant long (d = 2 µm, Rm = 20 kΩ·cm², Ri =
    150 Ω·cm, λ = 816.5 µm) has R_in = R∞ coth 1 = 511.88 MΩ (Rall; Jack, Noble &
    Tsien 1975):

    >>> from cabletree.cell import Membrane, build_cell
    >>> from cabletree.grid import SpacingRule
    >>> from cabletree.morphology import synthetic
    >>> cell = build_cell(synthetic.cylinder(816.4966, 2.0, n_samples=2),
    ...                   membrane=Membrane(leak_S_per_cm2=1 / 20_000, axial_resistivity_ohm_cm=150.0),
    ...                   spacing=SpacingRule(max_length_um=8.2, lambda_fraction=None))
    >>> round(input_resistance_MOhm(cell), 1)
    511.9
    """
    return transfer_resistance_MOhm(cell, compartment, compartment, holding_mV)


def membrane_time_constant_ms(cell: CellModel, holding_mV: float = -65.0) -> float:
    """Slowest time constant of the linearised cell, ms.

    The largest ``τ`` with ``G v = (1/τ) C v`` (C the compartment capacitances),
    found with ARPACK in shift-invert mode on the symmetric form
    ``C^-1/2 G C^-1/2``.
    """
    G = conductance_matrix(cell, holding_mV)
    s = 1.0 / np.sqrt(cell.capacitance_nF)
    A = sp.diags(s) @ G @ sp.diags(s)
    n = A.shape[0]
    if n <= 3:
        lam = np.linalg.eigvalsh(A.toarray()).min()
    else:
        lam = spla.eigsh(A.tocsc(), k=1, sigma=0.0, which="LM", return_eigenvectors=False)[0]
    return float(1.0 / lam)
