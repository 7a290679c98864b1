"""Soma representations.  Conventions and check values from REFERENCES §7.3
(NeuroMorpho.Org soma-format note [C]; sphere/cylinder areas [D])."""

from __future__ import annotations

import numpy as np
import pytest

from cabletree.errors import MorphologyError
from cabletree.morphology import Repairs, parse_swc_text, path_distance_um, read_swc
from cabletree.morphology.soma import INFERRED_SOMA_RADIUS_CAP_UM, make_morphology, soma_mask

FOUR_PI_100 = 4 * np.pi * 10.0**2  # 1256.637 µm², REFERENCES §7 test 2 [D]


def soma_area(m):
    return 4 * np.pi * m.soma_radius_um**2


def test_three_point_soma_area():
    # REFERENCES §7.3 [C]: centre + points at y ∓ rs, same radius -> sphere of radius rs.
    m = parse_swc_text("1 1 5 5 5 10 -1\n2 1 5 -5 5 10 1\n3 1 5 15 5 10 1\n4 3 20 5 5 1 1\n")
    assert m.soma_kind == "three_point"
    np.testing.assert_array_equal(m.soma_center_um, [5, 5, 5])
    assert soma_area(m) == pytest.approx(FOUR_PI_100, rel=1e-9)
    assert soma_area(m) == pytest.approx(1256.637, abs=1e-3)
    # [D]: equal to the lateral area of the cylinder of length 2rs and radius rs.
    assert soma_area(m) == pytest.approx(2 * np.pi * 10 * 20, rel=1e-12)


def test_single_point_soma_area():
    # REFERENCES §7.3 [P]: one point = sphere of its radius.
    m = parse_swc_text("1 1 0 0 0 10 -1\n2 3 20 0 0 1 1\n")
    assert m.soma_kind == "single_point"
    assert soma_area(m) == pytest.approx(FOUR_PI_100, rel=1e-9)


def test_three_point_soma_along_another_axis():
    m = parse_swc_text("1 1 0 0 0 4 -1\n2 1 -4 0 0 4 1\n3 1 4 0 0 4 1\n")
    assert m.soma_kind == "three_point" and m.soma_radius_um == 4


def _ring(n, radius, z=3.0, center=(10.0, -2.0), tracing_radius=0.2, squash=1.0):
    angles = np.linspace(0, 2 * np.pi, n, endpoint=False)
    x = center[0] + radius * np.cos(angles)
    y = center[1] + squash * radius * np.sin(angles)
    lines = [f"{k + 1} 1 {float(x[k])!r} {float(y[k])!r} {z} {tracing_radius} {k if k else -1}" for k in range(n)]
    return "\n".join(lines), np.column_stack([x, y, np.full(n, z)])


def test_contour_soma_mean_rule():
    # REFERENCES §7 test 9 / §7.3 [C]: centre = mean of the points, radius = mean distance.
    text, pts = _ring(16, 6.0, squash=0.5)
    text += "\n17 3 20 -2 3 1 9\n18 3 40 -2 3 1 17\n"
    m = parse_swc_text(text)
    assert m.soma_kind == "contour"
    center = pts.mean(axis=0)
    np.testing.assert_allclose(m.soma_center_um, center, rtol=0, atol=1e-12)
    expected = np.mean(np.linalg.norm(pts - center, axis=1))
    assert m.soma_radius_um == pytest.approx(expected, rel=1e-12)
    assert any("outline of 16 points" in note for note in m.notes)


def test_circular_contour_gives_its_radius():
    text, _ = _ring(24, 7.5)
    m = parse_swc_text(text)
    assert m.soma_kind == "contour"
    assert m.soma_radius_um == pytest.approx(7.5, rel=1e-12)


def test_contour_attached_neurite_path_distance():
    # Neurites may leave any outline point; they start at the soma sphere and their first
    # sample lies at its Euclidean distance from the soma centre (path-distance convention).
    text, pts = _ring(12, 5.0, z=0.0, center=(0.0, 0.0))
    text += "\n13 3 20 0 0 1 7\n14 3 30 0 0 1 13\n"
    m = parse_swc_text(text)
    d = path_distance_um(m)
    assert np.all(d[:12] == 0)
    assert d[12] == pytest.approx(20.0, abs=1e-12)
    assert d[13] == pytest.approx(30.0, abs=1e-12)


def test_cylinder_soma_equal_area_sphere():
    # REFERENCES §7.3 [P]: chain of type-1 samples -> sum of frustum lateral areas.
    m = parse_swc_text("1 1 0 0 0 5 -1\n2 1 0 20 0 5 1\n3 3 0 30 0 1 2\n")
    assert m.soma_kind == "cylinders"
    assert soma_area(m) == pytest.approx(2 * np.pi * 5 * 20, rel=1e-12)
    np.testing.assert_array_equal(m.soma_center_um, [0, 0, 0])


def test_non_planar_chain_is_cylinders_not_contour():
    text = "\n".join(f"{k + 1} 1 0 0 {4.0 * k} 3 {k if k else -1}" for k in range(5))
    m = parse_swc_text(text)
    assert m.soma_kind == "cylinders"
    assert soma_area(m) == pytest.approx(2 * np.pi * 3 * 16, rel=1e-12)


