"""Solver benchmarks: compartment-steps per second, memory, scaling, start-up.

Run ``python benchmarks/run.py [--quick] [--json FILE]``; see benchmarks/README.md
for what every column means.  Speed is measured here only, never in unit tests.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from cabletree.cell import CurrentInjection, Membrane, build_cell
from cabletree.grid import SpacingRule
from cabletree.inputs import StepCurrent
from cabletree.morphology import read_swc, synthetic
from cabletree.profiles import ChannelPlacement, Linear
from cabletree.sites import soma_site
from cabletree.solver import RunSettings, simulate
from cabletree.solver.plan import make_schedule, resting_state
from cabletree.solver.reference import ReferenceStepper

ROOT = Path(__file__).resolve().parents[1]
REAL_SWC = ROOT / "tests" / "data" / "l5_ttpc_pyramidal_rat_hay2013_cell4.swc"

try:
    from cabletree.solver.compiled import CompiledStepper
except ImportError:  # numba missing: only the scipy/numpy backend is measured
    CompiledStepper = None

try:
    from cabletree.channels import hh_potassium, hh_sodium, ih, ka_placements, hoffman_gradient
    HAVE_DENDRITIC = True
except ImportError:
    from cabletree.channels import hh_potassium, hh_sodium
    HAVE_DENDRITIC = False


# --- cells ----------------------------------------------------------------------

def channel_set(kind: str):
    """Channel placements of a benchmark case."""
    if kind == "passive":
        return []
    hh = [ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036)]
    if kind == "hh":
        return hh
    if not HAVE_DENDRITIC:
        return hh
    # A-type with the Hoffman et al (1997) gradient
    ka = list(ka_placements(hoffman_gradient(0.005)))
    if kind == "hh_ka":
        return hh + ka
    # ... and Ih rising with distance (Magee 1998)
    return hh + ka + [ChannelPlacement(ih, Linear(5e-5, 2e-7))]


#: Distinct exponentials per compartment and step of each case, counted by hand from
#: the rate functions in cabletree.channels (one per rate exponential, identical ones
#: counted once, plus one Rush-Larsen factor per gate): HH m 3, h 3, n 3; A-type
#: n 4, l 2; Ih q 4.
EXPONENTIALS_PER_COMPARTMENT = {"passive": 0, "hh": 9, "hh_ka": 15, "hh_ka_ih": 19}


def generated_cell(n_target: int, kind: str):
    """A random tree (cabletree.morphology.synthetic) with about ``n_target`` compartments."""
    n_branches = max(3, int(round(n_target / 6.3)))
    morph = synthetic.random_tree(n_branches, seed=7, samples_per_branch=4)
    return build_cell(morph, spacing=SpacingRule(max_length_um=10.0, lambda_fraction=None),
                      membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-65.0),
                      channels=channel_set(kind), celsius=temperature(kind))


def temperature(kind: str) -> float:
    """°C of a case: the squid-axon temperature for HH alone, room temperature with A-type."""
    return 6.3 if kind in ("passive", "hh") else 24.0


def real_cell(kind: str):
    """The reconstruction in tests/data (attribution in tests/data/SOURCES.md)."""
    morph = read_swc(REAL_SWC)
    return build_cell(morph, spacing=SpacingRule(max_length_um=10.0, lambda_fraction=None),
                      membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-65.0),
                      channels=channel_set(kind), celsius=temperature(kind))


def with_drive(cell):
    """Soma step current, soma recorded only."""
    return cell.with_inputs(injections=[CurrentInjection(soma_site(cell.grid),
                                                         StepCurrent(1.0, 0.5, 1e6))],
                            recording_sites=[soma_site(cell.grid)])


# --- timing -----------------------------------------------------------------------

#: Voltage spacing of the rate tables in the "+tables" rows, mV.
TABLE_STEP_MV = 0.05


def make_stepper(cell, backend):
    if backend.startswith("reference"):
        return ReferenceStepper(cell)
    threads = 2 if backend == "compiled_2threads" else 1
    stepper = CompiledStepper(cell, threads=threads)
    stepper.kernel()
    return stepper


def time_run(cell, backend, n_steps, repeats, dt=0.025):
    """Median seconds per step and tracemalloc peak (MB) of ``n_steps`` steps."""
    return time_runs([cell], backend, [n_steps], repeats, dt)[0]


def time_runs(cells, backend, n_steps, repeats, dt=0.025):
    """:func:`time_run` for several cells, their timed runs alternating (cell 1, 2, ...,
    1, 2, ...) so that a slow or fast moment of the machine falls on all of them
    alike: their ratios (the scaling with N) are then measured at one moment."""
    table = TABLE_STEP_MV if backend.endswith("+tables") else None
    runs = []
    for cell, steps in zip(cells, n_steps):
        stepper = make_stepper(cell, backend)
        warm = RunSettings(2 * dt, dt, rate_table_step_mV=table)
        state = resting_state(cell, -65.0)
        idx = np.array([0], dtype=np.int64)
        stepper.run(warm, make_schedule(cell, warm), state, idx)  # load/compile outside timing
        runs.append((cell, stepper, state, idx, RunSettings(steps * dt, dt, rate_table_step_mV=table)))
    times = [[] for _ in runs]
    for _ in range(repeats):
        for (cell, stepper, state, idx, settings), elapsed in zip(runs, times):
            sched = make_schedule(cell, settings)
            t0 = time.perf_counter()
            stepper.run(settings, sched, state, idx)
            elapsed.append(time.perf_counter() - t0)
    return [_memory_and_median(cell, stepper, state, idx, settings, backend, elapsed, steps)
            for (cell, stepper, state, idx, settings), elapsed, steps in zip(runs, times, n_steps)]


def _memory_and_median(cell, stepper, state, idx, settings, backend, times, n_steps):
    """(median seconds per step, peak MB of one more run) for :func:`time_runs`."""
    tracemalloc.start()
    stepper.run(settings, make_schedule(cell, settings), state, idx)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    # scratch arrays allocated inside the compiled kernel are invisible to tracemalloc:
    # the tree system's diagonal and right-hand side (N doubles each; a third array, the
    # stored elimination multipliers, for a fixed matrix) and, per thread, five rows of
    # doubles and one of int32 as long as a strip of the gate loops
    scratch = 0
    if backend.startswith("compiled"):
        n = cell.n_compartments
        scratch = ((3 if stepper.fixed_matrix else 2) * n * 8
                   + stepper.kernel_threads * stepper.max_strip * (5 * 8 + 4))
    return float(np.median(times)) / n_steps, (peak + scratch) / 1e6


def steps_for(n, backend, quick):
    budget = {"reference": 4e6, "compiled": 6e7, "compiled_2threads": 6e7,
              "compiled+tables": 6e7, "reference+tables": 4e6}[backend]
    budget *= 0.3 if quick else 1.0
    return int(max(4, min(2000, budget / n)))


# --- solve_ivp comparison --------------------------------------------------------

def mol_system(cell):
    """Method-of-lines right-hand side and Jacobian sparsity of a cell (channels only)."""
    import scipy.sparse as sp
    n = cell.n_compartments
    parent = cell.grid.parent
    g = cell.axial_conductance_uS
    blocks = [(b, b.parameter_tuple(), b.channel.temperature_factor(cell.celsius))
              for b in cell.channels]
    sizes = [len(b.channel.gates) * b.index.size for b in cell.channels]
    offsets = np.concatenate([[n], n + np.cumsum(sizes)]).astype(int)
    inj = cell.injections[0]
    child = np.arange(1, n)

    def rhs(t, y):
        v = y[:n]
        i_ax = np.zeros(n)
        flow = g[1:] * (v[parent[1:]] - v[1:])
        i_ax[1:] += flow
        np.subtract.at(i_ax, parent[1:], flow)
        i_m = cell.leak_uS * (cell.leak_reversal_mV - v)
        dy = np.empty_like(y)
        for (b, p, phi), o in zip(blocks, offsets[:-1]):
            k = b.index.size
            x = y[o:o + len(b.channel.gates) * k].reshape(-1, k)
            vb = v[b.index]
            for j, gate in enumerate(b.channel.gates):
                inf, tau = gate.inf_tau(vb, cell.celsius, p, phi)
                dy[o + j * k:o + (j + 1) * k] = (inf - x[j]) / tau
            gch = b.gmax_uS * b.channel.open_fraction(x)
            np.add.at(i_m, b.index, gch * (b.reversal_mV - vb))
        i_m[0] += float(inj.waveform.current_nA(t))
        dy[:n] = (i_m + i_ax) / cell.capacitance_nF
        return dy

    m = offsets[-1]
    rows, cols = [np.arange(m)], [np.arange(m)]
    rows += [child, parent[1:]]
    cols += [parent[1:], child]
    for b, o in zip(cell.channels, offsets[:-1]):
        k = b.index.size
        for j in range(len(b.channel.gates)):
            gi = o + j * k + np.arange(k)
            rows += [gi, b.index]
            cols += [b.index, gi]
    pattern = sp.coo_matrix((np.ones(sum(r.size for r in rows)),
                             (np.concatenate(rows), np.concatenate(cols))), shape=(m, m)).tocsc()
    y0 = np.concatenate([resting_state(cell, -65.0).v_mV] +
                        [x.ravel() for x in resting_state(cell, -65.0).gates])
    return rhs, pattern, y0


def spikes(v, t):
    from cabletree.analysis import spike_times
    return spike_times(v, t, threshold_mV=-20.0, reference="crossing")


def spike_error(a, b):
    if len(a) != len(b) or len(a) == 0:
        return math.inf
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))))


def ivp_comparison(quick):
    """Compiled CN/BE vs solve_ivp BDF at equal spike-time accuracy on a 1000-compartment HH tree."""
    from scipy.integrate import solve_ivp
    cell = with_drive(generated_cell(1000, "hh"))
    t_stop = 10.0 if quick else 20.0
    fine = simulate(cell, RunSettings(t_stop, 0.001), backend="compiled"
                    if CompiledStepper else "reference")
    truth = spikes(fine.v_mV[:, 0], fine.time_ms)
    out = {"n_compartments": cell.n_compartments, "t_stop_ms": t_stop,
           "n_spikes": int(len(truth))}
    backends = ["compiled", "reference"] if CompiledStepper else ["reference"]
    for backend in backends:
        for method in ("backward_euler", "crank_nicolson"):
            s = RunSettings(t_stop, 0.025, method=method)
            simulate(cell, RunSettings(0.05, 0.025, method=method), backend=backend)
            t0 = time.perf_counter()
            r = simulate(cell, s, backend=backend)
            out[f"{backend}_{method}_s"] = time.perf_counter() - t0
            out[f"{backend}_{method}_spike_error_ms"] = spike_error(
                spikes(r.v_mV[:, 0], r.time_ms), truth)
    target = out[f"{backends[0]}_backward_euler_spike_error_ms"]
    rhs, pattern, y0 = mol_system(cell)
    t_eval = np.arange(0.0, t_stop + 1e-9, 0.001)
    for rtol in (1e-3, 1e-4, 1e-5, 1e-6):
        t0 = time.perf_counter()
        sol = solve_ivp(rhs, (0.0, t_stop), y0, method="BDF", jac_sparsity=pattern, rtol=rtol,
                        atol=1e-6, t_eval=t_eval)
        elapsed = time.perf_counter() - t0
        err = spike_error(spikes(sol.y[0], sol.t), truth)
        out.update(ivp_rtol=rtol, ivp_s=elapsed, ivp_spike_error_ms=err)
        if err <= target:
            break
    return out


# --- rate tables against exact rates --------------------------------------------

def table_accuracy(quick, backend):
    """Tabulated against exact rates on the 1000-compartment HH + A-type tree.

    Largest difference of the recorded (soma) potential and of the spike times
    over a run with a somatic step current, for several table spacings.
    """
    cell = with_drive(generated_cell(1000, "hh_ka"))
    t_stop = 30.0 if quick else 60.0
    exact = simulate(cell, RunSettings(t_stop, 0.025), backend=backend)
    truth = spikes(exact.v_mV[:, 0], exact.time_ms)
    out = {"n_compartments": cell.n_compartments, "t_stop_ms": t_stop,
           "n_spikes": int(len(truth)), "by_step_mV": {}}
    for h in (0.2, 0.1, 0.05, 0.025):
        tab = simulate(cell, RunSettings(t_stop, 0.025, rate_table_step_mV=h), backend=backend)
        out["by_step_mV"][h] = dict(
            max_abs_dv_mV=float(np.max(np.abs(tab.v_mV - exact.v_mV))),
            spike_time_error_ms=spike_error(spikes(tab.v_mV[:, 0], tab.time_ms), truth))
    return out


# --- cost of one exponential -----------------------------------------------------

def exponential_cost(repeats: int = 7):
    """ns per element of the compiled kernel's exp and of ``np.exp``, 10^4 values.

    The gate loops of both backends are bound by exponentials, so these two numbers
    and EXPONENTIALS_PER_COMPARTMENT give the ceiling of each case.
    """
    x = np.random.default_rng(0).uniform(-20.0, 5.0, 10_000)
    out = np.empty_like(x)

    def best(f, number):
        f()
        ts = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            for _ in range(number):
                f()
            ts.append((time.perf_counter() - t0) / number)
        return min(ts) / x.size * 1e9

    res = {"numpy_np_exp_ns": best(lambda: np.exp(x, out=out), 50)}
    if CompiledStepper is not None:
        import numba
        from cabletree.solver.compiled import FASTMATH_FLAGS, fast_exp

        @numba.njit(fastmath=set(FASTMATH_FLAGS), error_model="numpy")
        def exp_loop(a, b):
            for i in range(a.size):
                b[i] = fast_exp(a[i])

        res["compiled_fast_exp_ns"] = best(lambda: exp_loop(x, out), 500)
    return res


# --- cold start ----------------------------------------------------------------------

_COLD = r'''
import time
t0 = time.perf_counter()
from cabletree.morphology import synthetic
from cabletree.cell import build_cell
from cabletree.profiles import ChannelPlacement
from cabletree.channels import hh_sodium, hh_potassium
from cabletree.solver import simulate, RunSettings
cell = build_cell(synthetic.random_tree(30, seed=1),
                  channels=[ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036)])
import sys
first = sys.argv[1]
second = "reference" if first == "compiled" else "compiled"
t1 = time.perf_counter()
simulate(cell, RunSettings(0.1, 0.025), backend=first)
t2 = time.perf_counter()
simulate(cell, RunSettings(0.1, 0.025), backend=second)
t3 = time.perf_counter()
t_compiled, t_reference = (t2 - t1, t3 - t2) if first == "compiled" else (t3 - t2, t2 - t1)
print(t_compiled - t_reference, t1 - t0)
'''


def cold_start():
    """Seconds the first compiled run adds in a fresh process, without and with the cache."""
    out = {}
    with tempfile.TemporaryDirectory() as d:
        env = dict(os.environ, CABLETREE_KERNEL_DIR=d)
        # the first run in a process pays the imports both backends share (scipy, which
        # numba imports too); "compiled_first" charges them to the compiled backend
        for label, first in (("no_cache", "compiled"), ("with_cache", "reference"),
                             ("with_cache_compiled_first", "compiled")):
            res = subprocess.run([sys.executable, "-c", _COLD, first], env=env,
                                 capture_output=True, text=True, check=True)
            first, setup = (float(x) for x in res.stdout.split())
            out[f"{label}_s"] = first
    return out


# --- main ----------------------------------------------------------------------------

def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="smaller run, under two minutes")
    ap.add_argument("--json", type=Path, help="write the records to this file")
    args = ap.parse_args(argv)
    quick = args.quick
    sizes = [1000, 10000] if quick else [1000, 10000, 100000]
    repeats = 3 if quick else 5
    backends = ["reference", "reference+tables"]
    if CompiledStepper is not None:
        backends = ["compiled", "compiled_2threads", "compiled+tables", "reference",
                    "reference+tables"]
    records = []
    kinds = ["passive", "hh", "hh_ka", "hh_ka_ih"]
    if not HAVE_DENDRITIC:
        print("note: A-type/Ih channels not found; cases hh_ka and hh_ka_ih run HH only")
    # each group is timed together, its cells' runs alternating (time_runs): the
    # generated cells of one channel set at every size, then each reconstruction
    groups = [[(f"{kind}_N{n:g}", kind, lambda n=n, kind=kind: generated_cell(n, kind))
               for n in sizes] for kind in kinds]
    real_kinds = ["hh_ka_ih"] if quick else kinds
    groups += [[(f"{kind}_real_l5", kind, lambda kind=kind: real_cell(kind))]
               for kind in real_kinds]
    for group in groups:
        kind = group[0][1]
        cells = [(case, with_drive(make())) for case, _, make in group]
        for backend in backends:
            if quick and backend == "compiled_2threads" and kind not in ("hh_ka", "hh_ka_ih"):
                continue
            if backend.endswith("+tables") and (kind == "passive" or
                                                (quick and kind != "hh_ka")):
                continue
            steps = [steps_for(cell.n_compartments, backend, quick) for _, cell in cells]
            timed = time_runs([cell for _, cell in cells], backend, steps, repeats)
            for (case, cell), n_steps, (sec, mem) in zip(cells, steps, timed):
                n = cell.n_compartments
                records.append(dict(case=case, backend=backend, n_compartments=n,
                                    cs_per_s=n / sec, peak_mem_mb=mem, s_per_step=sec,
                                    n_steps=n_steps, ratios={}))
                print(f"  {case:<22} {backend:<18} N={n:<7} {n / sec:10.3g} cs/s  "
                      f"{mem:8.2f} MB", flush=True)
    # the table lists cases by size, then channel set, as the groups were built
    case_order = [case for n in sizes for case in (f"{kind}_N{n:g}" for kind in kinds)]
    case_order += [f"{kind}_real_l5" for kind in real_kinds]
    records.sort(key=lambda rec: (case_order.index(rec["case"]), backends.index(rec["backend"])))
    compiled_speed = {rec["case"]: rec["cs_per_s"] for rec in records
                      if rec["backend"] == "compiled"}
    for rec in records:
        if rec["case"] in compiled_speed:
            rec["ratios"]["vs_compiled"] = rec["cs_per_s"] / compiled_speed[rec["case"]]
    print("solve_ivp comparison ...", flush=True)
    ivp = ivp_comparison(quick)
    fixed = "compiled" if CompiledStepper else "reference"
    for rec in records:
        exact_single = rec["backend"] in ("compiled", "reference")
        rec["ratios"]["vs_solve_ivp_bdf_1000_hh"] = (
            ivp["ivp_s"] / ivp[f"{rec['backend']}_backward_euler_s"]
            if rec["case"].startswith("hh_N1000") and exact_single else None)
    # time per step at 1e5 over 1e4 as measured, and for exactly 10x the compartments
    # (the generated cells have 103061 and 10094: a linear cost gives 10.2 and 10)
    scaling, per_10x = {}, {}
    if not quick:
        for kind in kinds:
            for backend in backends:
                a = [r for r in records if r["case"] == f"{kind}_N10000" and r["backend"] == backend]
                b = [r for r in records if r["case"] == f"{kind}_N100000" and r["backend"] == backend]
                if a and b:
                    key = f"{kind}/{backend}"
                    scaling[key] = b[0]["s_per_step"] / a[0]["s_per_step"]
                    per_10x[key] = scaling[key] * 10.0 * a[0]["n_compartments"] / b[0]["n_compartments"]
    print("rate tables against exact rates ...", flush=True)
    tables = table_accuracy(quick, fixed)
    print("cost of one exponential ...", flush=True)
    exp_cost = exponential_cost()
    print("cold start ...", flush=True)
    cold = cold_start() if CompiledStepper else {}
    meta = dict(cores=os.cpu_count(), machine=platform.processor() or platform.machine(),
                python=platform.python_version(), quick=quick,
                load_average=os.getloadavg() if hasattr(os, "getloadavg") else None)
    print_table(records, ivp, scaling, per_10x, cold, meta, fixed, exp_cost, tables)
    if args.json:
        payload = dict(records=records, solve_ivp=ivp, scaling_1e5_over_1e4=scaling,
                       scaling_per_10x_n=per_10x,
                       cold_start=cold, exponential_cost=exp_cost, rate_tables=tables,
                       exponentials_per_compartment=EXPONENTIALS_PER_COMPARTMENT, machine=meta)
        args.json.write_text(json.dumps(payload, indent=1, default=float))
    return 0


def print_table(records, ivp, scaling, per_10x, cold, meta, fixed, exp_cost, tables):
    print()
    print(f"machine: {meta['cores']} cores, load average {meta['load_average']}")
    print(f"{'case':<22} {'backend':<18} {'N':>7} {'cs/s':>10} {'vs compiled':>11} "
          f"{'peak MB':>8}")
    for r in records:
        vc = r["ratios"].get("vs_compiled")
        print(f"{r['case']:<22} {r['backend']:<18} {r['n_compartments']:>7} {r['cs_per_s']:>10.3g} "
              f"{'' if vc is None else f'{vc:.3g}':>11} {r['peak_mem_mb']:>8.2f}")
    print()
    print(f"solve_ivp BDF (sparse Jacobian), {ivp['n_compartments']} compartments HH, "
          f"{ivp['t_stop_ms']} ms, {ivp['n_spikes']} spikes:")
    print(f"  BDF rtol={ivp['ivp_rtol']:g}: {ivp['ivp_s']:.3g} s, spike-time error "
          f"{ivp['ivp_spike_error_ms']:.3g} ms")
    for k, v in ivp.items():
        if k.endswith("_s") and k != "ivp_s":
            m = k[:-2]
            print(f"  {m}: {v:.3g} s, spike-time error {ivp[m + '_spike_error_ms']:.3g} ms, "
                  f"solve_ivp/this = {ivp['ivp_s'] / v:.3g}")
    if scaling:
        print("time per step N=1e5 / N=1e4: " +
              ", ".join(f"{k} {v:.3g}" for k, v in scaling.items()))
        print("  the same for exactly 10x N (divided by the N ratio, times 10): " +
              ", ".join(f"{k} {v:.3g}" for k, v in per_10x.items()))
    ceilings = []
    for label, key in (("compiled", "compiled_fast_exp_ns"), ("reference", "numpy_np_exp_ns")):
        if key in exp_cost:
            ns = exp_cost[key]
            caps = ", ".join(f"{k} {1e9 / (m * ns):.3g}" for k, m in
                             EXPONENTIALS_PER_COMPARTMENT.items() if m)
            ceilings.append(f"  {label}: {ns:.3g} ns per exp -> exps alone allow at most "
                            f"(cs/s) {caps}")
    print(f"rate tables vs exact rates ({fixed}), {tables['n_compartments']} compartments "
          f"HH + A-type, {tables['t_stop_ms']} ms, {tables['n_spikes']} spikes at the soma:")
    for h, r in tables["by_step_mV"].items():
        print(f"  every {h:g} mV: max |dV| {r['max_abs_dv_mV']:.3g} mV, spike-time error "
              f"{r['spike_time_error_ms']:.3g} ms")
    print("exponentials (the floor of the gate loops):")
    print("\n".join(ceilings))
    if cold:
        print(f"cold start (first compiled run in a new process): no cache "
              f"{cold['no_cache_s']:.3g} s, with cache {cold['with_cache_s']:.3g} s "
              f"({cold['with_cache_compiled_first_s']:.3g} s when it runs before the reference "
              "backend and pays the shared scipy import)")


if __name__ == "__main__":
    sys.exit(main())
