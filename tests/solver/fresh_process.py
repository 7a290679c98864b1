"""Running cabletree in a new Python process, for what one process cannot show.

numba fixes the processor features when it first compiles, and its on-disk cache
only matters to a later process, so tests of either start a fresh interpreter.
"""

from __future__ import annotations

import os
import subprocess
import sys

HOST_HAS_AVX512 = r"""
from llvmlite import binding as llvm
print(bool(llvm.get_host_cpu_features().get("avx512f", False)))
"""

RUN_HH_CELL = r"""
import sys
import numpy as np
from cabletree.solver import compiled
from cabletree.cell import build_cell, CurrentInjection, Membrane
from cabletree.channels import hh_sodium, hh_potassium
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.profiles import ChannelPlacement
from cabletree.sites import all_compartment_sites, soma_site
from cabletree.solver import RunSettings, simulate
base = build_cell(synthetic.random_tree(8, seed=3, samples_per_branch=3),
                  membrane=Membrane(leak_S_per_cm2=3e-4, leak_reversal_mV=-54.387),
                  channels=[ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036)])
cell = base.with_inputs(recording_sites=all_compartment_sites(base.grid),
                        injections=[CurrentInjection(soma_site(base.grid), StepCurrent(0.5, 1.0, 5.0))])
res = simulate(cell, RunSettings(8.0, 0.025), backend="compiled")
np.save(sys.argv[1], res.v_mV)
kernel, = compiled._KERNELS.values()
print(compiled.WIDE_VECTORS, sum(kernel.stats.cache_hits.values()))
"""
"""A small spiking HH cell run by the compiled backend: saves the potentials to
``argv[1]`` and prints whether 512-bit vectors were used and how many kernels
came from numba's on-disk cache."""


def python_in_fresh_process(code: str, *args: str, **env: str) -> str:
    """Run ``code`` with ``args`` in a new interpreter (extra environment ``env``).

    Returns the last line it printed; a non-zero exit raises CalledProcessError.
    """
    environment = dict(os.environ, **env)
    out = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                         env=environment, timeout=600, check=True)
    return out.stdout.strip().splitlines()[-1]