def test_extra_soma_point_is_part_of_the_soma():
    text = ("1 1 0 0 0 2 -1\n2 1 0 -2 0 2 1\n3 1 0 2 0 2 1\n4 3 0 10 0 1 1\n"
            "5 1 6 8 0 2 1\n6 3 12 16 0 1 5\n")
    m = parse_swc_text(text)
    assert m.soma_kind == "three_point" and m.soma_radius_um == 2
    assert any("extra soma sample" in note and "5" in note for note in m.notes)
    np.testing.assert_array_equal(soma_mask(m.swc_type, m.parent_index), [1, 1, 1, 0, 1, 0])
    assert path_distance_um(m)[5] == pytest.approx(20.0)  # |(12, 16, 0)|


def test_zero_radius_soma_is_an_error_unless_repaired():
    text = "1 1 0 0 0 0 -1\n2 3 0 -30 0 1 1\n3 3 0 -40 0 1 2\n4 3 40 0 0 1 1\n"
    with pytest.raises(MorphologyError, match=r"single-point soma .* radius 0 .*Repairs\(soma_radius_um"):
        parse_swc_text(text)
    m = parse_swc_text(text, repairs=Repairs(soma_radius_um=8.0))
    assert m.soma_radius_um == 8.0 and m.radius_um[0] == 8.0
    assert any("soma_radius_um" in note for note in m.notes)
    inferred = parse_swc_text(text, repairs=Repairs(infer_soma_radius=True))
    assert inferred.soma_radius_um == pytest.approx(20.0)  # capped: mean(30, 40) = 35
    assert INFERRED_SOMA_RADIUS_CAP_UM == 20.0
    small = parse_swc_text(text.replace("-30", "-6").replace("40 0 0", "10 0 0"),
                           repairs=Repairs(infer_soma_radius=True))
    assert small.soma_radius_um == pytest.approx(8.0)  # mean(6, 10), below the cap
    assert any("infer_soma_radius" in note for note in small.notes)


def test_soma_radius_override_is_noted():
    m = parse_swc_text("1 1 0 0 0 10 -1\n2 3 20 0 0 1 1\n", repairs=Repairs(soma_radius_um=3.0))
    assert m.soma_radius_um == 3.0
    assert any("derived single_point radius was 10" in note for note in m.notes)


def test_stray_type1_sample_is_not_soma():
    m = parse_swc_text("1 1 0 0 0 5 -1\n2 3 10 0 0 1 1\n3 1 20 0 0 1 2\n")
    np.testing.assert_array_equal(soma_mask(m.swc_type, m.parent_index), [1, 0, 0])
    assert m.soma_kind == "single_point"
    assert any("not connected to the soma" in note for note in m.notes)


def test_no_soma_kind_none():
    m = make_morphology(np.array([1, 2]), np.array([3, 3]), np.zeros((2, 3)) + [[0, 0, 0], [1, 0, 0]],
                        np.ones(2), np.array([-1, 0]), require_soma=False)
    assert m.soma_kind == "none" and m.soma_radius_um is None
    with pytest.raises(MorphologyError, match="no soma"):
        make_morphology(np.array([1]), np.array([3]), np.zeros((1, 3)), np.ones(1), np.array([-1]))


# Soma kinds of the real files (tests/data/SOURCES.md).
def test_real_l5_three_point(data_dir):
    m = read_swc(data_dir / "l5_ttpc_pyramidal_rat_hay2013_cell4.swc")
    assert m.soma_kind == "three_point" and m.soma_radius_um == 11.564
    assert m.notes == ()


def test_real_l23_three_point_with_extra_point(data_dir):
    m = read_swc(data_dir / "l23_pyramidal_rat_svoboda_gR004P1.swc")
    assert m.soma_kind == "three_point" and m.soma_radius_um == 1.99
    mask = soma_mask(m.swc_type, m.parent_index)
    assert mask.sum() == 4
    assert 781 in m.sample_id[mask]
    assert any("ids 781" in note for note in m.notes)


def test_real_contour_27_points(data_dir):
    m = read_swc(data_dir / "messy_contour_soma_martinotti_rat_TKB071114A2.swc")
    assert m.soma_kind == "contour"
    mask = soma_mask(m.swc_type, m.parent_index)
    assert mask.sum() == 27
    pts = m.xyz_um[mask]
    np.testing.assert_allclose(m.soma_center_um, pts.mean(axis=0))
    assert m.soma_radius_um == pytest.approx(np.linalg.norm(pts - pts.mean(axis=0), axis=1).mean())
    # An outline of about 12 x 24 µm (SOURCES.md): radius between the half-axes, far above 0.22.
    assert 6.0 < m.soma_radius_um < 12.0


def test_real_purkinje_zero_radius(data_dir):
    path = data_dir / "purkinje_guineapig_rapp_v_e_purk2.swc"
    with pytest.raises(MorphologyError, match=r"purk2.swc, line 23: .*radius 0"):
        read_swc(path)
    m = read_swc(path, repairs=Repairs(soma_radius_um=10.0))
    assert m.soma_kind == "single_point" and m.soma_radius_um == 10.0
    m2 = read_swc(path, repairs=Repairs(infer_soma_radius=True))
    assert 0 < m2.soma_radius_um <= INFERRED_SOMA_RADIUS_CAP_UM
