"""Shared helpers of the morphology tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).resolve().parents[1] / "data"


def _assert_same_samples(a, b):
    """Identical sample arrays (ids, types, positions, radii, parents) and soma."""
    for name in ("sample_id", "swc_type", "xyz_um", "radius_um", "parent_index"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert a.soma_kind == b.soma_kind
    assert a.soma_radius_um == b.soma_radius_um
    if a.soma_center_um is None:
        assert b.soma_center_um is None
    else:
        np.testing.assert_array_equal(a.soma_center_um, b.soma_center_um)


def _tree_by_id(m):
    """{id: (type, x, y, z, radius, parent id)}: the tree independent of storage order."""
    pid = np.where(m.parent_index < 0, -1, m.sample_id[np.maximum(m.parent_index, 0)])
    return {
        int(i): (int(t), *map(float, p), float(r), int(q))
        for i, t, p, r, q in zip(m.sample_id, m.swc_type, m.xyz_um, m.radius_um, pid)
    }


@pytest.fixture(scope="session")
def assert_same_samples():
    return _assert_same_samples


@pytest.fixture(scope="session")
def tree_by_id():
    return _tree_by_id


@pytest.fixture(scope="session")
def data_dir():
    return DATA
