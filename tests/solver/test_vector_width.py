"""The compiled kernel's vector width (``cabletree.solver.compiled.WIDE_VECTORS``).

512-bit vectors only change how many compartments one instruction handles: the
kernel's floating-point flags forbid re-association, so every compartment sees
the same operations in the same order and the results must be identical to the
bit (IEEE 754 arithmetic is deterministic for a fixed sequence of operations).
Each case runs in a fresh process, because numba fixes the processor features
when it first compiles.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

pytest.importorskip("numba")

_HOST_HAS_AVX512 = r"""
from llvmlite import binding as llvm
print(bool(llvm.get_host_cpu_features().get("avx512f", False)))
"""

_RUN = r"""
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
print(compiled.WIDE_VECTORS)
"""


def _python(code: str, *args: str, **env: str) -> str:
    environment = dict(os.environ, **env)
    out = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                         env=environment, timeout=600, check=True)
    return out.stdout.strip().splitlines()[-1]


def test_opt_out_and_late_import_keep_the_default_width():
    # CABLETREE_VECTOR_BITS=256 opts out; a process that compiled something with
    # numba before importing cabletree keeps numba's features as they are
    opt_out = "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)"
    assert _python(opt_out, CABLETREE_VECTOR_BITS="256") == "False"
    late = ("import numba\nnumba.njit(lambda x: x + 1)(1)\n"
            "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)")
    assert _python(late) == "False"
    default = "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)"
    assert _python(default) == _python(_HOST_HAS_AVX512)


@pytest.mark.slow
def test_results_identical_at_either_vector_width(tmp_path):
    # reference: determinism of IEEE 754 arithmetic for a fixed operation order
    # (no re-association flag is given to the compiler), so the width may change
    # speed only
    if _python(_HOST_HAS_AVX512) != "True":
        pytest.skip("the processor has no AVX-512: both runs would use the same width")
    # separate kernel caches, so that each run compiles its own machine code
    wide = _python(_RUN, str(tmp_path / "wide.npy"),
                   CABLETREE_KERNEL_DIR=str(tmp_path / "wide_kernels"))
    narrow = _python(_RUN, str(tmp_path / "narrow.npy"),
                     CABLETREE_KERNEL_DIR=str(tmp_path / "narrow_kernels"),
                     CABLETREE_VECTOR_BITS="256")
    assert (wide, narrow) == ("True", "False")
    a = np.load(tmp_path / "wide.npy")
    b = np.load(tmp_path / "narrow.npy")
    assert a.max() > 0.0  # the cell fired
    assert np.array_equal(a, b)
