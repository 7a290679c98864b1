"""Tests of cabletree.plots, headless (Agg backend)."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.image as mpimg  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402

from analysis_fixtures import SiteSpec, gaussian_spike, make_results  # noqa: E402
from cabletree import analysis, plots  # noqa: E402
from cabletree.errors import ResultsError  # noqa: E402


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


def _ds():
    t = np.arange(0.0, 30.0, 0.02)
    sites = [SiteSpec("soma", 0.0, 1), SiteSpec("apical_200um", 200.0),
             SiteSpec("apical_400um", 400.0), SiteSpec("basal_100um", 100.0, 3)]
    traces = {s.name: -70.0 + gaussian_spike(t, 10.0 + s.path_distance_um / 500.0,
                                             100.0 * np.exp(-s.path_distance_um / 300.0), 0.3)
              for s in sites}
    return make_results(t, traces, sites)


def _distinct_colours(path) -> int:
    img = mpimg.imread(path)
    rgb = (img[..., :3] * 255).astype(np.uint8).reshape(-1, 3)
    return len(np.unique(rgb, axis=0))


def test_morphology_segments_colour_bar_and_png(tmp_path):
    ds = _ds()
    lines = plots.plot_morphology(ds, values="gmax_ka_distal", sites=True, scale_bar_um=100)
    n_comp = ds.sizes["compartment"]
    assert len(lines.get_segments()) == n_comp - 1  # one segment per non-root compartment
    np.testing.assert_allclose(lines.get_array(), ds["gmax_ka_distal"].values[1:])
    assert lines.colorbar is not None
    assert lines.colorbar.ax.get_ylabel() == "distal A-type K gmax (S/cm²)"
    texts = [t.get_text() for t in lines.axes.texts]
    assert {"soma", "apical_200um", "apical_400um", "basal_100um"} <= set(texts)
    path = plots.save_figure(lines.axes.figure, tmp_path / "morph.png", dpi=100)
    assert path.stat().st_size > 5_000
    # not blank: a colour-mapped tree, bar and labels give many distinct colours
    assert _distinct_colours(path) > 50
    assert not list(tmp_path.glob(".*"))


def test_morphology_from_arrays_projection_and_bad_projection():
    ds = _ds()
    arrays = {k: ds[f"compartment_{k}"].values for k in ("x_um", "y_um", "z_um", "diameter_um",
                                                          "parent")}
    lines = plots.plot_morphology(arrays, projection="xz", scale_bar_um=None)
    segs = lines.get_segments()
    assert len(segs) == ds.sizes["compartment"] - 1
    assert np.allclose([s[:, 1] for s in segs], 0.0)  # z = 0 for the flat test tree
    assert lines.colorbar is None
    with pytest.raises(ResultsError, match="projection must be one of"):
        plots.plot_morphology(arrays, projection="xw")


def test_traces_labels_by_distance(tmp_path):
    ds = _ds()
    lines = plots.plot_traces(ds)
    labels = [line.get_label() for line in lines]
    assert labels == ["soma", "basal 100 µm", "apical 200 µm", "apical 400 µm"]
    ax = lines[0].axes
    assert ax.get_xlabel() == "time (ms)"
    assert ax.get_ylabel() == "membrane potential (mV)"
    path = plots.save_figure(ax.figure, tmp_path / "traces.svg")
    assert path.stat().st_size > 5_000
    assert path.read_text(encoding="utf-8").lstrip().startswith("<?xml")


def test_feature_vs_distance_several_runs(tmp_path):
    ds = _ds()
    f = analysis.bap_features(ds)
    half = f.assign(amplitude_mV=f["amplitude_mV"] * 0.5)
    lines = plots.plot_feature_vs_distance([("control", f), ("half", half)],
                                           variable="amplitude_mV", swc_types=(1, 4))
    assert len(lines) == 2
    assert [len(line.get_xdata()) for line in lines] == [3, 3]
    np.testing.assert_allclose(lines[0].get_xdata(), [0.0, 200.0, 400.0])
    assert lines[0].axes.get_ylabel() == "bAP amplitude from baseline (mV)"
    assert lines[0].axes.get_xlabel() == "path distance from the soma (µm)"
    path = plots.save_figure(lines[0].axes.figure, tmp_path / "bap.pdf")
    assert path.read_bytes()[:5] == b"%PDF-"
    assert path.stat().st_size > 1_000


def test_profiles_and_save_rejects_unknown_suffix(tmp_path):
    ds = _ds()
    d = ds["compartment_path_distance_um"].values
    lines = plots.plot_profiles(d, {"ka distal": ds["gmax_ka_distal"].values,
                                    "uniform": np.full_like(d, 0.02)})
    assert len(lines) == 2
    assert np.all(np.diff(lines[0].get_xdata()) >= 0)
    with pytest.raises(ResultsError, match="expected a suffix"):
        plots.save_figure(lines[0].axes.figure, tmp_path / "fig.bmp")
    with pytest.raises(ResultsError, match="one value per compartment"):
        plots.plot_profiles(d, {"bad": [1.0, 2.0]})


def test_site_label():
    assert plots.site_label("soma", 1, 0.0) == "soma"
    assert plots.site_label("x", 4, 199.6) == "apical 200 µm"
    assert plots.site_label("custom_site", 7, 10.0) == "custom_site"
