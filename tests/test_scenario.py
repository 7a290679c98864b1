"""Scenario files: every demo validates and runs (short variants), each validation error is
pinned, dump/load round trip, overrides, threshold bisection."""

from __future__ import annotations

import copy
import math
from pathlib import Path

import numpy as np
import pytest

from cabletree.errors import ScenarioError
from cabletree.scenario import (build_cell_model, dump_scenario, get_value, load_scenario,
                                run_scenario, save_scenario, scenario_from_dict, scenario_seeds,
                                validate, with_overrides)
from cabletree.threshold import find_threshold

SCENARIOS = Path(__file__).resolve().parents[1] / "scenarios"
ALL = sorted(SCENARIOS.glob("*.toml"))

#: Short variants: enough time for the stimulus and its response, no settling.
SHORT = {
    "bap_gradient.toml": {"run.t_stop_ms": 12.0, "analysis.bap.window_ms": [4.0, 12.0]},
    "bap_uniform.toml": {"run.t_stop_ms": 12.0, "analysis.bap.window_ms": [4.0, 12.0]},
    "bap_block.toml": {"run.t_stop_ms": 12.0, "analysis.bap.window_ms": [4.0, 12.0]},
    "distal_burst.toml": {"inputs.tuft_ampa.events.spikes_per_burst": 2,
                          "inputs.tuft_nmda.events.spikes_per_burst": 2, "run.t_stop_ms": 25.0},
    "distal_burst_block.toml": {"inputs.tuft_ampa.events.spikes_per_burst": 2,
                                "inputs.tuft_nmda.events.spikes_per_burst": 2,
                                "run.t_stop_ms": 25.0},
    "dendritic_spike_threshold.toml": {"run.t_stop_ms": 20.0},
}


def short(path: Path):
    s = load_scenario(path)
    return with_overrides(s, {"run.settle_ms": 0.0, "run.v_init_mV": -70.0, **SHORT[path.name]})


def test_demo_set_is_complete():
    assert set(SHORT) <= {p.name for p in ALL}


@pytest.mark.parametrize("path", ALL, ids=lambda p: p.name)
def test_every_scenario_file_validates(path):
    s = load_scenario(path)
    cell, settings = build_cell_model(s)
    assert cell.n_compartments > 1 and settings.t_stop_ms > 0


@pytest.mark.parametrize("path", [SCENARIOS / n for n in sorted(SHORT)], ids=lambda p: p.name)
def test_demo_scenario_validates_and_runs(path):
    from cabletree.report import compute_features

    s = short(path)
    ds = run_scenario(s, backend="reference")
    assert np.all(np.isfinite(ds["v"].values))
    assert ds.attrs["scenario"] == dump_scenario(s)
    assert "run.seed=1" in ds.attrs["seeds"]
    features = compute_features(ds, s.analysis_spec)
    assert features  # every demo asks for features


@pytest.fixture(scope="module")
def bap_short():
    from cabletree.analysis import bap_features

    out = {}
    for name in ("bap_gradient.toml", "bap_block.toml"):
        ds = run_scenario(short(SCENARIOS / name), backend="reference")
        out[name] = bap_features(ds, window_ms=(4.0, 12.0))
    return out


def test_bap_backpropagates_and_block_increases_distal_amplitude(bap_short):
    # Hoffman et al 1997 (Nature 387:869-875): the A-type gradient makes the bAP amplitude
    # decline with distance, and blocking the A-type current increases the distal bAP.
    g = bap_short["bap_gradient.toml"]
    b = bap_short["bap_block.toml"]
    amp_g = g["amplitude_mV"].values
    dist = g["path_distance_um"].values
    far = dist > 250
    assert amp_g[0] > 80  # a full somatic spike
    assert np.all(np.diff(amp_g[np.argsort(dist)][:6]) < 0)  # declines along the trunk
    assert np.all(b["amplitude_mV"].values[far] > amp_g[far] + 10)


# --- round trip and overrides ---------------------------------------------------------------

