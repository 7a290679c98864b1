"""Sweep throughput: runs per minute on 1 and 2 local worker processes, and the speed-up.

    python benchmarks/sweep_throughput.py [--runs 16] [--t-stop-ms 40]

Each run is a Hodgkin-Huxley (1952) ball and stick driven by a somatic current step; the
sweep varies the step amplitude.  The timing covers the whole sweep (worker start-up,
runs, writing the store and combining), each engine starting from an empty store.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

SCENARIO = """
[morphology]
synthetic = "ball_and_stick"
[grid]
max_length_um = 10.0
[channels.na]
channel = "hh_na"
gmax = 0.12
[channels.k]
channel = "hh_k"
gmax = 0.036
[sites.soma]
soma = true
[sites.dend]
swc_types = ["basal"]
path_distance_um = [150.0]
[inputs.step]
type = "step"
site = "soma"
amplitude_nA = 1.0
delay_ms = 1.0
duration_ms = 30.0
[run]
t_stop_ms = T_STOP
dt_ms = 0.025
record_interval_ms = 0.1
backend = "BACKEND"
[analysis.spikes]
onset_ms = 1.0
"""


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--runs", type=int, default=16)
    p.add_argument("--t-stop-ms", type=float, default=40.0)
    p.add_argument("--backend", default="reference")
    args = p.parse_args(argv)
    from cabletree import sweep
    from cabletree.scenario import load_scenario

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.toml"
        path.write_text(SCENARIO.replace("T_STOP", repr(args.t_stop_ms))
                        .replace("BACKEND", args.backend))
        scenario = load_scenario(path)
        amps = ",".join(f"{1.0 + 0.05 * i:.2f}" for i in range(args.runs))
        spec = sweep.override_spec(sweep.parse_sweep_spec(None),
                                   grid=[f"inputs.step.amplitude_nA={amps}"])
        # warm-up in this process (imports, first Dataset), not timed
        sweep.run_sweep(scenario, Path(tmp) / "warm", spec=sweep.parse_sweep_spec(
            {"grid": {"inputs.step.amplitude_nA": [1.0]}}), engine="serial", progress=None)
        rates = {}
        for workers in (1, 2):
            t0 = time.perf_counter()
            report = sweep.run_sweep(scenario, Path(tmp) / f"w{workers}", spec=spec,
                                     engine="processes", workers=workers, progress=None)
            elapsed = time.perf_counter() - t0
            assert report.n_computed == args.runs and not report.failures
            rates[workers] = args.runs / elapsed * 60.0
            print(f"{workers} worker(s): {args.runs} runs in {elapsed:.1f} s = "
                  f"{rates[workers]:.1f} runs/min")
    print(f"speed-up 2 vs 1 workers: {rates[2] / rates[1]:.2f}x on {os.cpu_count()} cores "
          f"(backend {args.backend}, {args.t_stop_ms:g} ms per run; load average "
          f"{os.getloadavg()[0]:.1f} - other processes on the machine lower the speed-up)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
