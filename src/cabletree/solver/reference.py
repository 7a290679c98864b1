"""The numpy reference backend: clear, vectorised, no compiler needed.

Every step is vectorised over compartments; the only Python loops run over
channel blocks (in chunks of at most :data:`GATE_CHUNK` compartments), gates and
levels of the tree, never over single compartments.  The tree system is solved
exactly in O(N):

- :class:`TreeMatrix`: Gaussian elimination from the leaves to the root and
  back-substitution (Hines 1984, Int J Biomed Comput 15:69-76), one depth level
  at a time.  Simple, but a Python-level loop over every depth level: slow for
  deep trees (a 1000-compartment cable has 1000 levels).
- :class:`HeavyPathSolver` (used by :class:`ReferenceStepper`): the same
  elimination done path by path.  Heavy-path decomposition (Sleator & Tarjan
  1983, J Comput Syst Sci 26:362-391) cuts the tree into unbranched paths in at
  most ``log2(N) + 1`` levels; the paths of one level form one block-diagonal
  symmetric positive-definite tridiagonal system, factored ``L D Lᵀ`` by one
  LAPACK ``dpttrf`` call.  Forward substitution (BLAS ``dtbsv``, one call per
  level) gives each path's head, which is then eliminated into the compartment
  it hangs from, one level up (block elimination, Golub & Van Loan, Matrix
  Computations, 4th ed. 2013, §3.2.11); back-substitution runs from the root
  down, with each head's term updated.  A step costs one ``dpttrf``, one
  forward and one backward substitution over the compartments plus a few
  vector operations per level; the factorisation is kept while the diagonal is
  unchanged (a passive cell at a fixed step), so such a step costs the two
  substitutions only.  Same answer as :class:`TreeMatrix` to round-off.

:class:`ReferenceStepper` keeps every per-compartment array of a step in the
tree solver's path order, so the solve needs no permutation; states are
converted from and back to compartment order (and each channel block's entry
order) at the start and end of a run.  The work arrays of a step (diagonal,
right-hand sides) are kept on the stepper and gate states are updated in place;
channels, synapses and injections add their conductances and currents straight
into the diagonal and right-hand side of the tree system.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from ..cell import CellModel
from ..errors import NumericalInstabilityError
from ..inputs import double_exponential_peak, mg_block
from .plan import RunSettings, SolverState, StepSchedule, is_uniform
from .tables import interpolate, tables_for_settings

__all__ = ["TreeMatrix", "HeavyPathSolver", "ReferenceStepper"]


class TreeMatrix:
    """Symmetric tree matrix ``A = diag(d) + offdiag`` with ``A[i, parent[i]] = b[i]``.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent index, ``parent[i] < i``, -1 for the root; stored by depth.
    level_bounds : ndarray of int64
        Start of each depth level (see :meth:`cabletree.grid.Grid.level_bounds`).

    Notes
    -----
    :meth:`factor` eliminates the diagonal from the leaves to the root once;
    :meth:`solve_factored` then needs only the right-hand side, so a matrix whose
    diagonal does not change is factored once for many solves.
    """

    def __init__(self, parent: np.ndarray, level_bounds: np.ndarray):
        self.parent = parent
        self.bounds = level_bounds
        self.levels = []
        for lev in range(1, len(level_bounds) - 1):
            s, e = int(level_bounds[lev]), int(level_bounds[lev + 1])
            ps, pe = int(level_bounds[lev - 1]), int(level_bounds[lev])
            self.levels.append((s, e, ps, pe, parent[s:e] - ps))

    def factor(self, d: np.ndarray, b: np.ndarray):
        """Eliminate the diagonal from the leaves to the root.

        Parameters
        ----------
        d : ndarray, shape (n,)
            Diagonal.
        b : ndarray, shape (n,)
            Coupling of each compartment to its parent (``b[0]`` unused).

        Returns
        -------
        (d_eliminated, multipliers) : (ndarray of shape (n,), list of ndarray)
            The eliminated diagonal and, per level (deepest first), ``b / d``.
        """
        d = d.copy()
        multipliers = []
        for s, e, ps, pe, local in reversed(self.levels):
            f = b[s:e] / d[s:e]
            d[ps:pe] -= np.bincount(local, f * b[s:e], minlength=pe - ps)
            multipliers.append(f)
        return d, multipliers

    def solve_factored(self, factors, b: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Solve ``A x = r`` with the result of :meth:`factor`.

        Parameters
        ----------
        factors : tuple
            What :meth:`factor` returned for this matrix.
        b : ndarray, shape (n,)
            Coupling given to :meth:`factor`.
        r : ndarray, shape (n,)
            Right-hand side (not modified).

        Returns
        -------
        ndarray, shape (n,)
        """
        d, multipliers = factors
        r = r.copy()
        for (s, e, ps, pe, local), f in zip(reversed(self.levels), multipliers):
            r[ps:pe] -= np.bincount(local, f * r[s:e], minlength=pe - ps)
        x = np.empty_like(r)
        x[0] = r[0] / d[0]
        parent = self.parent
        for s, e, _, _, _ in self.levels:
            x[s:e] = (r[s:e] - b[s:e] * x[parent[s:e]]) / d[s:e]
        return x

    def solve(self, d: np.ndarray, b: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Solve ``A x = r``: :meth:`factor`, then :meth:`solve_factored` (inputs unchanged).

        Parameters
        ----------
        d, b : ndarray, shape (n,)
            Diagonal and coupling to the parent, as for :meth:`factor`.
        r : ndarray, shape (n,)
            Right-hand side.

        Returns
        -------
        ndarray, shape (n,)
        """
        return self.solve_factored(self.factor(d, b), b, r)


class _PathLevel(NamedTuple):
    """The paths of one level of a :class:`HeavyPathSolver`, in path-ordered positions."""

    start: int                 # first position of the level's paths
    stop: int                  # one past the last
    head: np.ndarray           # position of each path's head (its last position)
    attach: np.ndarray         # position of the compartment each head hangs from (empty at level 0)
    beta: np.ndarray           # coupling of each head to its attachment point
    beta2: np.ndarray          # beta squared
    distinct: bool             # no two heads of the level hang from the same compartment
    pivots: np.ndarray         # the level's part of the solver's pivots (a view)
    multipliers: np.ndarray    # ... of L's subdiagonal (a view, stop - start - 1 entries)
    band: np.ndarray           # ... of L in banded storage (a view, 2 × (stop - start))
    beta_over_pivot: np.ndarray  # beta / D_head, set by the factorisation


def _heavy_paths(parent: np.ndarray):
    """Heavy-path decomposition of a tree (Sleator & Tarjan 1983, J Comput Syst Sci 26:362-391).

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent index, ``parent[i] < i``, -1 for the root.

    Returns
    -------
    (order, path_level, path_start) : (ndarray of int64, ndarray of int64, ndarray of int64)
        ``order[k]`` is the compartment at position ``k``: paths one after the
        other, sorted by level (the root's path first), each from its far end to
        its head.  ``path_level[j]`` is the level of path ``j`` and
        ``path_start`` the first position of each path followed by ``n``.
    """
    par = parent.tolist()
    n = len(par)
    size = [1] * n
    for i in range(n - 1, 0, -1):
        size[par[i]] += size[i]
    heavy = [-1] * n
    best = [0] * n
    for i in range(1, n):  # ties go to the first child
        p = par[i]
        if size[i] > best[p]:
            best[p] = size[i]
            heavy[p] = i
    level = [0] * n
    for i in range(1, n):
        p = par[i]
        level[i] = level[p] + (heavy[p] != i)
    heads = sorted((i for i in range(n) if i == 0 or heavy[par[i]] != i),
                   key=lambda i: (level[i], i))
    order, starts = [], []
    for h in heads:
        path = [h]
        while heavy[path[-1]] >= 0:
            path.append(heavy[path[-1]])
        starts.append(len(order))
        order.extend(reversed(path))
    return (np.asarray(order, dtype=np.int64), np.asarray([level[h] for h in heads], np.int64),
            np.asarray(starts + [n], dtype=np.int64))


class HeavyPathSolver:
    """Solve the tree system path by path: tridiagonal LAPACK/BLAS sweeps, one level at a time.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent index, ``parent[i] < i``, -1 for the root.
    offdiag : ndarray, shape (n,)
        Coupling of each compartment to its parent (``offdiag[0]`` unused); fixed
        for the solver's lifetime (the axial conductances do not change in time).

    Notes
    -----
    The tree is cut into paths by heavy-path decomposition (Sleator & Tarjan
    1983, J Comput Syst Sci 26:362-391): a compartment continues its parent's
    path if it heads the largest subtree among its siblings and starts a new
    path otherwise.  The level of a path is the number of paths begun on the
    way down from the root, at most ``log2(n)``.  Each path is stored from its
    far end to its head and all paths of one level lie side by side, one
    block-diagonal symmetric positive-definite tridiagonal system.

    Leaf-to-root elimination (Hines 1984, Int J Biomed Comput 15:69-76) runs
    one level at a time, deepest first: LAPACK ``dpttrf`` factors the level's
    paths (``L D Lᵀ``, ending at each head), and each head is eliminated into
    the compartment ``P`` it hangs from, in the level above (block elimination,
    Golub & Van Loan, Matrix Computations, 4th ed. 2013, §3.2.11): with ``β``
    the head's coupling to ``P`` and ``D`` the head's last pivot,
    ``(A_path⁻¹)_{head,head} = 1/D``, so ``d_P -= β²/D`` and
    ``r_P -= β z_head`` with ``z = A_path⁻¹ r_path``.  Because the head is the
    last position of its path, ``z_head`` is the last entry of ``D⁻¹ L⁻¹ r``:
    the upward sweep needs only the forward substitution (BLAS ``dtbsv`` on
    ``L`` in banded storage, one call per level).  Back-substitution runs from
    the root level down: once ``x_P`` is known, the head's right-hand side
    becomes ``r_head - β x_P``, which changes only the head's entry of
    ``D⁻¹ L⁻¹ r``, by ``-(β/D) x_P``; one backward substitution with ``Lᵀ``
    then gives the path exactly.  A step costs one ``dpttrf``, one forward and
    one backward substitution over the compartments plus a few vector
    operations per level.

    The factors depend on the diagonal only: :meth:`factor` computes them and
    :meth:`solve` reuses them while the diagonal stays the same (a passive cell
    at a fixed step), so such a solve costs the two substitutions only.
    :meth:`solve_in_path_order` and :meth:`factor_in_path_order` do the same for
    arrays already in path order (``x_path[k] = x[order[k]]``), without the two
    permutations.
    """

    def __init__(self, parent: np.ndarray, offdiag: np.ndarray):
        from scipy.linalg import blas, lapack
        self._dpttrf, self._dtbsv = lapack.dpttrf, blas.dtbsv
        parent = np.asarray(parent, dtype=np.int64)
        b = np.asarray(offdiag, dtype=float)
        n = parent.size
        self.n = n
        order, path_level, path_start = _heavy_paths(parent)
        self.order = order
        position = np.empty(n, dtype=np.int64)
        position[order] = np.arange(n)
        self.position = position
        # coupling of position k to position k + 1: its parent on the same path, else 0
        nxt = order[1:]
        self.e = np.where(parent[order[:-1]] == nxt, b[order[:-1]], 0.0)
        self._pivots = np.empty(n)           # D of L D L^T, path order
        self._multipliers = np.empty(n - 1)  # L's subdiagonal, path order
        # L in the banded storage of BLAS dtbsv (Fortran order, 2 × n): row 1 holds
        # L's subdiagonal, row 0 (the unit diagonal) is never read
        self._band = np.zeros((n, 2)).T
        self._r = np.empty(n)                # right-hand side, then solution, path order
        self._factored_d = None
        self.levels = []
        bounds = np.searchsorted(path_level, np.arange(int(path_level[-1]) + 2))
        for lev in range(int(path_level[-1]) + 1):
            p0, p1 = int(bounds[lev]), int(bounds[lev + 1])
            s, e = int(path_start[p0]), int(path_start[p1])
            head = path_start[p0 + 1:p1 + 1] - 1
            node = order[head]
            attach = position[parent[node]] if lev else head[:0]
            beta = b[node] if lev else np.zeros(0)
            self.levels.append(_PathLevel(s, e, head, attach, beta, beta * beta,
                                          np.unique(attach).size == attach.size,
                                          self._pivots[s:e], self._multipliers[s:e - 1],
                                          self._band[:, s:e], np.empty(head.size)))

    def factor(self, d: np.ndarray) -> None:
        """Factor every path level and eliminate the heads for diagonal ``d``.

        Parameters
        ----------
        d : ndarray, shape (n,)
            Diagonal, µS (any consistent unit), in compartment order.

        Raises
        ------
        NumericalInstabilityError
            If a path system is not positive definite.
        """
        self.factor_in_path_order(d[self.order])

    def factor_in_path_order(self, d_path: np.ndarray) -> None:
        """:meth:`factor` for a diagonal already in path order (``d_path[k] = d[order[k]]``).

        Parameters
        ----------
        d_path : ndarray, shape (n,)
            Diagonal, µS (any consistent unit), in path order.

        Raises
        ------
        NumericalInstabilityError
            If a path system is not positive definite.
        """
        piv, mult, dpttrf = self._pivots, self._multipliers, self._dpttrf
        np.copyto(piv, d_path)
        np.copyto(mult, self.e)
        for lev in reversed(self.levels):
            s, e = lev.start, lev.stop
            if e - s > 1:
                info = dpttrf(lev.pivots, lev.multipliers, 1, 1)[2]  # overwrite both
            else:  # LAPACK's wrapper cannot take the empty off-diagonal of a 1×1 system
                info = 0 if piv[s] > 0 else 1
            if info != 0:
                raise NumericalInstabilityError(
                    f"a path of the tree system is not positive definite (LAPACK dpttrf "
                    f"info={info}); the membrane or axial conductances are not physical",
                    time_ms=float("nan"), compartment=int(self.order[s + min(abs(info), e - s) - 1]))
            if lev.attach.size:
                head_pivot = piv[lev.head]
                np.divide(lev.beta, head_pivot, out=lev.beta_over_pivot)
                update = np.divide(lev.beta2, head_pivot, out=head_pivot)
                if lev.distinct:
                    piv[lev.attach] -= update
                else:
                    np.subtract.at(piv, lev.attach, update)
        np.copyto(self._band[1, :-1], mult)
        if self._factored_d is None:
            self._factored_d = np.empty(self.n)
        np.copyto(self._factored_d, d_path)

    def solve(self, d: np.ndarray, b: np.ndarray, r: np.ndarray,
              out: np.ndarray | None = None) -> np.ndarray:
        """Solve ``A x = r``: arguments and result as in :meth:`TreeMatrix.solve`.

        ``b`` must be the coupling given at construction; the factorisation of
        the last call is reused when ``d`` is unchanged.  ``out``, if given, is
        an array of shape (n,) that receives ``x`` (and is returned).
        """
        rw = np.take(r, self.order, out=self._r, mode="clip")  # clip: no buffering
        self.solve_in_path_order(d[self.order], rw)
        if out is None:
            out = np.empty(self.n)
        return np.take(rw, self.position, out=out, mode="clip")

    def solve_in_path_order(self, d_path: np.ndarray, r_path: np.ndarray) -> np.ndarray:
        """Overwrite ``r_path`` with the solution ``x`` of ``A x = r``, both in path order.

        Parameters
        ----------
        d_path : ndarray, shape (n,)
            Diagonal in path order (``d_path[k] = d[order[k]]``), µS; the
            factorisation of the last call is reused when it is unchanged.
        r_path : ndarray, shape (n,)
            Right-hand side in path order, nA; overwritten.

        Returns
        -------
        ndarray, shape (n,)
            ``r_path``, now holding ``x`` in path order (mV for µS and nA).

        Notes
        -----
        With ``A_path = L D Lᵀ`` and each head the last position of its path,
        the upward sweep leaves ``u = D⁻¹ L⁻¹ r`` on each level, whose head entry
        is ``z_head``; changing ``r_head`` by ``-β x_P`` changes only ``u_head``,
        by ``-(β/D_head) x_P``, so the downward sweep finishes with ``x = L⁻ᵀ u``.
        Each substitution is one BLAS ``dtbsv`` call per level: one forward and
        one backward substitution over the compartments in all.
        """
        fd = self._factored_d
        if fd is None or d_path[0] != fd[0] or not np.array_equal(d_path, fd):
            self.factor_in_path_order(d_path)
        rw, tbsv = r_path, self._dtbsv
        # dtbsv(k, a, x, incx, offx, lower, trans, diag, overwrite_x): k = 1 band,
        # lower, unit diagonal, in place
        for lev in reversed(self.levels):  # forward substitution, heads eliminated upwards
            s, e = lev.start, lev.stop
            rhs = rw[s:e]
            if e - s > 1:  # rhs <- D⁻¹ L⁻¹ rhs on the level's paths
                tbsv(1, lev.band, rhs, 1, 0, 1, 0, 1, 1)
            rhs /= lev.pivots
            if lev.attach.size:
                update = lev.beta * rw[lev.head]  # β z_head
                if lev.distinct:
                    rw[lev.attach] -= update
                else:
                    np.subtract.at(rw, lev.attach, update)
        for lev in self.levels:  # back-substitution downwards
            s, e = lev.start, lev.stop
            if lev.attach.size:  # the head's term of D⁻¹ L⁻¹ r, with x_P now known
                rw[lev.head] -= lev.beta_over_pivot * rw[lev.attach]
            if e - s > 1:  # rw <- L⁻ᵀ rw
                tbsv(1, lev.band, rw[s:e], 1, 0, 1, 1, 1, 1)
        return rw


#: Most compartments whose gates are updated by one round of vector operations: the
#: temporaries of a rate function then stay small (80 kB) and hot in cache and are
#: recycled by the allocator, instead of each being a fresh memory mapping.
GATE_CHUNK = 10240


def _block_selector(index: np.ndarray):
    """A slice for a contiguous run of compartment indices (views, not copies), else the index."""
    if index.size and index[-1] - index[0] + 1 == index.size and np.all(np.diff(index) == 1):
        return slice(int(index[0]), int(index[-1]) + 1)
    return index


class _GateChunk(NamedTuple):
    """Up to :data:`GATE_CHUNK` entries of one channel block, updated together."""

    entries: slice       # the entries of the block (columns of its gate states)
    where: object        # their compartments' positions: a slice where contiguous, else an index
    p: tuple             # rate-function parameters of these entries
    gmax_uS: np.ndarray
    reversal_mV: object  # mV: one float where all entries share it, else an array
    span: object         # a _Span for compartments with few gaps, else None


class _Span(NamedTuple):
    """The compartments ``start:stop`` around an index chunk with few gaps.

    The chunk's conductances are scattered into ``buffer`` (zero in the gaps, and
    kept so: only the chunk's own places are ever written, and ``0 E = 0``) and
    added to the whole run of the diagonal and right-hand side with two slice
    additions instead of two unbuffered ``np.add.at``; adding zero leaves the
    gaps' sums unchanged.
    """

    start: int
    stop: int
    local: np.ndarray       # the chunk's places in the span (where - start)
    buffer: np.ndarray      # (stop - start,), conductance then current of the chunk
    reversal_mV: object     # the chunk's reversal potentials in the span (0 in gaps), or a float


#: An index chunk whose compartments spread over at most this many times their number
#: adds its conductances through a :class:`_Span`.
SPAN_SPREAD = 2


def _span(index: np.ndarray, reversal_mV) -> _Span | None:
    """A :class:`_Span` for the sorted distinct compartments ``index`` if they have few gaps."""
    if index.size == 0:
        return None
    start, stop = int(index[0]), int(index[-1]) + 1
    if stop - start > SPAN_SPREAD * index.size:
        return None
    if not isinstance(reversal_mV, float):
        spread = np.zeros(stop - start)
        spread[index - start] = reversal_mV
        reversal_mV = spread
    return _Span(start, stop, index - start, np.zeros(stop - start), reversal_mV)


def _uniform_as_float(values: np.ndarray):
    """``values`` as one float when all entries are equal (a cheaper operand, same results)."""
    if values.size and is_uniform(values):
        return float(values[0])
    return values


def _gate_chunks(block, position: np.ndarray) -> tuple[list[_GateChunk], np.ndarray]:
    """Split a channel block, in path order, into runs of at most :data:`GATE_CHUNK` entries.

    The entries are taken in the order of their compartments' positions
    ``position[block.index]`` (the stepper works in the tree solver's path
    order); ``perm`` lists the block's entries in that order, so the stepper's
    gate states are ``gates[:, perm]``.  A parameter or reversal potential shared
    by all entries of a run is passed as one float: the rate functions accept
    scalars as well as arrays (rule 2 of :mod:`cabletree.channels.base`) and give
    the same numbers with one array fewer to read per operation.

    Returns
    -------
    (chunks, perm) : (list of _GateChunk, ndarray of int64)
    """
    pos = position[block.index]
    perm = np.argsort(pos, kind="stable")
    index, gmax, reversal = pos[perm], block.gmax_uS[perm], block.reversal_mV[perm]
    parameters = block.parameters[:, perm]
    k = index.size
    n_chunks = max(1, -(-k // GATE_CHUNK))
    edges = [k * c // n_chunks for c in range(n_chunks + 1)]
    chunks = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        p = block.channel.parameter_tuple(*(_uniform_as_float(row) for row in parameters[:, lo:hi]))
        where = _block_selector(index[lo:hi])
        rev = _uniform_as_float(reversal[lo:hi])
        chunks.append(_GateChunk(slice(lo, hi), where, p, gmax[lo:hi], rev,
                                 None if isinstance(where, slice) else _span(where, rev)))
    return chunks, perm


class ReferenceStepper:
    """Integrates a :class:`CellModel` with numpy.

    Parameters
    ----------
    cell : CellModel
    """

    def __init__(self, cell: CellModel):
        self.cell = cell
        grid = cell.grid
        self.offdiag = -cell.axial_conductance_uS
        self.tree = HeavyPathSolver(grid.parent, self.offdiag)
        # every per-compartment array of a step is kept in the tree solver's path
        # order (position k holds compartment order[k]): the solver then needs no
        # permutation; states are converted at the start and end of a run
        self.order, self.position = self.tree.order, self.tree.position
        order = self.order
        self.capacitance_nF = cell.capacitance_nF[order]
        self.axial_diag = cell.axial_diagonal_uS[order]
        self.leak_uS = cell.leak_uS[order]
        self.leak_current_nA = (cell.leak_uS * cell.leak_reversal_mV)[order]
        self.blocks, self._entry_order, self._entry_inverse = [], [], []
        for block in cell.channels:
            chunks, perm = _gate_chunks(block, self.position)
            self.blocks.append((block, chunks, block.channel.temperature_factor(cell.celsius)))
            self._entry_order.append(perm)
            self._entry_inverse.append(np.argsort(perm))
        self.synapse_groups = []
        for grp in cell.synapses:
            k = grp.kinetics
            if k.shape == "alpha":
                taus = (k.tau_decay_ms, k.tau_decay_ms)
                scale = math.e
            else:
                taus = (k.tau_decay_ms, k.tau_rise_ms)
                scale = double_exponential_peak(k.tau_rise_ms, k.tau_decay_ms)[1]
            self.synapse_groups.append((grp, taus, scale, self.position[grp.compartment]))
        self.n_steps_done = 0
        self.n_solves = 0
        n = cell.n_compartments
        # work arrays reused every step: the diagonal, and two right-hand sides that
        # the solve turns into the new potentials (never the current ones)
        self._d = np.empty(n)
        self._v_buffers = (np.empty(n), np.empty(n))
        self._system_constants = {}
        self._table_cache = {}
        self._tables = (None,) * len(self.blocks)
        self._g = np.empty(min(n, GATE_CHUNK))  # a chunk's channel conductance

    # -- pieces of one step ---------------------------------------------------
    def _advance_gates(self, v, gates, dt_gate, G, J):
        """Gates after ``dt_gate`` (Rush-Larsen), updated in place; adds the conductances to G, J.

        ``G`` receives each compartment's channel conductance (µS) and ``J`` the
        conductance times the reversal potential (nA); the stepper passes the
        diagonal and right-hand side of the tree system, which contain them.

        Rate gates use ``exp(-dt phi (alpha + beta))`` and the open fraction is a
        product of repeated multiplications, the arithmetic of the compiled kernel.
        A block with a rate table (:mod:`cabletree.solver.tables`) takes its
        steady states and rates from it instead of its rate functions.  Blocks
        are updated in chunks of at most :data:`GATE_CHUNK` entries.
        """
        celsius = self.cell.celsius
        for (block, chunks, phi), x, table in zip(self.blocks, gates, self._tables):
            gate_list = block.channel.gates
            dts = [-dt_gate * (phi if gate.temperature_scaled else 1.0) for gate in gate_list]
            for chunk in chunks:
                vb = v[chunk.where]
                g = self._g[:vb.size]
                if table is not None:
                    inf_all, rate_all = interpolate(table, vb)
                started = False
                for j, gate in enumerate(gate_list):
                    minus_dt = dts[j]
                    if table is not None:
                        inf = inf_all[j]
                        e = np.exp(np.multiply(rate_all[j], minus_dt, out=rate_all[j]),
                                   out=rate_all[j])
                    elif gate.uses_rates:
                        a = gate.alpha(vb, celsius, chunk.p)
                        s = a + gate.beta(vb, celsius, chunk.p)
                        if not isinstance(s, np.ndarray) or s.shape != vb.shape:  # constant rates
                            s = np.full(vb.shape, s)
                        inf = a / s
                        e = np.exp(np.multiply(s, minus_dt, out=s), out=s)
                    else:  # tau may be a constant: no in-place update of it
                        inf, tau = gate.steady_state_and_tau_unscaled(vb, celsius, chunk.p)
                        e = np.divide(minus_dt, tau)
                        e = np.exp(e, out=e) if isinstance(e, np.ndarray) else np.exp(e)
                    xj = x[j, chunk.entries]
                    xj -= inf
                    xj *= e
                    xj += inf
                    for _ in range(int(gate.power)):
                        if started:
                            g *= xj
                        else:
                            np.multiply(chunk.gmax_uS, xj, out=g)
                            started = True
                if not started:  # no gate enters the conductance
                    np.copyto(g, chunk.gmax_uS)
                span = chunk.span
                if isinstance(chunk.where, slice):
                    G[chunk.where] += g
                    g *= chunk.reversal_mV
                    J[chunk.where] += g
                elif span is not None:
                    buf = span.buffer
                    buf[span.local] = g
                    G[span.start:span.stop] += buf
                    buf *= span.reversal_mV
                    J[span.start:span.stop] += buf
                else:  # distinct indices: the same sums as G[where] += g, in one pass
                    np.add.at(G, chunk.where, g)
                    g *= chunk.reversal_mV
                    np.add.at(J, chunk.where, g)
        return gates

    def _advance_synapses(self, states, h, step, first_half, second_half):
        """Synapse states at t+h, adding the events of ``step`` in the selected halves."""
        out = []
        for j, ((grp, (tau_a, tau_b), scale, _), s) in enumerate(zip(self.synapse_groups, states)):
            a = s[0] * math.exp(-h / tau_a)
            if grp.kinetics.shape == "alpha":
                b = (s[1] + s[0] * h / tau_a) * math.exp(-h / tau_a)
            else:
                b = s[1] * math.exp(-h / tau_b)
            lo, hi = int(self._event_lo[j][step]), int(self._event_hi[j][step])
            if hi > lo:
                off = self._events_offset[j][lo:hi]
                syn = self._events_synapse[j][lo:hi]
                if not (first_half and second_half):
                    in_first = self._events_half[j][lo:hi]
                    use = in_first if first_half else ~in_first
                    off = off[use] - (0.5 * self._dt if first_half else 0.0)
                    syn = syn[use]
                w = grp.weight_nS[syn] * scale
                if grp.kinetics.shape == "alpha":
                    ea = np.exp(-off / tau_a)
                    np.add.at(a, syn, w * ea)
                    np.add.at(b, syn, w * (off / tau_a) * ea)
                else:
                    np.add.at(a, syn, w * np.exp(-off / tau_a))
                    np.add.at(b, syn, w * np.exp(-off / tau_b))
            out.append(np.array([a, b]))
        return out

    def _synapse_conductance(self, states, v, G, J):
        for (grp, _, _, where), s in zip(self.synapse_groups, states):
            k = grp.kinetics
            g_nS = s[1] if k.shape == "alpha" else s[0] - s[1]
            g = 1e-3 * g_nS  # nS -> µS
            if k.mg_mM is not None:
                g = g * mg_block(v[where], k.mg_mM)
            np.add.at(G, where, g)
            np.add.at(J, where, g * k.reversal_mV)

    def _start_system(self, v, h_eff):
        """Diagonal and right-hand side of the implicit step before channels and inputs.

        The backward-Euler step after ``h_eff`` solves
        ``(C/h + G_leak + G + A) v' = C v / h + G_leak E_leak + J``; this returns
        ``d = C/h + A_diag + G_leak`` (kept per ``h_eff``) and
        ``r = C v / h + G_leak E_leak`` in the stepper's work arrays, to which the
        channels, synapses and injections then add their ``G`` and ``J``.
        """
        const = self._system_constants.get(h_eff)
        if const is None:
            c = self.capacitance_nF / h_eff
            const = self._system_constants[h_eff] = (c, c + self.axial_diag + self.leak_uS)
        c, base = const
        d = self._d
        np.copyto(d, base)
        r = np.multiply(c, v, out=self._v_buffers[1] if v is self._v_buffers[0]
                        else self._v_buffers[0])
        r += self.leak_current_nA
        return d, r

    def _implicit(self, d, r):
        """Backward-Euler potential: ``d``, ``r`` of :meth:`_start_system` solved, in ``r``."""
        self.n_solves += 1
        return self.tree.solve_in_path_order(d, r)

    def _step(self, t, v, gates, lag, syn, h, mode, current, step, halves):
        """One backward-Euler (mode 'be') or staggered CN ('cn') step of size h."""
        G, J = self._start_system(v, h / 2 if mode == "cn" else h)
        if mode == "cn":
            gates = self._advance_gates(v, gates, h / 2 + lag, G, J)
            new_lag = h / 2
        else:
            gates = self._advance_gates(v, gates, h + lag, G, J)
            new_lag = 0.0
        syn_new = self._advance_synapses(syn, h, step, *halves)
        if self.synapse_groups:
            if mode == "cn":
                mid = [0.5 * (a + b) for a, b in zip(syn, syn_new)]
                self._synapse_conductance(mid, v, G, J)
            else:
                self._synapse_conductance(syn_new, v, G, J)
        if current is not None:
            J[self._injected] += np.bincount(self._injection_slot, current,
                                             minlength=self._injected.size)
        v_new = self._implicit(G, J)
        if mode == "cn":
            v_new *= 2.0
            v_new -= v
        return v_new, gates, new_lag, syn_new

    def _injection_vector(self, sched: StepSchedule, k: int, which: str):
        """Injected currents of step ``k`` (nA, one per injection), or None without any."""
        if sched.injection_compartment.size == 0:
            return None
        return sched.injection_mid_nA[k] if which == "mid" else sched.injection_end_nA[k]

    def prepare(self, settings: RunSettings) -> None:
        """Build the rate tables ``settings`` ask for (nothing else to prepare)."""
        tables_for_settings(self.cell, settings, self._table_cache)

    def run(self, settings: RunSettings, sched: StepSchedule, state: SolverState,
            record_index: np.ndarray):
        """Integrate ``sched.n_steps`` steps from ``state``.

        Returns
        -------
        (v_records, final_state) : (ndarray of shape (n_records, n_sites), SolverState)
        """
        self._dt = sched.dt_ms
        self._tables = tables_for_settings(self.cell, settings, self._table_cache)
        # injections summed per compartment in their order (as np.add.at would)
        self._injected, self._injection_slot = np.unique(
            self.position[sched.injection_compartment], return_inverse=True)
        steps_all = np.arange(sched.n_steps)
        self._event_lo, self._event_hi = [], []
        self._events_offset, self._events_half, self._events_synapse = [], [], []
        for grp, ev_step, ev_off, ev_half in zip(self.cell.synapses, sched.synapse_event_step,
                                                 sched.synapse_event_offset_ms,
                                                 sched.synapse_event_half):
            self._event_lo.append(np.searchsorted(ev_step, steps_all, side="left"))
            self._event_hi.append(np.searchsorted(ev_step, steps_all, side="right"))
            self._events_offset.append(ev_off)
            self._events_half.append(ev_half)
            self._events_synapse.append(grp.event_synapse[:ev_step.size])
        # path order inside the run (np.take copies)
        v = np.take(np.asarray(state.v_mV, dtype=float), self.order)
        gates = [np.take(np.asarray(g, dtype=float), perm, axis=1)
                 for g, perm in zip(state.gates, self._entry_order)]
        syn = [s.astype(float).copy() for s in state.synapse_states]
        lag = state.gate_lag_ms
        record_position = self.position[record_index]
        records = np.empty((sched.n_records, record_index.size))
        records[0] = v[record_position]
        t = sched.t0_ms
        dt = sched.dt_ms
        cn = settings.method == "crank_nicolson"
        limit = settings.max_abs_v_mV
        rec = 1
        for k in range(sched.n_steps):
            if cn and not sched.smoothing[k]:
                v, gates, lag, syn = self._step(t, v, gates, lag, syn, dt, "cn",
                                                self._injection_vector(sched, k, "mid"), k,
                                                (True, True))
            elif cn:
                v, gates, lag, syn = self._step(t, v, gates, lag, syn, dt / 2, "be",
                                                self._injection_vector(sched, k, "mid"), k,
                                                (True, False))
                v, gates, lag, syn = self._step(t + dt / 2, v, gates, lag, syn, dt / 2, "be",
                                                self._injection_vector(sched, k, "end"), k,
                                                (False, True))
            else:
                v, gates, lag, syn = self._step(t, v, gates, lag, syn, dt, "be",
                                                self._injection_vector(sched, k, "end"), k,
                                                (True, True))
            t = sched.t0_ms + (k + 1) * dt
            if not (v.max() <= limit and v.min() >= -limit):  # NaN fails too
                # the first such compartment in compartment order
                c = int(self.order[~(np.abs(v) <= limit)].min())
                k_bad = int(self.position[c])
                raise NumericalInstabilityError(
                    f"membrane potential {float(v[k_bad])!r} mV at compartment {c} (path "
                    f"distance {self.cell.grid.path_distance_um[c]:.1f} µm) at t = {t:.6g} ms is "
                    f"NaN or beyond ±{limit} mV; reduce dt_ms or check the channel densities",
                    time_ms=t, compartment=c)
            if (k + 1) % sched.record_every == 0:
                records[rec] = v[record_position]
                rec += 1
            self.n_steps_done += 1
        gates_out = tuple(np.take(g, inverse, axis=1)  # back to each block's entry order
                          for g, inverse in zip(gates, self._entry_inverse))
        final = SolverState(t, np.take(v, self.position), gates_out, lag, tuple(syn),
                            tuple(b.channel.name for b in self.cell.channels))
        return records[:rec], final
