"""The numpy reference backend: clear, vectorised, no compiler needed.

Every step is vectorised over compartments; the only Python loops run over
channel blocks, gates and depth levels of the tree, never over compartments.
The tree system is solved exactly in O(N):

- :class:`TreeMatrix`: Gaussian elimination from the leaves to the root and
  back-substitution (Hines 1984, Int J Biomed Comput 15:69-76), one depth level
  at a time.  Simple, but a Python-level loop over every depth level: slow for
  deep trees (a 1000-compartment cable has 1000 levels).
- :class:`BranchSchurSolver` (used by :class:`ReferenceStepper`): the same
  system split into the branch points (and the root) and the unbranched chains
  between them.  All chains form one block-diagonal symmetric positive-definite
  tridiagonal system, factored by one LAPACK ``dpttrf`` call and solved by
  ``dpttrs``; the Schur complement on the branch points is again a tree matrix,
  solved by :class:`TreeMatrix` over the far fewer levels of the tree of branch
  points (Golub & Van Loan, Matrix Computations, 4th ed. 2013, §4.3 and §3.2.11
  on block elimination).  Same answer as :class:`TreeMatrix` to round-off.  The
  factorisation is kept while the diagonal is unchanged (a passive cell at a
  fixed step), so such a step costs the right-hand side solve only.

The work arrays of a step (conductances, diagonal, right-hand side) are kept on
the stepper and gate states are updated in place.
"""

from __future__ import annotations

import math

import numpy as np

from ..cell import CellModel
from ..errors import NumericalInstabilityError
from ..inputs import double_exponential_peak, mg_block
from .plan import RunSettings, SolverState, StepSchedule
from .tables import interpolate, tables_for_settings

__all__ = ["TreeMatrix", "BranchSchurSolver", "ReferenceStepper"]


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


