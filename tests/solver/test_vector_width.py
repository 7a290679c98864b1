"""The compiled kernel's vector width (``cabletree.solver.compiled.WIDE_VECTORS``) and
exponential method (``EXPONENTIAL_METHOD``).

512-bit vectors only change how many compartments one instruction handles: the
kernel's floating-point flags forbid re-association, so every compartment sees
the same operations in the same order and the results must be identical to the
bit (IEEE 754 arithmetic is deterministic for a fixed sequence of operations).
Each case runs in a fresh process, because numba fixes the processor features
when it first compiles.
"""

from __future__ import annotations

import numpy as np
import pytest

from .fresh_process import HOST_HAS_AVX512, RUN_HH_CELL, python_in_fresh_process as _python

pytest.importorskip("numba")

def test_opt_out_and_late_import_keep_the_default_width():
    # CABLETREE_VECTOR_BITS=256 opts out; a process that compiled something with
    # numba before importing cabletree keeps numba's features as they are
    opt_out = "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)"
    assert _python(opt_out, CABLETREE_VECTOR_BITS="256") == "False"
    late = ("import numba\nnumba.njit(lambda x: x + 1)(1)\n"
            "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)")
    assert _python(late) == "False"
    default = "import cabletree.solver.compiled as c; print(c.WIDE_VECTORS)"
    assert _python(default) == _python(HOST_HAS_AVX512)


@pytest.mark.slow
def test_results_identical_at_either_vector_width(tmp_path):
    # reference: determinism of IEEE 754 arithmetic for a fixed operation order
    # (no re-association flag is given to the compiler), so the width may change
    # speed only
    if _python(HOST_HAS_AVX512) != "True":
        pytest.skip("the processor has no AVX-512: both runs would use the same width")
    # separate kernel caches, so that each run compiles its own machine code
    wide = _python(RUN_HH_CELL, str(tmp_path / "wide.npy"),
                   CABLETREE_KERNEL_DIR=str(tmp_path / "wide_kernels"))
    narrow = _python(RUN_HH_CELL, str(tmp_path / "narrow.npy"),
                     CABLETREE_KERNEL_DIR=str(tmp_path / "narrow_kernels"),
                     CABLETREE_VECTOR_BITS="256")
    assert (wide.split()[0], narrow.split()[0]) == ("True", "False")
    a = np.load(tmp_path / "wide.npy")
    b = np.load(tmp_path / "narrow.npy")
    assert a.max() > 0.0  # the cell fired
    assert np.array_equal(a, b)


@pytest.mark.slow
def test_results_agree_with_either_exponential_method(tmp_path):
    # reference: both methods are within 2 ulp of libm (test_fast_exp_matches_libm),
    # so a spiking run differs by rounding only; 1e-9 relative is the tolerance the
    # compiled and reference backends are held to
    runs = {}
    for method in ("table", "polynomial"):
        _python(RUN_HH_CELL, str(tmp_path / f"{method}.npy"),
                CABLETREE_KERNEL_DIR=str(tmp_path / f"{method}_kernels"), CABLETREE_EXP=method)
        runs[method] = np.load(tmp_path / f"{method}.npy")
    a, b = runs["table"], runs["polynomial"]
    assert a.max() > 0.0  # the cell fired
    np.testing.assert_allclose(b, a, rtol=1e-9, atol=1e-9 * np.max(np.abs(a)))
