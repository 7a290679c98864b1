"""The numpy reference backend: clear, vectorised, no compiler needed.

Every step is vectorised over compartments; the only Python loops run over
channel blocks, gates and depth levels of the tree, never over compartments.
The tree system is solved exactly in O(N) by Gaussian elimination from the
leaves to the root and back-substitution (Hines 1984, Int J Biomed Comput
15:69-76), one depth level at a time.
"""

from __future__ import annotations

import math

import numpy as np

from ..cell import CellModel
from ..errors import NumericalInstabilityError
from ..inputs import double_exponential_peak, mg_block
from .plan import RunSettings, SolverState, StepSchedule

__all__ = ["TreeMatrix", "ReferenceStepper"]


class TreeMatrix:
    """Symmetric tree matrix ``A = diag(d) + offdiag`` with ``A[i, parent[i]] = b[i]``.

    Parameters
    ----------
    parent : ndarray of int64, shape (n,)
        Parent index, ``parent[i] < i``, -1 for the root; stored by depth.
    level_bounds : ndarray of int64
        Start of each depth level (see :meth:`cabletree.grid.Grid.level_bounds`).
    """

    def __init__(self, parent: np.ndarray, level_bounds: np.ndarray):
        self.parent = parent
        self.bounds = level_bounds
        self.levels = []
        for lev in range(1, len(level_bounds) - 1):
            s, e = int(level_bounds[lev]), int(level_bounds[lev + 1])
            ps, pe = int(level_bounds[lev - 1]), int(level_bounds[lev])
            self.levels.append((s, e, ps, pe, parent[s:e] - ps))

    def solve(self, d: np.ndarray, b: np.ndarray, r: np.ndarray) -> np.ndarray:
        """Solve ``A x = r`` in place of copies of ``d`` and ``r``.

        Parameters
        ----------
        d : ndarray, shape (n,)
            Diagonal.
        b : ndarray, shape (n,)
            Coupling of each compartment to its parent (``b[0]`` unused).
        r : ndarray, shape (n,)
            Right-hand side.

        Returns
        -------
        ndarray, shape (n,)
        """
        d = d.copy()
        r = r.copy()
        for s, e, ps, pe, local in reversed(self.levels):
            f = b[s:e] / d[s:e]
            m = pe - ps
            d[ps:pe] -= np.bincount(local, f * b[s:e], minlength=m)
            r[ps:pe] -= np.bincount(local, f * r[s:e], minlength=m)
        x = np.empty_like(r)
        x[0] = r[0] / d[0]
        parent = self.parent
        for s, e, _, _, _ in self.levels:
            x[s:e] = (r[s:e] - b[s:e] * x[parent[s:e]]) / d[s:e]
        return x


class ReferenceStepper:
    """Integrates a :class:`CellModel` with numpy.

    Parameters
    ----------
    cell : CellModel
    """

    def __init__(self, cell: CellModel):
        self.cell = cell
        grid = cell.grid
        n = grid.n_compartments
        self.tree = TreeMatrix(grid.parent, grid.level_bounds())
        g = cell.axial_conductance_uS
        self.offdiag = -g
        self.axial_diag = g + np.bincount(grid.parent[1:], g[1:], minlength=n)
        self.leak_current_nA = cell.leak_uS * cell.leak_reversal_mV
        self.blocks = []
        for block in cell.channels:
            self.blocks.append((block, block.parameter_tuple(),
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

    # -- pieces of one step ---------------------------------------------------
    def _advance_gates(self, v, gates, dt_gate):
        out = []
        for (block, p, phi), x in zip(self.blocks, gates):
            vb = v[block.index]
            new = np.empty_like(x)
            for j, gate in enumerate(block.channel.gates):
                inf, tau = gate.inf_tau(vb, self.cell.celsius, p, phi)
                new[j] = inf + (x[j] - inf) * np.exp(-dt_gate / tau)
            out.append(new)
        return out

    def _channel_conductances(self, gates, G, J):
        for (block, _, _), x in zip(self.blocks, gates):
            g = block.gmax_uS * block.channel.open_fraction(x)
            G[block.index] += g
            J[block.index] += g * block.reversal_mV

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
        c = self.cell.capacitance_nF / h_eff
        d = c + G + self.axial_diag
        r = c * v + J
        self.n_solves += 1
        return self.tree.solve(d, self.offdiag, r)

    def _step(self, t, v, gates, lag, syn, h, mode, current, step, halves):
        """One backward-Euler (mode 'be') or staggered CN ('cn') step of size h."""
        n = v.size
        if mode == "cn":
            gates = self._advance_gates(v, gates, h / 2 + lag)
            new_lag = h / 2
        else:
            gates = self._advance_gates(v, gates, h + lag)
            new_lag = 0.0
        G = self.cell.leak_uS.copy()
        J = self.leak_current_nA.copy()
        self._channel_conductances(gates, G, J)
        syn_new = self._advance_synapses(syn, h, step, *halves)
        if self.synapse_groups:
            if mode == "cn":
                mid = [0.5 * (a + b) for a, b in zip(syn, syn_new)]
                self._synapse_conductance(mid, v, G, J)
            else:
                self._synapse_conductance(syn_new, v, G, J)
        if current is not None:
            J += current
        if mode == "cn":
            v_half = self._implicit(v, h / 2, G, J)
            v_new = 2.0 * v_half - v
        else:
            v_new = self._implicit(v, h, G, J)
        return v_new, gates, new_lag, syn_new

    def _injection_vector(self, sched: StepSchedule, k: int, which: str):
        if sched.injection_compartment.size == 0:
            return None
        vec = np.zeros(self.cell.n_compartments)
        vals = sched.injection_mid_nA[k] if which == "mid" else sched.injection_end_nA[k]
        np.add.at(vec, sched.injection_compartment, vals)
        return vec

    def run(self, settings: RunSettings, sched: StepSchedule, state: SolverState,
            record_index: np.ndarray):
        """Integrate ``sched.n_steps`` steps from ``state``.

        Returns
        -------
        (v_records, final_state) : (ndarray of shape (n_records, n_sites), SolverState)
        """
        self._dt = sched.dt_ms
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
            bad = ~(np.abs(v) <= limit)
            if bad.any():
                c = int(np.argmax(bad))
                raise NumericalInstabilityError(
                    f"membrane potential {v[c]!r} mV at compartment {c} (path distance "
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
