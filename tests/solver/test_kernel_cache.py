"""The on-disk kernel cache, seen from a later process.

A kernel compiled by one process must load from the cache in the next one (the
module holding the generated source has to be registered under its own name for
numba to find its globals again) and give the same numbers.
"""

from __future__ import annotations

import numpy as np
import pytest

from .fresh_process import RUN_HH_CELL, python_in_fresh_process

pytest.importorskip("numba")


def test_a_cached_kernel_loads_in_a_new_process(tmp_path):
    cache = str(tmp_path / "kernels")
    first = python_in_fresh_process(RUN_HH_CELL, str(tmp_path / "first.npy"),
                                    CABLETREE_KERNEL_DIR=cache)
    second = python_in_fresh_process(RUN_HH_CELL, str(tmp_path / "second.npy"),
                                     CABLETREE_KERNEL_DIR=cache)
    assert first.split()[1] == "0"   # compiled
    assert second.split()[1] == "1"  # loaded from the cache
    a = np.load(tmp_path / "first.npy")
    assert a.max() > 0.0
    assert np.array_equal(a, np.load(tmp_path / "second.npy"))
