"""Tests of cabletree.analysis on analytic waveforms with known features."""

from __future__ import annotations

import csv
import io
import math

import numpy as np
import pytest
import xarray as xr
from scipy.optimize import brentq
from scipy.signal import find_peaks

from analysis_fixtures import SiteSpec, gaussian_spike, make_results
from cabletree import analysis
from cabletree.errors import ResultsError

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))  # Gaussian full width at half maximum


def _assert_labelled(ds: xr.Dataset) -> None:
    # STYLE item 7: every output variable and coordinate carries units and long_name.
    for name, var in ds.variables.items():
        assert "long_name" in var.attrs, name
        if name != "site":
            assert "units" in var.attrs, name


# ---------------------------------------------------------------- EPSP waveforms (analytic)


def test_alpha_epsp_features():
    # Alpha function (Rall 1967, J Neurophysiol 30:1138-1168; REFERENCES §4.4):
    # v = A (s/τ) e^(1 - s/τ), s = t - onset: peak A at s = τ. Half-amplitude times solve
    # x e^(1-x) = 1/2 (x = s/τ) on each side of x = 1; roots found with scipy.optimize.brentq.
    tau, amp, onset, rest = 3.0, 5.0, 10.0, -70.0
    t = np.arange(0.0, 80.0, 0.005)
    s = np.clip(t - onset, 0.0, None)
    v = rest + amp * (s / tau) * np.exp(1.0 - s / tau)
    ds = make_results(t, {"soma": v}, [SiteSpec("soma", 0.0, 1)])
    f = analysis.epsp_features(ds, onset_ms=onset)
    g = lambda x: x * math.exp(1.0 - x) - 0.5  # noqa: E731
    half_width = tau * (brentq(g, 1.0, 20.0) - brentq(g, 1e-9, 1.0))
    assert f["amplitude_mV"].item() == pytest.approx(amp, rel=1e-6)
    assert f["time_to_peak_ms"].item() == pytest.approx(tau, abs=1e-5)
    assert f["half_width_ms"].item() == pytest.approx(half_width, abs=1e-4)
    assert f["baseline_mV"].item() == pytest.approx(rest, abs=1e-12)
    _assert_labelled(f)
    assert f["amplitude_mV"].attrs["units"] == "mV"


def test_double_exponential_time_to_peak():
    # Double exponential (REFERENCES §4.4, derived): t_peak = τr τd/(τd − τr) ln(τd/τr);
    # table value for τr = 0.2, τd = 2.0 ms: 0.51169 ms, normalisation f = 1.43506.
    tr, td, amp, onset = 0.2, 2.0, 2.0, 5.0
    t_peak = tr * td / (td - tr) * math.log(td / tr)
    assert t_peak == pytest.approx(0.51169, abs=1e-5)
    norm = 1.0 / (math.exp(-t_peak / td) - math.exp(-t_peak / tr))
    assert norm == pytest.approx(1.43506, abs=1e-5)
    t = np.arange(0.0, 30.0, 0.002)
    s = np.clip(t - onset, 0.0, None)
    v = -65.0 + amp * norm * (np.exp(-s / td) - np.exp(-s / tr))
    ds = make_results(t, {"dend": v}, [SiteSpec("dend", 300.0)])
    f = analysis.epsp_features(ds, onset_ms=onset, sites=["dend"])
    assert f["time_to_peak_ms"].item() == pytest.approx(0.51169, abs=2e-5)
    assert f["amplitude_mV"].item() == pytest.approx(amp, rel=1e-5)
    # half-amplitude crossings of the closed form, found with brentq
    h = lambda x: norm * (math.exp(-x / td) - math.exp(-x / tr)) - 0.5  # noqa: E731
    width = brentq(h, t_peak, 20.0) - brentq(h, 1e-9, t_peak)
    assert f["half_width_ms"].item() == pytest.approx(width, abs=1e-4)
    assert f["path_distance_um"].item() == 300.0


# ---------------------------------------------------------------- spike detection