def base_dict():
    return {
        "morphology": {"synthetic": "ball_and_stick",
                       "parameters": {"dendrite_length_um": 300.0, "swc_type": 4}},
        "grid": {"max_length_um": 20.0},
        "membrane": {"leak_S_per_cm2": {"soma": 1e-4, "default": 5e-5}, "cm_uF_per_cm2": 1.0},
        "channels": {"ka": {"channel": "ka_proximal", "distal_channel": "ka_distal",
                            "distal_from_um": 100.0,
                            "gmax": {"kind": "linear", "value_at_zero": 0.01,
                                     "slope_per_um": 1e-4},
                            "selector": {"swc_types": ["soma", 4],
                                         "path_distance_um": [0.0, math.inf]},
                            "parameters": {"shift_mV": 0.0}}},
        "spines": {"distal": {"factor": 2.0, "selector": {"path_distance_um": [150.0, math.inf]}}},
        "sites": {"soma": {"soma": True}, "dend": {"path_distance_um": [100.0, 200.0]},
                  "tip": {"branch": 0, "position": 1.0}},
        "inputs": {"step": {"type": "step", "site": "soma", "amplitude_nA": 0.1,
                            "delay_ms": 1.0, "duration_ms": 2.0},
                   "syn": {"type": "synapse", "kinetics": "alpha", "tau_ms": 1.0,
                           "weight_nS": 0.5, "selector": {"swc_types": [4]}, "count": 3,
                           "events": {"kind": "poisson", "rate_hz": 200.0, "start_ms": 0.0,
                                      "stop_ms": 5.0, "seed": 4}}},
        "run": {"t_stop_ms": 5.0, "dt_ms": 0.05, "celsius": 34.0, "seed": 3},
        "sweep": {"anything": {"goes": [1, 2]}},
    }


def test_round_trip_dump_load(tmp_path):
    s = scenario_from_dict(base_dict())
    path = tmp_path / "s.toml"
    path.write_text(dump_scenario(s))
    again = load_scenario(path)
    assert again == s
    assert again.sweep_spec == {"anything": {"goes": [1, 2]}}  # passed through untouched


def test_save_scenario_rebases_relative_morphology(tmp_path):
    s = load_scenario(SCENARIOS / "bap_gradient.toml")
    target = save_scenario(s, tmp_path / "sub" / "copy.toml") if (tmp_path / "sub").mkdir() is None else None
    again = load_scenario(target)
    assert again.data["channels"] == s.data["channels"]
    cell_a, _ = build_cell_model(s)
    cell_b, _ = build_cell_model(again)
    assert cell_a.n_compartments == cell_b.n_compartments


def test_with_overrides_changes_value_and_revalidates():
    s = scenario_from_dict(base_dict())
    t = with_overrides(s, {"channels.ka.gmax.slope_per_um": 2e-4, "run.t_stop_ms": 6.0})
    assert get_value(t, "channels.ka.gmax.slope_per_um") == 2e-4
    assert get_value(s, "channels.ka.gmax.slope_per_um") == 1e-4  # original untouched
    cell, settings = build_cell_model(t)
    assert settings.t_stop_ms == 6.0
    with pytest.raises(ScenarioError, match=r"channels\.kx: unknown key path in override "
                                            r"'channels\.kx\.gmax'; did you mean 'ka'\?"):
        with_overrides(s, {"channels.kx.gmax": 1.0})
    with pytest.raises(ScenarioError, match=r"channels\.ka\.gmaks: unknown key; did you mean "
                                            r"'gmax'\?"):
        with_overrides(s, {"channels.ka.gmaks": 1.0})
    with pytest.raises(ScenarioError, match=r"channels\.ka\.gmax: conductances must be >= 0"):
        with_overrides(s, {"channels.ka.gmax": -1.0})


def test_seeds_are_recorded_and_reproducible():
    s = scenario_from_dict(base_dict())
    seeds = scenario_seeds(s)
    assert seeds == {"run.seed": 3, "inputs.syn.placement_seed": 3, "inputs.syn.events.seed": 4}
    a, _ = build_cell_model(s)
    b, _ = build_cell_model(s)
    assert np.array_equal(a.synapses[0].event_times_ms, b.synapses[0].event_times_ms)
    assert np.array_equal(a.synapses[0].compartment, b.synapses[0].compartment)
    c, _ = build_cell_model(with_overrides(s, {"inputs.syn.events.seed": 5}))
    assert not np.array_equal(a.synapses[0].event_times_ms, c.synapses[0].event_times_ms)


def test_block_fraction_scales_gmax_and_split_kinetics():
    s = scenario_from_dict(base_dict())
    cell, _ = build_cell_model(s)
    blocked, _ = build_cell_model(with_overrides(s, {"channels.ka.block_fraction": 0.5}))
    names = [b.channel.name for b in cell.channels]
    assert names == ["ka_proximal", "ka_distal"]
    for a, b in zip(cell.channels, blocked.channels):
        np.testing.assert_allclose(b.gmax_S_per_cm2, 0.5 * a.gmax_S_per_cm2)
    prox = cell.channels[0]
    assert cell.grid.path_distance_um[prox.index].max() < 100.0
    # linear profile: g = 0.01 + 1e-4 x
    d = cell.grid.path_distance_um[cell.channels[1].index]
    np.testing.assert_allclose(cell.channels[1].gmax_S_per_cm2, 0.01 + 1e-4 * d)


