"""Progress reporting splits a run into pieces without changing its result."""

import numpy as np
import pytest

from cabletree.cell import CurrentInjection, build_cell
from cabletree.channels.hh1952 import hh_potassium, hh_sodium
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.profiles import ChannelPlacement
from cabletree.sites import Site
from cabletree.solver import RunSettings, available_backends, simulate


@pytest.mark.parametrize("backend", available_backends())
@pytest.mark.parametrize("method", ["crank_nicolson", "backward_euler"])
def test_pieces_equal_one_run(backend, method):
    cell = build_cell(synthetic.ball_and_stick(20.0, 200.0, 2.0),
                      channels=(ChannelPlacement(hh_sodium, 0.12), ChannelPlacement(hh_potassium, 0.036)),
                      injections=[CurrentInjection(Site("soma", 0), StepCurrent(0.3, 2.0, 10.0))])
    settings = RunSettings(t_stop_ms=20.0, dt_ms=0.025, method=method, record_interval_ms=0.1)
    whole = simulate(cell, settings, backend=backend)
    seen = []
    parts = simulate(cell, settings, backend=backend, progress=lambda f, t: seen.append((f, t)),
                     progress_chunks=7)
    np.testing.assert_allclose(parts.v_mV, whole.v_mV, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(parts.time_ms, whole.time_ms)
    # first a 0 once the backend is ready (after any kernel compile), then one per piece
    assert seen[0] == (0.0, 0.0)
    assert len(seen) == 8 and seen[-1][0] == pytest.approx(1.0) and seen[-1][1] == pytest.approx(20.0)
    assert all(a[0] < b[0] for a, b in zip(seen, seen[1:]))
    assert whole.v_mV.max() > 0  # it spiked, so the comparison covers active dynamics