def _spike_train(dt=0.01):
    t = np.arange(0.0, 200.0, dt)
    known = np.array([20.0, 35.0, 47.5, 58.0, 66.0, 73.0, 150.0])
    peaks_mV = np.array([30.0, 25.0, 10.0, -5.0, -12.0, -15.0, 28.0])  # four peaks below 0 mV
    rest = -65.0
    v = np.full_like(t, rest)
    for tk, pk in zip(known, peaks_mV):
        v += gaussian_spike(t, tk, pk - rest, 0.3)
    return t, v, known, peaks_mV, rest


def test_spike_times_known_train_including_sub_zero_peaks():
    # Known synthetic train (spike placed on exact sample times); REFERENCES §2.2 note b:
    # peaks below 0 mV during fast firing must still be detected.
    t, v, known, _, _ = _spike_train()
    found = analysis.spike_times(v, t, threshold_mV=-20.0)
    np.testing.assert_allclose(found, known, atol=0.01 / 2)
    # a 0 mV crossing criterion would miss the sub-zero spikes: the detector must not
    assert np.sum(found > 0) == len(known)
    assert (np.sum(np.diff(np.sign(v)) > 0)) < len(known)


def test_spike_times_agrees_with_scipy_find_peaks():
    # Reference library: scipy.signal.find_peaks with the same height, prominence and distance.
    rng = np.random.default_rng(1)
    t, v, _, _, _ = _spike_train()
    v = v + rng.normal(0.0, 0.3, size=v.size)  # noise makes many tiny local maxima
    ours = analysis.spike_times(v, t, threshold_mV=-20.0, min_interval_ms=1.0, prominence_mV=10.0)
    idx, _ = find_peaks(v, height=-20.0, prominence=10.0, distance=int(round(1.0 / 0.01)))
    np.testing.assert_array_equal(ours, t[idx])


def test_spike_times_min_interval_and_prominence():
    # Constructed cases with known answers (definition in the docstring).
    dt = 0.01
    t = np.arange(0.0, 50.0, dt)
    rest = -65.0
    v = np.full_like(t, rest)
    v += gaussian_spike(t, 10.0, 95.0, 0.2)
    v += gaussian_spike(t, 10.6, 60.0, 0.1)   # 0.6 ms later, lower: dropped by min_interval 1 ms
    v += gaussian_spike(t, 30.0, 80.0, 0.5)
    v += gaussian_spike(t, 31.2, 3.0, 0.1)    # 3 mV bump on the falling phase: not prominent
    found = analysis.spike_times(v, t, min_interval_ms=1.0, prominence_mV=10.0)
    np.testing.assert_allclose(found, [10.0, 30.0], atol=dt / 2)
    both = analysis.spike_times(v, t, min_interval_ms=0.3, prominence_mV=10.0)
    np.testing.assert_allclose(both, [10.0, 10.6, 30.0], atol=dt / 2)


def test_spike_times_threshold_crossing_reference():
    # Gaussian spike of height P over rest B crosses θ upwards at t_k − σ √(2 ln((P−B)/(θ−B))).
    t, v, known, peaks_mV, rest = _spike_train(dt=0.005)
    theta, sigma = -20.0, 0.3
    expected = known - sigma * np.sqrt(2.0 * np.log((peaks_mV - rest) / (theta - rest)))
    found = analysis.spike_times(v, t, threshold_mV=theta, reference="crossing")
    np.testing.assert_allclose(found, expected, atol=2e-3)


def test_spike_features_and_intervals():
    t, v, known, _, _ = _spike_train()
    flat = np.full_like(t, -65.0)
    ds = make_results(t, {"soma": v, "dend": flat},
                      [SiteSpec("soma", 0.0, 1), SiteSpec("dend", 200.0)])
    onset = 15.0
    f = analysis.spike_features(ds, onset_ms=onset, end_ms=115.0)
    in_window = known[(known >= onset) & (known <= 115.0)]
    assert f["spike_count"].sel(site="soma").item() == len(in_window)
    assert f["spike_count"].sel(site="dend").item() == 0
    assert f["first_spike_latency_ms"].sel(site="soma").item() == pytest.approx(5.0, abs=0.005)
    assert np.isnan(f["first_spike_latency_ms"].sel(site="dend").item())
    assert f["mean_firing_rate_Hz"].sel(site="soma").item() == pytest.approx(
        len(in_window) / 0.100)
    np.testing.assert_allclose(analysis.interspike_intervals(ds, "soma"), np.diff(known),
                               atol=0.01)
    _assert_labelled(f)
    assert f["mean_firing_rate_Hz"].attrs["units"] == "Hz"