# --- each validation error, pinned ------------------------------------------------------------

def bad(change, match):
    data = base_dict()
    change(data)
    with pytest.raises(ScenarioError, match=match):
        validate(data, source="test.toml")


def test_error_unknown_key_with_suggestion():
    bad(lambda d: d["run"].update(t_stop_s=5.0),
        r"^test\.toml: run\.t_stop_s: unknown key; did you mean 't_stop_ms'\? \(allowed here: ")


def test_error_unknown_top_level_table():
    bad(lambda d: d.update(chanels={}), r"^test\.toml: chanels: unknown key; did you mean "
                                        r"'channels'\?")


def test_rate_tables_are_opt_in_from_the_run_table():
    s = scenario_from_dict(base_dict())
    assert build_cell_model(s)[1].rate_table_step_mV is None
    t = with_overrides(s, {"run.rate_table_step_mV": 0.05})
    assert build_cell_model(t)[1].rate_table_step_mV == 0.05
    bad(lambda d: d["run"].update(rate_table_step_mV=0.0),
        r"^test\.toml: run\.rate_table_step_mV: expected a number > 0 in mV, got 0\.0$")


def test_threads_come_from_the_run_table_and_reach_the_solver(monkeypatch):
    # plumbing: run.threads (validated at the boundary) reaches the compiled stepper;
    # an explicit argument of run_scenario overrides it
    from cabletree.solver import compiled
    bad(lambda d: d["run"].update(threads=0),
        r"^test\.toml: run\.threads: expected a number >= 1, got 0$")
    bad(lambda d: d["run"].update(threads=1.5),
        r"^test\.toml: run\.threads: expected an integer, got float 1\.5$")
    seen = []
    real = compiled.CompiledStepper

    def recording(cell, threads=1):
        seen.append(threads)
        return real(cell, threads=threads)

    monkeypatch.setattr(compiled, "CompiledStepper", recording)
    s = with_overrides(scenario_from_dict(base_dict()),
                       {"run.threads": 2, "run.settle_ms": 0.0})
    a = run_scenario(s, backend="compiled")
    b = run_scenario(s, backend="compiled", threads=1)
    assert seen == [2, 1]
    np.testing.assert_array_equal(a.v.values, b.v.values)  # small cell: serial either way


def test_error_missing_key():
    bad(lambda d: d["run"].pop("t_stop_ms"), r"^test\.toml: run\.t_stop_ms: missing required key$")
    bad(lambda d: d["channels"]["ka"].pop("gmax"),
        r"^test\.toml: channels\.ka\.gmax: missing required key$")


def test_error_wrong_type():
    bad(lambda d: d["run"].update(dt_ms=[0.1]),
        r"^test\.toml: run\.dt_ms: expected a number in ms, got a list \[0\.1\]$")
    bad(lambda d: d["sites"]["soma"].update(soma="yes"),
        r"^test\.toml: sites\.soma\.soma: expected true, got str 'yes'$")


def test_error_units_given_as_string():
    bad(lambda d: d["inputs"]["step"].update(delay_ms="1 ms"),
        r"^test\.toml: inputs\.step\.delay_ms: expected a plain number in ms \(units are fixed "
        r"by the key name\), got the string '1 ms'$")
    bad(lambda d: d["channels"]["ka"].update(gmax="10 mS/cm2"),
        r"^test\.toml: channels\.ka\.gmax: expected a plain number in S/cm² \(units are fixed "
        r"by the key name\) or a profile table, got the string '10 mS/cm2'$")


def test_error_negative_conductance():
    bad(lambda d: d["channels"]["ka"].update(gmax=-0.01),
        r"^test\.toml: channels\.ka\.gmax: conductances must be >= 0 S/cm², got -0\.01$")
    bad(lambda d: d["channels"]["ka"]["gmax"].update(slope_per_um=-1e-3),
        r"^test\.toml: channels\.ka\.gmax: conductances must be >= 0 S/cm², but the profile "
        r"gives -0\.\d+ at path distance \d+\.\d µm \(compartment \d+\); add floor = 0$")
    bad(lambda d: d["membrane"].update(leak_S_per_cm2=-1e-5),
        r"^test\.toml: membrane\.leak_S_per_cm2: expected a number >= 0 in S/cm², got -1e-05$")
    bad(lambda d: d["inputs"]["syn"].update(weight_nS=-1.0),
        r"^test\.toml: inputs\.syn\.weight_nS: expected a number >= 0 in nS, got -1\.0$")


