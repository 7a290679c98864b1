"""Tests of cabletree.sweep: specs, expansion, engines, store, restart, failures, demo sweep."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from cabletree import sweep
from cabletree.errors import ScenarioError
from cabletree.scenario import load_scenario

REPO = Path(__file__).resolve().parents[1]

# A small Hodgkin-Huxley ball and stick (HH 1952 channels on the soma), fast with the numpy
# reference backend; 3 x 2 grid x 2 zipped = 12 runs.
TINY = """
[morphology]
synthetic = "ball_and_stick"
[grid]
max_length_um = 40.0
[channels.na]
channel = "hh_na"
gmax = 0.12
selector = { swc_types = ["soma"] }
[channels.k]
channel = "hh_k"
gmax = 0.036
selector = { swc_types = ["soma"] }
[sites.soma]
soma = true
[sites.dend]
swc_types = ["basal"]
path_distance_um = [100.0]
[inputs.step]
type = "step"
site = "soma"
amplitude_nA = 1.0
delay_ms = 1.0
duration_ms = 3.0
[run]
t_stop_ms = T_STOP
dt_ms = 0.05
backend = "reference"
seed = 3
[analysis.spikes]
onset_ms = 1.0
[sweep.grid]
"inputs.step.amplitude_nA" = [1.0, 2.0, 3.0]
"channels.k.gmax" = [0.02, 0.036]
[sweep.zip]
"inputs.step.delay_ms" = [1.0, 2.0]
"inputs.step.duration_ms" = [3.0, 2.0]
"""


def write_tiny(folder: Path, t_stop_ms: float = 8.0, extra: str = "") -> Path:
    path = folder / "tiny.toml"
    path.write_text(TINY.replace("T_STOP", repr(t_stop_ms)) + extra, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    return load_scenario(write_tiny(tmp_path_factory.mktemp("tiny")))


@pytest.fixture(scope="module")
def serial_result(tiny, tmp_path_factory):
    """The 12-run sweep run one by one in this process."""
    return sweep.run_sweep(tiny, tmp_path_factory.mktemp("serial"), engine="serial",
                           progress=None)


def numbers(ds: xr.Dataset) -> xr.Dataset:
    """The numerical content of a sweep Dataset (attrs and per-run provenance dropped)."""
    out = ds.drop_vars(["error", "run_hash"])
    out.attrs = {}
    return out


# --------------------------------------------------------------------------------------------
# Specification
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("key, units", [
    # CF / UDUNITS unit strings (CF conventions, "units" attribute), spelt by the key suffix
    ("run.t_stop_ms", "ms"),
    ("inputs.step.amplitude_nA", "nA"),
    ("channels.ka.gmax", "S cm-2"),  # gmax is S/cm² in scenario files (cabletree.scenario)
    ("channels.ka.gmax.value_at_zero", "S cm-2"),
    ("channels.ka.gmax.slope_per_um", "S cm-2 um-1"),
    ("membrane.leak_S_per_cm2", "S cm-2"),
    ("membrane.axial_resistivity_ohm_cm", "ohm cm"),
    ("inputs.syn.weight_nS", "nS"),
    ("channels.ka.block_fraction", "1"),
    ("sites.apical.path_distance_um.0", None),
    ("morphology.file", None),
])
def test_key_units(key, units):
    assert sweep.key_units(key) == units


def test_parse_spec_axes_and_counts():
    spec = sweep.parse_sweep_spec({"grid": {"a.x_ms": [1, 2, 3], "b.x_ms": [0.5, 1.0]},
                                   "zip": {"c.p": [1, 2], "c.q": [3, 4]}, "repeats": 2,
                                   "morphologies": ["m1.swc", "m2.swc"]})
    axes = spec.axes()
    assert [a.dim for a in axes] == ["morphology", "a_x_ms", "b_x_ms", "zip", "repeat"]
    assert spec.n_runs() == 2 * 3 * 2 * 2 * 2
    assert axes[3].points == ((1, 3), (2, 4))


@pytest.mark.parametrize("raw, message", [
    ({"grids": {}}, "unknown key(s) ['grids']"),
    ({"grid": {"a.b": []}}, "expected a non-empty list"),
    ({"grid": {"a.b": [1, 1]}}, "values must be distinct"),
    ({"zip": {"a.b": [1, 2], "a.c": [1]}}, "same length"),
    ({"grid": {"a.b": [1]}, "zip": {"a.b": [2]}}, "swept more than once"),
    ({"repeats": 0}, "whole number >= 1"),
    ({"grid": {"a.b": [[1, 2]]}}, "numbers, booleans or strings"),
])
def test_parse_spec_errors(raw, message):
    with pytest.raises(ScenarioError, match="here") as info:
        sweep.parse_sweep_spec(raw, where="here")
    assert message in str(info.value)


def test_command_line_overrides():
    assert sweep.parse_assignment("run.seed=1,2") == ("run.seed", (1, 2))
    assert sweep.parse_assignment("morphology.file=a.swc,b.swc") == ("morphology.file",
                                                                     ("a.swc", "b.swc"))
    with pytest.raises(ScenarioError, match="KEY=V1"):
        sweep.parse_assignment("run.seed")
    spec = sweep.parse_sweep_spec({"grid": {"a.b": [1, 2], "c.d": [3, 4]}})
    new = sweep.override_spec(spec, grid=["a.b=5,6,7"], repeats=3)
    assert dict(new.grid) == {"c.d": (3, 4), "a.b": (5, 6, 7)}
    assert new.repeats == 3 and new.n_runs() == 2 * 3 * 3


# --------------------------------------------------------------------------------------------
# Expansion: seeds and hashes
# --------------------------------------------------------------------------------------------

def test_expand_runs_seeds_and_hashes(tiny):
    spec = sweep._spec_of(tiny)
    runs = sweep.expand_runs(tiny, spec)
    assert len(runs) == 12
    assert len({r.run_hash for r in runs}) == 12
    assert len({r.seed for r in runs}) == 12
    assert all(r.scenario.data["run"]["seed"] == r.seed for r in runs)
    # reproducible: the same sweep gives the same seeds and hashes
    assert [r.run_hash for r in sweep.expand_runs(tiny, spec)] == [r.run_hash for r in runs]
    # adding a value changes no existing run; editing the [sweep] table neither
    wider = sweep.override_spec(spec, grid=["inputs.step.amplitude_nA=1.0,2.0,3.0,4.0"])
    more = sweep.expand_runs(tiny, wider)
    assert {r.run_hash for r in runs} < {r.run_hash for r in more}
    assert len(more) == 16
    # a changed base value (not swept) changes every run's hash
    from cabletree.scenario import with_overrides
    longer = with_overrides(tiny, {"run.t_stop_ms": 9.0})
    assert not {r.run_hash for r in runs} & {r.run_hash for r in sweep.expand_runs(longer, spec)}


def test_changed_scenario_invalidates_only_affected_runs(tiny, tmp_path):
    spec = sweep.parse_sweep_spec({"grid": {"inputs.step.amplitude_nA": [1.0, 2.0]}})
    first = sweep.run_sweep(tiny, tmp_path, spec=spec, engine="serial", progress=None)
    assert first.n_computed == 2
    spec2 = sweep.parse_sweep_spec({"grid": {"inputs.step.amplitude_nA": [1.0, 2.0, 3.0]}})
    second = sweep.run_sweep(tiny, tmp_path, spec=spec2, engine="serial", progress=None)
    assert (second.n_computed, second.n_skipped) == (1, 2)
    xr.testing.assert_identical(numbers(first.dataset),
                                numbers(second.dataset.sel(amplitude_nA=[1.0, 2.0])))


# --------------------------------------------------------------------------------------------
# The combined Dataset
# --------------------------------------------------------------------------------------------

def test_combined_dataset_is_labelled(tiny, serial_result):
    ds = serial_result.dataset
    assert dict(ds["run_status"].sizes) == {"amplitude_nA": 3, "gmax": 2, "zip": 2}
    assert ds["amplitude_nA"].attrs["units"] == "nA"
    assert ds["amplitude_nA"].attrs["key_path"] == "inputs.step.amplitude_nA"
    assert ds["gmax"].attrs["units"] == "S cm-2"
    assert ds["delay_ms"].dims == ("zip",)
    assert (ds["run_status"] == "ok").all()
    # each point of the Dataset is the run with those values, run alone
    from cabletree.scenario import run_scenario, with_overrides
    point = ds.sel(amplitude_nA=2.0, gmax=0.02).isel(zip=1)
    run = run_scenario(with_overrides(tiny, {
        "inputs.step.amplitude_nA": 2.0, "channels.k.gmax": 0.02, "inputs.step.delay_ms": 2.0,
        "inputs.step.duration_ms": 2.0, "run.seed": int(point["seed"])}))
    np.testing.assert_array_equal(point["v"].values, run["v"].values)
    # the file on disk holds the same
    on_disk = xr.open_dataset(serial_result.out_dir / "sweep.nc", engine="scipy").load()
    np.testing.assert_array_equal(on_disk["v"].values, ds["v"].values)
    # one feature table per kind, one row per run and site, with the swept values as columns
    table = (serial_result.out_dir / "features_spikes.csv").read_text().splitlines()
    assert len(table) == 1 + 12 * 2
    header = table[0].split(",")
    for column in ("amplitude_nA", "gmax_S_per_cm2", "delay_ms", "site", "spikes_spike_count"):
        assert column in header


# --------------------------------------------------------------------------------------------
# Engines give the same numbers
# --------------------------------------------------------------------------------------------

def test_process_engine_matches_serial(tiny, serial_result, tmp_path):
    report = sweep.run_sweep(tiny, tmp_path, engine="processes", workers=2, progress=None)
    assert report.n_computed == 12 and not report.failures
    xr.testing.assert_identical(numbers(report.dataset), numbers(serial_result.dataset))


def test_dask_local_cluster_matches_serial(tiny, serial_result, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        report = sweep.run_sweep(tiny, tmp_path, scheduler=cluster.scheduler_address,
                                 progress=None)
    assert report.n_computed == 12 and not report.failures
    xr.testing.assert_identical(numbers(report.dataset), numbers(serial_result.dataset))


# --------------------------------------------------------------------------------------------
# Interrupt and restart
# --------------------------------------------------------------------------------------------

def test_interrupted_sweep_restarts_without_recomputing(tmp_path):
    path = write_tiny(tmp_path, t_stop_ms=40.0)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "cabletree.sweep", str(path), "--out", str(out), "--serial",
           "--quiet"]
    proc = subprocess.Popen(cmd, start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    try:
        while len(list((out / "runs").glob("*.nc"))) < 3:
            assert proc.poll() is None, proc.stderr.read().decode()
            assert time.monotonic() < deadline
            time.sleep(0.02)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
    done = {p.name: p.stat().st_mtime_ns for p in (out / "runs").glob("*.nc")}
    assert 3 <= len(done) < 12, "the sweep was not interrupted mid-way"
    assert not (out / "sweep.nc").exists()
    for finished in done:  # every stored run is complete (a kill mid-write leaves only a .tmp)
        xr.open_dataset(out / "runs" / finished, engine="scipy").close()

    scenario = load_scenario(path)
    report = sweep.run_sweep(scenario, out, engine="serial", progress=None)
    assert (report.n_skipped, report.n_computed) == (len(done), 12 - len(done))
    assert {p.name: p.stat().st_mtime_ns for p in (out / "runs").glob("*.nc")
            if p.name in done} == done
    assert not list((out / "runs").glob(".*.tmp")), "stale temporary files are cleaned up"
    fresh = sweep.run_sweep(scenario, tmp_path / "fresh", engine="serial", progress=None)
    xr.testing.assert_identical(numbers(report.dataset), numbers(fresh.dataset))


# --------------------------------------------------------------------------------------------
# Failures
# --------------------------------------------------------------------------------------------

def test_failing_combinations_are_recorded_and_the_others_complete(tmp_path, capsys):
    # amplitude 0 nA fires no spike, so the bAP analysis fails in the worker; block fraction
    # 1.5 is not a valid scenario (checked before any run); both are recorded
    extra = "\n[analysis.bap]\nwindow_ms = [0.5, 8.0]\n"
    path = write_tiny(tmp_path, extra=extra)
    text = path.read_text().replace('"inputs.step.amplitude_nA" = [1.0, 2.0, 3.0]',
                                    '"inputs.step.amplitude_nA" = [0.0, 2.0, 3.0]')
    text = text.replace('[sweep.zip]\n"inputs.step.delay_ms" = [1.0, 2.0]\n'
                        '"inputs.step.duration_ms" = [3.0, 2.0]\n',
                        '[sweep.zip]\n"channels.k.block_fraction" = [0.0, 1.5]\n')
    path.write_text(text)
    out = tmp_path / "out"
    code = sweep.main([str(path), "--out", str(out), "--workers", "2", "--quiet"])
    assert code == sweep.EXIT_RUNS_FAILED == 4
    ds = xr.open_dataset(out / "sweep.nc", engine="scipy").load()
    status = ds["run_status"].values
    # 3 amplitudes x 2 gmax x 2 zipped: block 1.5 fails everywhere (6), amplitude 0 with
    # block 0 fails in the analysis (2), 4 runs succeed
    assert (status == "ok").sum() == 4 and (status == "failed").sum() == 8
    bad = ds.sel(amplitude_nA=0.0).isel(zip=0)
    assert (bad["run_status"] == "failed").all()
    assert "no spike" in str(bad["error"].values[0])
    assert np.isnan(bad["bap_amplitude_mV"].values).all()
    good = ds.sel(amplitude_nA=2.0).isel(zip=0)
    assert (good["run_status"] == "ok").all() and np.isfinite(good["bap_amplitude_mV"]).all()
    records = [json.loads(p.read_text()) for p in (out / "runs").glob("*.error.json")]
    assert len(records) == 8
    invalid = [r for r in records if r["parameters"]["channels.k.block_fraction"] == 1.5]
    assert len(invalid) == 6 and all(r["error_type"] == "ScenarioError" for r in invalid)
    assert all("block_fraction" in r["message"] for r in invalid)
    assert "FAILED" in capsys.readouterr().err


# --------------------------------------------------------------------------------------------
# Dry run, repeats, plot
# --------------------------------------------------------------------------------------------

def test_dry_run_counts_and_estimates(tiny, tmp_path, capsys):
    est = sweep.dry_run(tiny, tmp_path, workers=2)
    assert (est.n_runs, est.n_pending) == (12, 12)
    assert est.calibration_s > 0 and est.estimated_s > 0
    # traces of 161 times x 2 sites (float64) dominate one run's size
    assert est.run_bytes >= 161 * 2 * 8 and est.output_bytes == 12 * est.run_bytes
    assert not (tmp_path / "runs").exists() or not list((tmp_path / "runs").iterdir())
    assert sweep.main([str(tiny.source_path), "--out", str(tmp_path), "--dry-run"]) == 0
    assert "12 runs" in capsys.readouterr().out


def test_repeats_have_distinct_stored_seeds(tiny, tmp_path):
    spec = sweep.parse_sweep_spec({"grid": {"inputs.step.amplitude_nA": [2.0]}, "repeats": 3,
                                   "seed": 11, "traces": False})
    report = sweep.run_sweep(tiny, tmp_path, spec=spec, engine="serial", progress=None)
    ds = report.dataset
    assert dict(ds["seed"].sizes) == {"amplitude_nA": 1, "repeat": 3}
    assert len(set(ds["seed"].values.ravel())) == 3
    assert "v" not in ds and "spikes_spike_count" in ds
    again = sweep.run_sweep(tiny, tmp_path / "again", spec=spec, engine="serial", progress=None)
    np.testing.assert_array_equal(again.dataset["seed"].values, ds["seed"].values)


def test_plot_sweep_feature(serial_result):
    import matplotlib
    matplotlib.use("Agg")
    lines = sweep.plot_sweep_feature(serial_result.dataset, "spikes_first_spike_latency_ms",
                                     "amplitude_nA", site="soma", hue="gmax")
    assert len(lines) == 2
    np.testing.assert_array_equal(lines[0].get_xdata(), [1.0, 2.0, 3.0])
    assert lines[0].axes.get_xlabel() == "amplitude_nA (nA)"


# --------------------------------------------------------------------------------------------
# The demo sweep: direction of the A-type effect
# --------------------------------------------------------------------------------------------

@pytest.mark.slow
def test_demo_sweep_more_a_type_gives_smaller_distal_bap(tmp_path):
    # Hoffman, Magee, Colbert & Johnston 1997, Nature 387:869-875 (from memory, REFERENCES
    # §3(b)): blocking the dendritic A-type current markedly increased distal bAP amplitude.
    # Short runs on a coarser grid keep the test fast; the direction is what is checked.
    from cabletree.scenario import with_overrides
    demo = load_scenario(REPO / "scenarios" / "sweep_ka_gradient.toml")
    short = with_overrides(demo, {"run.t_stop_ms": 12.0,
                                  "run.dt_ms": 0.05, "run.record_interval_ms": 0.05,
                                  "run.backend": "reference", "grid.max_length_um": 40.0,
                                  "grid.lambda_fraction": 0.3,
                                  "analysis.bap.window_ms": [4.0, 12.0]})
    spec = sweep.override_spec(
        sweep._spec_of(demo), grid=["channels.ka_gradient.gmax.slope_per_um=0.0,0.000822857",
                                    "channels.ka_gradient.block_fraction=0.0,0.9"])
    report = sweep.run_sweep(short, tmp_path, spec=spec, engine="serial", progress=None)
    assert not report.failures
    amp = report.dataset["bap_amplitude_mV"].sel(site="apical_300um")
    slope, block = "slope_per_um", "block_fraction"
    assert report.dataset[slope].attrs["units"] == "S cm-2 um-1"
    # steeper gradient, no block: smaller distal bAP
    assert float(amp.sel({slope: 0.000822857, block: 0.0})) < float(amp.sel({slope: 0.0, block: 0.0}))
    # steep gradient: 90 % block gives a larger distal bAP
    assert float(amp.sel({slope: 0.000822857, block: 0.9})) > float(amp.sel({slope: 0.000822857, block: 0.0}))
    # the somatic spike changes much less than the distal one (Hoffman 1997, from memory)
    soma = report.dataset["bap_amplitude_mV"].sel(site="soma")
    assert float(np.ptp(soma.values)) < float(np.ptp(amp.values))
    import matplotlib
    matplotlib.use("Agg")
    lines = sweep.plot_sweep_feature(report.dataset, "bap_amplitude_mV", slope,
                                     site="apical_300um", hue=block)
    assert len(lines) == 2
