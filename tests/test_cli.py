"""The command line: run, check, plot via main(argv) and via subprocess for exit codes."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from cabletree.cli import main
from cabletree.scenario import load_scenario, save_scenario, with_overrides

ROOT = Path(__file__).resolve().parents[1]
SWC = ROOT / "morphologies" / "pyramidal_demo.swc"


@pytest.fixture(scope="module")
def short_scenario(tmp_path_factory):
    folder = tmp_path_factory.mktemp("scen")
    s = load_scenario(ROOT / "scenarios" / "bap_gradient.toml")
    s = with_overrides(s, {"run.t_stop_ms": 12.0, "run.settle_ms": 0.0, "run.v_init_mV": -70.0,
                           "run.backend": "reference", "analysis.bap.window_ms": [4.0, 12.0]})
    return save_scenario(s, folder / "short.toml")


def nontrivial_png(path: Path) -> bool:
    import matplotlib.image as mpimg

    img = mpimg.imread(path)
    return path.stat().st_size > 10_000 and float(np.std(img[..., :3])) > 0.02


@pytest.fixture(scope="module")
def run_output(short_scenario, tmp_path_factory):
    out = tmp_path_factory.mktemp("out")
    assert main(["run", str(short_scenario), "--out", str(out), "--format", "png",
                 "--format", "svg"]) == 0
    return out


def test_run_writes_results_tables_and_figures(run_output, capsys):
    assert (run_output / "results.nc").exists()
    header = (run_output / "bap.csv").read_text().splitlines()[0]
    assert "amplitude_mV" in header and "path_distance_um" in header and "latency_ms" in header
    for name in ("summary", "traces", "feature_vs_distance", "morphology", "profiles"):
        assert nontrivial_png(run_output / f"{name}.png")
        assert (run_output / f"{name}.svg").stat().st_size > 5_000


def test_plot_redraws_from_saved_results(run_output, tmp_path, capsys):
    assert main(["plot", str(run_output / "results.nc"), "--out", str(tmp_path)]) == 0
    assert nontrivial_png(tmp_path / "summary.png")
    assert "figure:" in capsys.readouterr().out


def test_check_swc_prints_summary(capsys):
    assert main(["check", str(SWC)]) == 0
    out = capsys.readouterr().out
    assert "valid SWC morphology" in out and "apical" in out


def test_check_scenario_prints_cell(capsys):
    assert main(["check", str(ROOT / "scenarios" / "bap_gradient.toml")]) == 0
    out = capsys.readouterr().out
    assert "valid scenario" in out and "channel ka_distal" in out and "compartments:" in out


def test_check_invalid_files(tmp_path, capsys):
    bad_swc = tmp_path / "bad.swc"
    bad_swc.write_text("1 1 0 0 0 5 -1\n2 3 x 0 0 1 1\n")
    assert main(["check", str(bad_swc)]) == 1
    assert "line 2" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text(Path(ROOT / "scenarios" / "bap_gradient.toml").read_text()
                   .replace("t_stop_ms", "t_stop_s"))
    shutil.copy(SWC, tmp_path / "x.swc")
    assert main(["check", str(bad)]) == 1
    err = capsys.readouterr().err
    assert "run.t_stop_s: unknown key; did you mean 't_stop_ms'?" in err
    assert "Traceback" not in err


def cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "cabletree.cli", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=300)


def test_exit_codes_via_subprocess(tmp_path, short_scenario):
    assert cli("--version").returncode == 0
    usage = cli("run")
    assert usage.returncode == 2 and "usage" in usage.stderr
    missing = cli("check", str(tmp_path / "nothing.toml"))
    assert missing.returncode == 1 and "Traceback" not in missing.stderr
    # a numerical failure: 1 µA into the soma drives the potential past ±1000 mV
    s = with_overrides(load_scenario(short_scenario), {"inputs.step.amplitude_nA": 1e6})
    blow = save_scenario(s, tmp_path / "blow.toml")
    r = cli("run", str(blow), "--out", str(tmp_path / "o"))
    assert r.returncode == 3, r.stderr
    assert "numerical failure" in r.stderr and "Traceback" not in r.stderr


def test_run_reports_progress(short_scenario, tmp_path, capsys):
    # progress on long runs: at least the final line "100.0 %  t = ... ms" on stderr
    assert main(["run", str(short_scenario), "--out", str(tmp_path)]) == 0
    err = capsys.readouterr().err
    assert "100.0 %" in err and "t = 12.0 ms" in err


def test_run_takes_threads(short_scenario, tmp_path):
    # --threads overrides run.threads through the validated scenario
    assert main(["run", str(short_scenario), "--out", str(tmp_path), "--threads", "2"]) == 0
    assert main(["run", str(short_scenario), "--out", str(tmp_path), "--threads", "0"]) == 1


def test_check_swc_with_repairs_and_hint(capsys):
    # A zero-radius single-point soma (the Purkinje reconstruction, tests/data/SOURCES.md)
    # is refused with a hint naming the command-line and scenario spellings of the repair;
    # with the repair the file checks and the repair is reported.
    purkinje = ROOT / "tests" / "data" / "purkinje_guineapig_rapp_v_e_purk2.swc"
    assert main(["check", str(purkinje)]) == 1
    err = capsys.readouterr().err
    assert "line 23" in err and "--soma-radius-um" in err and "[morphology.repairs]" in err
    assert main(["check", str(purkinje), "--soma-radius-um", "10"]) == 0
    out = capsys.readouterr().out
    assert "soma radius set to 10" in out


def test_time_left_is_timed_from_when_stepping_began(monkeypatch, capsys):
    # a kernel compile before the first step must not inflate the estimate:
    # 12 s of preparation, then half the run in 3 s leaves about 3 s
    import cabletree.cli as cli
    clock = iter([0.0, 12.0, 15.0])
    monkeypatch.setattr(cli.time, "perf_counter", lambda: next(clock))
    report = cli._run_progress(min_interval_s=0.0)
    report(0.0, 0.0)
    report(0.5, 10.0)
    err = capsys.readouterr().err
    assert "ready after 12.0 s" in err
    assert "about 3.0 s left" in err and "15.0 s elapsed" in err