def test_error_site_off_the_tree():
    bad(lambda d: d["sites"]["dend"].update(path_distance_um=[100.0, 900.0]),
        r"^test\.toml: sites\.dend\.path_distance_um\[1\]: site off the tree: no compartment "
        r"of SWC type\(s\) \(4,\) within .* of path distance 900\.0 µm \(those types reach "
        r"310\.0 µm\)$")
    bad(lambda d: d["sites"]["tip"].update(branch=7),
        r"^test\.toml: sites\.tip\.branch: branch 7 is off the tree \(the grid has branches 0-0\)$")
    bad(lambda d: d["inputs"]["step"].update(site="dendrite"),
        r"^test\.toml: inputs\.step\.site: unknown site 'dendrite'; did you mean 'dend'\? \(sites defined: soma, dend, "
        r"tip\)$")


def test_error_time_outside_run():
    bad(lambda d: d["inputs"]["step"].update(delay_ms=7.0),
        r"^test\.toml: inputs\.step\.delay_ms: time 7 ms is outside the run \[0, 5\) ms "
        r"\(run\.t_stop_ms\)$")
    bad(lambda d: d["inputs"]["syn"]["events"].update(stop_ms=9.0),
        r"^test\.toml: inputs\.syn\.events\.stop_ms: time 9 ms is outside the run \[0, 5\] ms")
    bad(lambda d: d.update(analysis={"epsp": {"onset_ms": 8.0}}),
        r"^test\.toml: analysis\.epsp\.onset_ms: time 8 ms is outside the run \[0, 5\) ms")


def test_error_unknown_choice_with_suggestion():
    bad(lambda d: d["channels"]["ka"].update(channel="ka_distl"),
        r"^test\.toml: channels\.ka\.channel: unknown value 'ka_distl'; did you mean 'ka_distal'\?")
    bad(lambda d: d["inputs"]["syn"].update(kinetics="nmdaa"),
        r"^test\.toml: inputs\.syn\.kinetics: unknown value 'nmdaa'; did you mean 'nmda'\?")


def test_error_toml_syntax_names_file_and_line(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("[run]\nt_stop_ms = = 5\n")
    with pytest.raises(ScenarioError, match=r"broken\.toml: not valid TOML: .*line 2"):
        load_scenario(p)


def test_error_missing_morphology_file(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text('[morphology]\nfile = "nothere.swc"\n[run]\nt_stop_ms = 5.0\n')
    with pytest.raises(ScenarioError, match=r"s\.toml: morphology\.file: no SWC file at .*"
                                            r"nothere\.swc \(paths are relative to the scenario"):
        load_scenario(p)


# --- threshold bisection ---------------------------------------------------------------------

def test_find_threshold_brackets_a_known_step():
    # Bisection (Press et al, Numerical Recipes 3rd ed. 2007, §9.1): the bracket halves each run.
    true = 3.3
    r = find_threshold(lambda x: x >= true, 0.0, 10.0, 0.01, max_runs=30)
    assert r.low < true <= r.high and r.high - r.low <= 0.01
    assert r.n_runs == 2 + math.ceil(math.log2(10.0 / 0.01))
    with pytest.raises(ScenarioError, match="already holds at low"):
        find_threshold(lambda x: True, 0.0, 1.0, 0.1)
    with pytest.raises(ScenarioError, match="does not hold at high"):
        find_threshold(lambda x: False, 0.0, 1.0, 0.1)


@pytest.mark.slow
@pytest.mark.parametrize("name", ["bap_gradient", "distal_burst_block"])
def test_demo_scenarios_agree_between_backends(name):
    # reference: the numpy backend defines the arithmetic; the compiled kernel
    # renumbers compartments so that each channel block of the demo cell (selected
    # by SWC type and path distance) is contiguous, and must still agree to 1e-9
    pytest.importorskip("numba")
    from cabletree.solver.compiled import CompiledStepper
    s = with_overrides(load_scenario(SCENARIOS / f"{name}.toml"), {"run.settle_ms": 5.0})
    cell, _ = build_cell_model(s)
    assert all(contig for _, _, contig, *_ in CompiledStepper(cell).block_static)
    a = run_scenario(s, backend="reference").v.values
    b = run_scenario(s, backend="compiled").v.values
    assert a.max() > 0.0  # a spike (somatic in one, dendritic-to-somatic in the other)
    assert np.max(np.abs(a - b)) <= 1e-9 * np.max(np.abs(a))