# ---------------------------------------------------------------- back-propagation


LAMBDA_UM, SPEED_UM_PER_MS, T_SOMA = 300.0, 500.0, 20.0


def _bap_dataset(dt=0.005):
    # Synthetic bAP: amplitude A0 exp(−x/λ), peak delayed by x/c, Gaussian shape widening with
    # distance. c = 500 µm/ms is the apical value of Stuart, Schiller & Sakmann 1997 (J Physiol
    # 505:617-632; REFERENCES §3(c)); basal sites get 200 µm/ms (review value, §3(c)).
    t = np.arange(0.0, 40.0, dt)
    sites = [SiteSpec("soma", 0.0, 1)]
    sites += [SiteSpec(f"apical_{x}um", float(x), 4) for x in range(50, 451, 50)]
    sites += [SiteSpec(f"basal_{x}um", float(x), 3) for x in (40, 80, 120)]
    traces, truth = {}, {}
    for s in sites:
        speed = 200.0 if s.swc_type == 3 else SPEED_UM_PER_MS
        amp = 100.0 * math.exp(-s.path_distance_um / LAMBDA_UM)
        lat = s.path_distance_um / speed
        sigma = 0.2 * (1.0 + s.path_distance_um / 400.0)
        traces[s.name] = -70.0 + gaussian_spike(t, T_SOMA + lat, amp, sigma)
        truth[s.name] = (amp, lat, sigma * FWHM_PER_SIGMA)
    return make_results(t, traces, sites), truth


def test_bap_features_recover_amplitude_latency_attenuation():
    ds, truth = _bap_dataset()
    f = analysis.bap_features(ds, soma_site="soma")
    for name, (amp, lat, width) in truth.items():
        row = f.sel(site=name)
        # baseline window ends ≥ 5σ before every peak: Gaussian tail < 1e-3 mV
        assert row["baseline_mV"].item() == pytest.approx(-70.0, abs=1e-3)
        assert row["amplitude_mV"].item() == pytest.approx(amp, abs=2e-3)
        assert row["latency_ms"].item() == pytest.approx(lat, abs=1e-4)
        assert row["half_width_ms"].item() == pytest.approx(width, abs=1e-3)
        assert row["attenuation_ratio"].item() == pytest.approx(amp / 100.0, abs=2e-5)
    assert f.attrs["soma_peak_time_ms"] == pytest.approx(T_SOMA, abs=1e-6)
    assert set(["path_distance_um", "swc_type"]) <= set(f.coords)
    assert f["path_distance_um"].attrs["units"] == "um"
    _assert_labelled(f)
    assert f["attenuation_ratio"].attrs["units"] == "1"


def test_propagation_speed_recovered_per_dendrite_type():
    ds, _ = _bap_dataset()
    f = analysis.bap_features(ds)
    apical = analysis.propagation_speed_um_per_ms(f, swc_types=(4,))
    assert apical.speed_um_per_ms == pytest.approx(SPEED_UM_PER_MS, rel=1e-3)
    assert apical.intercept_ms == pytest.approx(0.0, abs=1e-3)
    assert apical.r_squared > 0.9999
    assert apical.n_sites == 9
    basal = analysis.propagation_speed_um_per_ms(f, swc_types=(3,))
    assert basal.speed_um_per_ms == pytest.approx(200.0, rel=1e-3)


def test_bap_window_selects_spike_and_missing_spike_raises():
    ds, _ = _bap_dataset()
    with pytest.raises(ResultsError, match="no spike at site 'soma'"):
        analysis.bap_features(ds, window_ms=(25.0, 40.0))
    with pytest.raises(ResultsError, match="unknown site"):
        analysis.bap_features(ds, soma_site="axon_hillock")


