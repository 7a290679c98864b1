"""Morphology summaries.  Geometry values from REFERENCES §7 test 3 [D]; real-file values
from tests/data/SOURCES.md."""

from __future__ import annotations

import numpy as np
import pytest

from cabletree.morphology import Repairs, format_summary, parse_swc_text, read_swc, summarize
from cabletree.morphology.geometry import frustum_lateral_area_um2, frustum_volume_um3


def test_two_sample_cylinder_area_and_volume():
    # REFERENCES §7 test 3 [D]: R = 1 µm, length 100 µm -> 628.319 µm², 314.159 µm³.
    m = parse_swc_text("1 3 0 0 0 1 -1\n2 3 100 0 0 1 1\n", require_soma=False)
    s = summarize(m)
    assert s.area_um2_per_type[3] == pytest.approx(628.319, abs=1e-3)
    assert s.area_um2_per_type[3] == pytest.approx(2 * np.pi * 100, rel=1e-12)
    assert s.length_um_per_type[3] == 100.0
    assert float(frustum_volume_um3(1, 1, 100)) == pytest.approx(314.159, abs=1e-3)


def test_frustum_area():
    # REFERENCES §7 test 3 [D]: R1 = 1, R2 = 0.5 over 100 µm -> pi (R1+R2) sqrt(l² + (R1-R2)²).
    m = parse_swc_text("1 3 0 0 0 1 -1\n2 3 0 100 0 0.5 1\n", require_soma=False)
    assert summarize(m).area_um2_per_type[3] == pytest.approx(471.245, abs=1e-3)
    assert float(frustum_lateral_area_um2(1, 0.5, 100)) == pytest.approx(
        np.pi * 1.5 * np.sqrt(100**2 + 0.25), rel=1e-14)


def test_stem_segment_is_a_cylinder_from_the_soma_surface():
    # Convention (module doc): child radius, from the soma surface (10 µm) to the child (30 µm).
    m = parse_swc_text("1 1 0 0 0 10 -1\n2 3 30 0 0 1 1\n3 3 50 0 0 0.5 2\n")
    s = summarize(m)
    assert s.length_um_per_type[3] == pytest.approx(20.0 + 20.0)
    expected = 2 * np.pi * 1 * 20 + float(frustum_lateral_area_um2(1, 0.5, 20))
    assert s.area_um2_per_type[3] == pytest.approx(expected, rel=1e-12)
    assert s.soma_area_um2 == pytest.approx(4 * np.pi * 100)
    assert s.total_area_um2 == pytest.approx(expected + 4 * np.pi * 100)
    assert s.max_path_distance_um_per_type == {1: 0.0, 3: 50.0}
    assert (s.n_stems, s.n_branch_points, s.n_terminals) == (1, 0, 1)


def test_three_point_soma_is_not_cable():
    m = parse_swc_text("1 1 0 0 0 10 -1\n2 1 0 -10 0 10 1\n3 1 0 10 0 10 1\n4 3 0 -30 0 1 1\n")
    s = summarize(m)
    assert 1 not in s.length_um_per_type
    assert s.samples_per_type == {1: 3, 3: 1}
    assert s.length_um_per_type[3] == pytest.approx(20.0)


# SOURCES.md table: points and max path per type.  The table measures paths from where each
# neurite leaves the soma; cabletree measures from the soma centre (a stem's first sample at its
# Euclidean distance from the centre), so values agree to a few per cent, not exactly.
REAL = [
    ("l5_ttpc_pyramidal_rat_hay2013_cell4.swc", 3029, None, {4: 1441, 3: 244, 2: 1099}),
    ("l23_pyramidal_rat_svoboda_gR004P1.swc", 1098, None, {4: 541, 3: 251}),
    ("messy_contour_soma_martinotti_rat_TKB071114A2.swc", 5755, None, {3: 592, 2: 1774}),
    ("purkinje_guineapig_rapp_v_e_purk2.swc", 1521, Repairs(soma_radius_um=10.0), {3: 334}),
]


@pytest.mark.parametrize("name, n_samples, repairs, max_path", REAL)
def test_real_file_summaries(data_dir, name, n_samples, repairs, max_path):
    s = summarize(read_swc(data_dir / name, repairs=repairs))
    assert s.n_samples == n_samples
    assert set(s.samples_per_type) == {1, *max_path}
    for code, table_value in max_path.items():
        assert s.max_path_distance_um_per_type[code] == pytest.approx(table_value, rel=0.03)


def test_l5_lengths_match_table(data_dir):
    # SOURCES.md: apical 7494 µm (1 stem), basal 2633 µm (7 stems), axon 6576 µm (1 stem),
    # measured with the first segment from the soma centre; the summary starts at the soma
    # surface (r = 11.564 µm), so add one soma radius per stem.
    s = summarize(read_swc(data_dir / "l5_ttpc_pyramidal_rat_hay2013_cell4.swc"))
    r = s.soma_radius_um
    assert s.length_um_per_type[4] + 1 * r == pytest.approx(7494, rel=2e-3)
    assert s.length_um_per_type[3] + 7 * r == pytest.approx(2633, rel=2e-3)
    assert s.length_um_per_type[2] + 1 * r == pytest.approx(6576, rel=2e-3)
    assert s.n_stems == 9
    assert s.samples_per_type[1] == 3


def test_format_summary_is_readable(data_dir):
    s = summarize(read_swc(data_dir / "l23_pyramidal_rat_svoboda_gR004P1.swc"))
    text = format_summary(s)
    assert "samples: 1098" in text
    assert "soma: three-point, radius 1.990 µm" in text
    assert any(line.startswith("4 apical") and "541.0" in line for line in text.splitlines())
    assert "note: three-point soma with 1 extra soma sample" in text