class BranchSchurSolver:
    """Solve the tree system by chains (one batched tridiagonal solve) and a Schur complement.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent index, ``parent[i] < i``, -1 for the root.
    offdiag : ndarray, shape (n,)
        Coupling of each compartment to its parent (``offdiag[0]`` unused); fixed
        for the solver's lifetime (the axial conductances do not change in time).

    Notes
    -----
    Branch points ``B`` are the root and every compartment with two or more
    children; the others form chains, each hanging from a branch point ``P`` by
    its first compartment and, unless it ends in a terminal, carrying a branch
    point ``E`` below its last one.  With ``A_II`` the chains' tridiagonal block,
    ``U0 = A_II⁻¹ e_first``, ``U1 = A_II⁻¹ e_last`` and ``z = A_II⁻¹ r_I`` (one
    ``dptsv`` call), the Schur complement ``S = A_BB - A_BI A_II⁻¹ A_IB`` couples
    each ``E`` only to its ``P``, so ``S`` is a tree matrix on ``B``.

    ``U0``, ``U1``, ``S`` and the factorisations depend on the diagonal only: they
    are computed by :meth:`factor` and reused by :meth:`solve` for as long as the
    diagonal stays the same (a passive cell at a fixed step), so such a solve
    costs one tridiagonal back-substitution with one right-hand side plus the
    tree of branch points.  ``dptsv`` is ``dpttrf`` followed by ``dpttrs``, so
    splitting them changes nothing in the arithmetic.
    """

    def __init__(self, parent: np.ndarray, offdiag: np.ndarray):
        from scipy.linalg import lapack
        self._dpttrf, self._dpttrs = lapack.dpttrf, lapack.dpttrs
        parent = np.asarray(parent, dtype=np.int64)
        n = parent.size
        self.n = n
        b = np.asarray(offdiag, dtype=float)
        nchild = np.bincount(parent[1:], minlength=n) if n > 1 else np.zeros(n, np.int64)
        is_b = nchild >= 2
        is_b[0] = True
        only_child = np.full(n, -1, dtype=np.int64)
        kids = np.arange(1, n)
        single = nchild[parent[1:]] == 1
        only_child[parent[1:][single]] = kids[single]
        heads = np.nonzero(~is_b & np.concatenate([[False], is_b[parent[1:]]]))[0]
        order, chain_of, pos_head, pos_tail, below = [], [], [], [], []
        for c, h in enumerate(heads):  # walk each chain once (setup only)
            pos_head.append(len(order))
            node = int(h)
            while True:
                order.append(node)
                chain_of.append(c)
                nxt = int(only_child[node]) if nchild[node] == 1 else -1
                if nxt < 0:
                    below.append(-1)
                    break
                if is_b[nxt]:
                    below.append(nxt)
                    break
                node = nxt
            pos_tail.append(len(order) - 1)
        self.interior = np.asarray(order, dtype=np.int64)
        m = self.interior.size
        chain_of = np.asarray(chain_of, dtype=np.int64)
        pos_head = np.asarray(pos_head, dtype=np.int64)
        pos_tail = np.asarray(pos_tail, dtype=np.int64)
        below = np.asarray(below, dtype=np.int64)
        # chain tridiagonal: coupling between consecutive positions of one chain
        same = chain_of[1:] == chain_of[:-1] if m > 1 else np.zeros(0, bool)
        self.e = np.where(same, b[self.interior[1:]] if m > 1 else 0.0, 0.0)
        self.head_pos, self.tail_pos = pos_head, pos_tail
        self.chain_top = parent[heads]                      # P of each chain
        self.beta_top = b[heads]                            # coupling head - P
        has_e = below >= 0
        self.e_chains = np.nonzero(has_e)[0]
        self.chain_bottom = below[has_e]                    # E of those chains
        self.beta_bottom = b[self.chain_bottom]             # coupling tail - E
        rhs_unit = np.zeros((m, 2))
        rhs_unit[pos_head, 0] = 1.0
        rhs_unit[pos_tail[has_e], 1] = 1.0
        self._unit = np.asfortranarray(rhs_unit)
        # per-position chain data for the back-substitution
        self.pos_top = self.chain_top[chain_of] if m else np.zeros(0, np.int64)
        self.pos_beta_top = self.beta_top[chain_of] if m else np.zeros(0)
        e_of_chain = np.zeros(len(heads), dtype=np.int64)
        beta_e_of_chain = np.zeros(len(heads))
        e_of_chain[self.e_chains] = self.chain_bottom
        beta_e_of_chain[self.e_chains] = self.beta_bottom
        self.pos_bottom = e_of_chain[chain_of] if m else np.zeros(0, np.int64)
        self.pos_beta_bottom = beta_e_of_chain[chain_of] if m else np.zeros(0)
        # the tree of branch points, ordered by its own depth
        bnodes = np.nonzero(is_b)[0]
        bparent = np.full(n, -1, dtype=np.int64)
        direct = bnodes[1:][is_b[parent[bnodes[1:]]]]
        bparent[direct] = parent[direct]
        bparent[self.chain_bottom] = self.chain_top[self.e_chains]
        bdepth = np.zeros(n, dtype=np.int64)
        for i in bnodes[1:]:  # increasing index: B-parents come first
            bdepth[i] = bdepth[bparent[i]] + 1
        perm = bnodes[np.argsort(bdepth[bnodes], kind="stable")]
        self.bnodes = perm
        local = np.full(n, -1, dtype=np.int64)
        local[perm] = np.arange(perm.size)
        self.local = local
        self.direct = direct
        lparent = np.where(bparent[perm] >= 0, local[np.maximum(bparent[perm], 0)], -1)
        counts = np.bincount(bdepth[perm])
        bounds = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        self.btree = TreeMatrix(lparent, bounds)
        self.b = b
        # index sets and coefficient products of the Schur update, computed once
        self._top = local[self.chain_top]
        self._bottom = local[self.chain_bottom]
        self._tail_e = pos_tail[self.e_chains]
        self._head_e = pos_head[self.e_chains]
        self._bt2 = self.beta_top * self.beta_top
        self._be2 = self.beta_bottom * self.beta_bottom
        self._bt_be = -self.beta_top[self.e_chains] * self.beta_bottom
        self._direct_local = local[direct]
        self._factored_d = None

    def _factor_chains(self, d_interior: np.ndarray):
        """``L D L^T`` factors of the chains' tridiagonal block (LAPACK ``dpttrf``)."""
        m = d_interior.size
        if m == 1:  # LAPACK's wrapper cannot take the empty off-diagonal of a 1×1 system
            dd, ee, info = d_interior, self.e, (0 if d_interior[0] > 0 else 1)
        else:
            dd, ee, info = self._dpttrf(d_interior, self.e, overwrite_d=1)
        if info != 0:
            raise NumericalInstabilityError(
                f"the chain system is not positive definite (LAPACK dpttrf info={info}); "
                "the membrane or axial conductances are not physical", time_ms=float("nan"),
                compartment=int(self.interior[min(abs(info), m) - 1]))
        return dd, ee

    def _solve_chains(self, rhs: np.ndarray) -> np.ndarray:
        """``A_II⁻¹ rhs`` with the factors of the last :meth:`factor` (LAPACK ``dpttrs``)."""
        dd, ee = self._chains
        if dd.size == 1:
            return rhs / dd[0]
        return self._dpttrs(dd, ee, rhs)[0]

    def factor(self, d: np.ndarray, b: np.ndarray) -> None:
        """Factor the chains and the Schur complement for diagonal ``d``.

        Parameters
        ----------
        d : ndarray, shape (n,)
            Diagonal.
        b : ndarray, shape (n,)
            Coupling of each compartment to its parent (``b[0]`` unused), the one
            given at construction.
        """
        dS = d[self.bnodes]
        offS = np.zeros(self.bnodes.size)
        offS[self._direct_local] = b[self.direct]
        if self.interior.size:
            self._chains = self._factor_chains(d[self.interior])
            u = self._solve_chains(self._unit)
            self._u0, self._u1 = u[:, 0], u[:, 1]
            np.subtract.at(dS, self._top, self._bt2 * self._u0[self.head_pos])
            dS[self._bottom] -= self._be2 * self._u1[self._tail_e]
            offS[self._bottom] = self._bt_be * self._u1[self._head_e]
        self._offS = offS
        self._btree_factors = self.btree.factor(dS, offS)
        self._factored_d = d.copy()

    def solve(self, d: np.ndarray, b: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Solve ``A x = r``: arguments and result as in :meth:`TreeMatrix.solve`.

        ``b`` must be the coupling given at construction; the factorisation of
        the last call is reused when ``d`` is unchanged.
        """
        if self._factored_d is None or not np.array_equal(d, self._factored_d):
            self.factor(d, b)
        rS = r[self.bnodes]
        m = self.interior.size
        if m:
            z = self._solve_chains(r[self.interior])
            np.subtract.at(rS, self._top, self.beta_top * z[self.head_pos])
            rS[self._bottom] -= self.beta_bottom * z[self._tail_e]
        y = self.btree.solve_factored(self._btree_factors, self._offS, rS)
        x = np.empty(self.n)
        x[self.bnodes] = y
        if m:
            x[self.interior] = (z - self.pos_beta_top * x[self.pos_top] * self._u0
                                - self.pos_beta_bottom * x[self.pos_bottom] * self._u1)
        return x


def _block_selector(index: np.ndarray):
    """A slice for a contiguous run of compartment indices (views, not copies), else the index."""
    if index.size and index[-1] - index[0] + 1 == index.size and np.all(np.diff(index) == 1):
        return slice(int(index[0]), int(index[-1]) + 1)
    return index


class ReferenceStepper:
    """Integrates a :class:`CellModel` with numpy.

    Parameters
    ----------
    cell : CellModel
    """

    def __init__(self, cell: CellModel):
        self.cell = cell
        grid = cell.grid
        g = cell.axial_conductance_uS
        self.offdiag = -g
        self.tree = BranchSchurSolver(grid.parent, self.offdiag)
        self.axial_diag = cell.axial_diagonal_uS
        self.leak_current_nA = cell.leak_uS * cell.leak_reversal_mV
        self.blocks = []
        for block in cell.channels:
            self.blocks.append((block, _block_selector(block.index), block.parameter_tuple(),
                                block.channel.temperature_factor(cell.celsius)))
        self.synapse_groups = []
        for grp in cell.synapses:
            k = grp.kinetics
            if k.shape == "alpha":
                taus = (k.tau_decay_ms, k.tau_decay_ms)
                scale = math.e
            else:
                taus = (k.tau_decay_ms, k.tau_rise_ms)
                scale = double_exponential_peak(k.tau_rise_ms, k.tau_decay_ms)[1]
            self.synapse_groups.append((grp, taus, scale))
        self.n_steps_done = 0
        self.n_solves = 0
        n = cell.n_compartments
        # work arrays reused every step (the tree solver copies what it keeps)
        self._G, self._J, self._d, self._r, self._abs_v = (np.empty(n) for _ in range(5))
        self._c_over_h = {}
        self._table_cache = {}
        self._tables = (None,) * len(self.blocks)
        self._g = [np.empty(block.index.size) for block in cell.channels]

    # -- pieces of one step ---------------------------------------------------
    def _advance_gates(self, v, gates, dt_gate, G, J):
        """Gates after ``dt_gate`` (Rush-Larsen), updated in place; adds the conductances to G, J.

        Rate gates use ``exp(-dt phi (alpha + beta))`` and the open fraction is a
        product of repeated multiplications, the arithmetic of the compiled kernel.
        A block with a rate table (:mod:`cabletree.solver.tables`) takes its
        steady states and rates from it instead of its rate functions.
        """
        celsius = self.cell.celsius
        for (block, where, p, phi), x, g, table in zip(self.blocks, gates, self._g, self._tables):
            vb = v[where]
            np.copyto(g, block.gmax_uS)
            if table is not None:
                inf_all, rate_all = interpolate(table, vb)
            for j, gate in enumerate(block.channel.gates):
                dt_eff = dt_gate * (phi if gate.temperature_scaled else 1.0)
                if table is not None:
                    inf = inf_all[j]
                    e = np.exp(np.multiply(rate_all[j], -dt_eff, out=rate_all[j]))
                elif gate.uses_rates:
                    a = gate.alpha(vb, celsius, p)
                    s = a + gate.beta(vb, celsius, p)
                    inf = a / s
                    e = np.exp(np.multiply(s, -dt_eff, out=s), out=s)
                else:  # tau may be a constant: no in-place update of it
                    inf = gate.steady_state(vb, celsius, p)
                    e = np.exp(-dt_eff / gate.tau_ms(vb, celsius, p))
                xj = x[j]
                xj -= inf
                xj *= e
                xj += inf
                for _ in range(int(gate.power)):
                    g *= xj
            G[where] += g
            g *= block.reversal_mV
            J[where] += g
        return gates

    def _advance_synapses(self, states, h, step, first_half, second_half):
        """Synapse states at t+h, adding the events of ``step`` in the selected halves."""
        out = []
        for j, ((grp, (tau_a, tau_b), scale), s) in enumerate(zip(self.synapse_groups, states)):
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
        for (grp, _, _), s in zip(self.synapse_groups, states):
            k = grp.kinetics
            g_nS = s[1] if k.shape == "alpha" else s[0] - s[1]
            g = 1e-3 * g_nS  # nS -> µS
            if k.mg_mM is not None:
                g = g * mg_block(v[grp.compartment], k.mg_mM)
            np.add.at(G, grp.compartment, g)
            np.add.at(J, grp.compartment, g * k.reversal_mV)

    def _implicit(self, v, h_eff, G, J):
        """Backward-Euler potential after ``h_eff``: solve ``(C/h + G + A) v' = C v / h + J``."""
        c = self._c_over_h.get(h_eff)
        if c is None:
            c = self._c_over_h[h_eff] = self.cell.capacitance_nF / h_eff
        d = np.add(c, G, out=self._d)
        d += self.axial_diag
        r = np.multiply(c, v, out=self._r)
        r += J
        self.n_solves += 1
        return self.tree.solve(d, self.offdiag, r)

    def _step(self, t, v, gates, lag, syn, h, mode, current, step, halves):
        """One backward-Euler (mode 'be') or staggered CN ('cn') step of size h."""
        G = self._G
        J = self._J
        np.copyto(G, self.cell.leak_uS)
        np.copyto(J, self.leak_current_nA)
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
        if mode == "cn":
            v_new = self._implicit(v, h / 2, G, J)
            v_new *= 2.0
            v_new -= v
        else:
            v_new = self._implicit(v, h, G, J)
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
        self._injected, self._injection_slot = np.unique(sched.injection_compartment,
                                                         return_inverse=True)
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
        v = state.v_mV.astype(float).copy()
        gates = [g.astype(float).copy() for g in state.gates]
        syn = [s.astype(float).copy() for s in state.synapse_states]
        lag = state.gate_lag_ms
        records = np.empty((sched.n_records, record_index.size))
        records[0] = v[record_index]
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
            if not np.abs(v, out=self._abs_v).max() <= limit:  # NaN fails too
                c = int(np.argmax(~(np.abs(v) <= limit)))
                raise NumericalInstabilityError(
                    f"membrane potential {float(v[c])!r} mV at compartment {c} (path distance "
                    f"{self.cell.grid.path_distance_um[c]:.1f} µm) at t = {t:.6g} ms is NaN or "
                    f"beyond ±{limit} mV; reduce dt_ms or check the channel densities",
                    time_ms=t, compartment=c)
            if (k + 1) % sched.record_every == 0:
                records[rec] = v[record_index]
                rec += 1
            self.n_steps_done += 1
        final = SolverState(t, v, tuple(gates), lag, tuple(syn),
                            tuple(b.channel.name for b in self.cell.channels))
        return records[:rec], final