def test_propagation_speed_rejects_too_few_sites():
    ds, _ = _bap_dataset()
    f = analysis.bap_features(ds)
    with pytest.raises(ResultsError, match="at least 3 sites"):
        analysis.propagation_speed_um_per_ms(f, swc_types=(2,))


# ---------------------------------------------------------------- dendritic spike


def test_detect_dendritic_spike_order():
    t = np.arange(0.0, 30.0, 0.01)
    early = -70.0 + gaussian_spike(t, 10.0, 80.0, 0.5)
    late = -70.0 + gaussian_spike(t, 12.0, 95.0, 0.5)
    ds = make_results(t, {"soma": late, "dend": early},
                      [SiteSpec("soma", 0.0, 1), SiteSpec("dend", 350.0)])
    res = analysis.detect_dendritic_spike(ds, "dend", "soma", threshold_mV=-30.0)
    # crossing of θ = −30 mV by a Gaussian of height P over −70: t_k − σ √(2 ln(P/40))
    exp_dend = 10.0 - 0.5 * math.sqrt(2 * math.log(80.0 / 40.0))
    exp_soma = 12.0 - 0.5 * math.sqrt(2 * math.log(95.0 / 40.0))
    assert res.occurred
    assert res.dendritic_crossing_ms == pytest.approx(exp_dend, abs=2e-3)
    assert res.lead_ms == pytest.approx(exp_soma - exp_dend, abs=4e-3)
    swapped = make_results(t, {"soma": early, "dend": late},
                           [SiteSpec("soma", 0.0, 1), SiteSpec("dend", 350.0)])
    assert not analysis.detect_dendritic_spike(swapped, "dend", threshold_mV=-30.0).occurred
    sub = make_results(t, {"soma": late, "dend": -70.0 + gaussian_spike(t, 10.0, 20.0, 0.5)},
                       [SiteSpec("soma", 0.0, 1), SiteSpec("dend", 350.0)])
    res = analysis.detect_dendritic_spike(sub, "dend", threshold_mV=-30.0)
    assert not res.occurred and math.isnan(res.dendritic_crossing_ms)


# ---------------------------------------------------------------- passive


def _charging(r_MOhm=200.0, i_nA=0.05, tau=20.0, on=10.0, off=250.0, dt=0.025):
    # Isopotential RC compartment (REFERENCES §1.4, textbook): V = I R (1 − e^(−t/τ)) after
    # the step; after the step ends it decays as V_end e^(−(t − t_off)/τ).
    t = np.arange(0.0, 500.0, dt)
    v = np.full_like(t, -65.0)
    on_mask = (t >= on) & (t < off)
    v[on_mask] += i_nA * r_MOhm * (1.0 - np.exp(-(t[on_mask] - on) / tau))
    v_end = i_nA * r_MOhm * (1.0 - math.exp(-(off - on) / tau))
    v[t >= off] += v_end * np.exp(-(t[t >= off] - off) / tau)
    return make_results(t, {"soma": v}, [SiteSpec("soma", 0.0, 1)])


def test_input_resistance_from_charging_curve():
    ds = _charging()
    r = analysis.input_resistance_MOhm(ds, "soma", 0.05, t_before_ms=9.9, t_steady_ms=249.9,
                                       average_ms=1.0)
    assert r == pytest.approx(200.0, rel=1e-4)  # residual e^(−12) ≈ 6e-6


def test_membrane_time_constant_charging_and_decay():
    ds = _charging()
    assert analysis.membrane_time_constant_ms(ds, "soma", (12.0, 200.0)) == pytest.approx(
        20.0, rel=1e-6)
    assert analysis.membrane_time_constant_ms(ds, "soma", (251.0, 450.0)) == pytest.approx(
        20.0, rel=1e-6)
    fit = analysis.fit_exponential(ds["time"].values[400:8000], ds["v"].values[400:8000, 0])
    assert fit.v_inf_mV == pytest.approx(-65.0 + 10.0, abs=1e-6)
    assert fit.rmse_mV < 1e-8


# ---------------------------------------------------------------- export


