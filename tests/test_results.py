"""Results Dataset: schema, units, exact NetCDF round trip, atomic writes; solver errors."""

import numpy as np
import pytest
import xarray as xr

from cabletree.cell import CurrentInjection, Membrane, build_cell
from cabletree.errors import NumericalInstabilityError, ResultsError, SolverError
from cabletree.inputs import StepCurrent
from cabletree.morphology import synthetic
from cabletree.results import load_dataset, make_dataset, save_dataset
from cabletree.sites import Site, site_at_distance
from cabletree.solver import RunSettings, SolverState, simulate


@pytest.fixture(scope="module")
def run():
    morph = synthetic.ball_and_stick(20.0, 300.0, 2.0)
    cell = build_cell(morph, injections=[CurrentInjection(Site("soma", 0), StepCurrent(0.1, 1.0, 5.0))])
    site = site_at_distance(cell.grid, 150.0, swc_types=(3,), name="basal_150um")
    cell = cell.with_inputs(recording_sites=[Site("soma", 0), site])
    out = simulate(cell, RunSettings(t_stop_ms=10.0, dt_ms=0.05, record_interval_ms=0.5))
    return cell, out


def test_schema_and_units(run):
    cell, out = run
    ds = make_dataset(cell, out, scenario_text="# demo")
    assert ds["v"].dims == ("time", "site")
    assert list(ds["site"].values) == ["soma", "basal_150um"]
    for name in ("time", "path_distance_um", "x_um", "diameter_um", "v", "compartment_area_um2"):
        assert "units" in ds[name].attrs and "long_name" in ds[name].attrs
    assert ds["path_distance_um"].sel(site="basal_150um") == pytest.approx(150.0, abs=10.0)
    assert ds.attrs["method"] == "crank_nicolson" and ds.attrs["dt_ms"] == 0.05
    assert ds.sizes["time"] == 21


def test_netcdf_round_trip_is_exact(run, tmp_path):
    cell, out = run
    ds = make_dataset(cell, out, scenario_text="[run]\nt_stop_ms = 10.0\n")
    path = tmp_path / "r.nc"
    save_dataset(ds, path)
    back = load_dataset(path)
    xr.testing.assert_identical(ds, back)
    assert not list(tmp_path.glob("*.tmp"))


def test_failed_write_leaves_nothing(run, tmp_path):
    cell, out = run
    ds = make_dataset(cell, out)
    ds["bad"] = ("site", np.array([2 ** 40, 1], dtype=np.int64))
    with pytest.raises(ResultsError, match="does not fit in 32-bit"):
        save_dataset(ds, tmp_path / "r.nc")
    assert list(tmp_path.iterdir()) == []


def test_saved_state_continues_exactly(run, tmp_path):
    # Running 10 ms, saving the state and continuing equals one 20 ms run.
    cell, _ = run
    full = simulate(cell, RunSettings(t_stop_ms=20.0, dt_ms=0.05, method="backward_euler"))
    first = simulate(cell, RunSettings(t_stop_ms=10.0, dt_ms=0.05, method="backward_euler"))
    first.final_state.save(tmp_path / "s.npz")
    state = SolverState.load(tmp_path / "s.npz")
    second = simulate(cell, RunSettings(t_stop_ms=10.0, dt_ms=0.05, method="backward_euler"),
                      initial_state=state)
    np.testing.assert_allclose(second.v_mV[-1], full.v_mV[-1], rtol=1e-12)
    assert second.time_ms[-1] == pytest.approx(20.0)


def test_runaway_names_time_and_compartment():
    # A huge current with a large dt drives the passive cell beyond ±1000 mV.
    cell = build_cell(synthetic.ball_and_stick(20.0, 100.0, 2.0),
                      injections=[CurrentInjection(Site("soma", 0), StepCurrent(1e6, 1.0, 5.0))])
    with pytest.raises(NumericalInstabilityError, match=r"at compartment 0 .* at t = 1\.") as info:
        simulate(cell, RunSettings(t_stop_ms=5.0, dt_ms=0.1))
    assert info.value.compartment == 0 and 1.0 < info.value.time_ms <= 1.2


def test_settings_validation():
    with pytest.raises(SolverError, match="unknown method 'rk4'"):
        RunSettings(t_stop_ms=1.0, method="rk4")
    with pytest.raises(SolverError, match="whole multiple of dt_ms"):
        RunSettings(t_stop_ms=1.0, dt_ms=0.1, record_interval_ms=0.15)