def test_features_table_csv(tmp_path):
    ds, truth = _bap_dataset()
    f = analysis.bap_features(ds)
    path = tmp_path / "bap.csv"
    text = analysis.features_table(f, path)
    assert path.read_text(encoding="utf-8") == text
    rows = list(csv.DictReader(io.StringIO(text)))
    assert len(rows) == len(truth)
    header = text.splitlines()[0].split(",")
    for col in ("site", "path_distance_um", "swc_type", "amplitude_mV", "latency_ms",
                "half_width_ms", "attenuation_ratio", "x_um"):
        assert col in header
    row = {r["site"]: r for r in rows}["apical_300um"]
    assert float(row["amplitude_mV"]) == pytest.approx(truth["apical_300um"][0], abs=2e-3)
    assert float(row["path_distance_um"]) == 300.0
    assert not list(tmp_path.glob(".*"))  # no temporary file left behind


def test_features_table_appends_units_to_bare_names():
    f = xr.Dataset({"amplitude": ("site", [1.5], {"units": "mV", "long_name": "a"})},
                   coords={"site": ["soma"]})
    assert analysis.features_table(f).splitlines()[0] == "site,amplitude_mV"
    # CF-style unit strings as written by cabletree.results ("S cm-2") become name suffixes
    g = xr.Dataset({"gmax": ("compartment", [0.01], {"units": "S cm-2", "long_name": "g"}),
                    "rate_per_ms": ("compartment", [2.0], {"units": "ms-1", "long_name": "r"})},
                   coords={"compartment": [0]})
    assert analysis.features_table(g).splitlines()[0] == "compartment,gmax_S_per_cm2,rate_per_ms"


# ---------------------------------------------------------------- on a simulated cell


@pytest.mark.slow
def test_passive_features_on_simulated_ball_and_stick():
    # End-to-end: a simulated passive ball-and-stick measured with the trace-based functions,
    # against cable theory. R_N = 1/(G_S + G_D), G_S = πD²/Rm, G_D = tanh(L)/R∞ (Rall 1959;
    # REFERENCES §1.2); slowest decay τ0 = Rm·Cm for a uniform membrane (Rall 1969; §1.6).
    from cabletree.cell import CurrentInjection, Membrane, build_cell
    from cabletree.inputs import StepCurrent
    from cabletree.morphology.synthetic import ball_and_stick
    from cabletree.results import make_dataset
    from cabletree.sites import soma_site
    from cabletree.solver import simulate
    from cabletree.solver.plan import RunSettings

    rm_ohm_cm2, ri_ohm_cm, d_cm, soma_cm, length_cm = 20000.0, 150.0, 2e-4, 20e-4, 200e-4
    membrane = Membrane(cm_uF_per_cm2=1.0, axial_resistivity_ohm_cm=ri_ohm_cm,
                        leak_S_per_cm2=1.0 / rm_ohm_cm2, leak_reversal_mV=-65.0)
    grid = build_cell(ball_and_stick(), membrane=membrane).grid
    cell = build_cell(grid, membrane=membrane,
                      injections=[CurrentInjection(soma_site(grid), StepCurrent(0.05, 10.0, 300.0))])
    ds = make_dataset(cell, simulate(cell, RunSettings(t_stop_ms=400.0, dt_ms=0.025),
                                      backend="reference"))
    lam = math.sqrt(rm_ohm_cm2 * d_cm / (4.0 * ri_ohm_cm))
    r_inf = 4.0 * ri_ohm_cm * lam / (math.pi * d_cm ** 2)
    r_n = 1e-6 / (math.tanh(length_cm / lam) / r_inf + math.pi * soma_cm ** 2 / rm_ohm_cm2)
    assert r_n == pytest.approx(803.62, abs=0.01)
    measured = analysis.input_resistance_MOhm(ds, "soma", 0.05, t_before_ms=9.9,
                                              t_steady_ms=309.9)
    assert measured == pytest.approx(r_n, rel=1e-3)
    assert analysis.membrane_time_constant_ms(ds, "soma", (330.0, 400.0)) == pytest.approx(
        rm_ohm_cm2 * 1e-3, rel=1e-3)  # Rm·Cm = 20000 Ω·cm² × 1 µF/cm² = 20 ms
