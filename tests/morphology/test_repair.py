"""Opt-in repairs of defects listed in REFERENCES §7.4 (common practice [P])."""

from __future__ import annotations

import numpy as np
import pytest

from cabletree.errors import MorphologyError
from cabletree.morphology import Repairs, parse_swc_text
from cabletree.morphology.repair import clamp_min_radius, halve_radii, merge_zero_length_samples

BASE = "1 1 0 0 0 10 -1\n2 3 10 0 0 2 1\n3 3 20 0 0 0 2\n4 3 30 0 0 0.05 3\n5 3 40 0 0 1 4\n"


def test_defaults_change_nothing():
    r = Repairs()
    assert (r.min_radius_um, r.soma_radius_um, r.infer_soma_radius, r.merge_zero_length,
            r.radius_is_diameter) == (None, None, False, False, False)
    m = parse_swc_text(BASE.replace(" 0 2\n", " 0.5 2\n"), repairs=r)
    assert m.notes == ()


def test_invalid_repairs_rejected():
    with pytest.raises(MorphologyError, match=r"Repairs.min_radius_um = -1"):
        Repairs(min_radius_um=-1)
    with pytest.raises(MorphologyError, match="soma_radius_um"):
        Repairs(soma_radius_um=float("nan"))


def test_min_radius_raises_small_neurite_radii_and_notes_ids():
    m = parse_swc_text(BASE, repairs=Repairs(min_radius_um=0.1))
    np.testing.assert_array_equal(m.radius_um, [10, 2, 0.1, 0.1, 1])
    (note,) = m.notes
    assert "min_radius_um" in note and "2 neurite sample(s)" in note and "ids 3, 4" in note


def test_min_radius_leaves_the_soma_alone():
    radius = np.array([0.0, 0.05, 1.0])
    out, note = clamp_min_radius(radius, np.array([1, 3, 3]), np.array([-1, 0, 1]),
                                 np.array([1, 2, 3]), 0.2)
    np.testing.assert_array_equal(out, [0.0, 0.2, 1.0])
    np.testing.assert_array_equal(radius, [0.0, 0.05, 1.0])  # input untouched
    assert "ids 2" in note
    same, none = clamp_min_radius(out, np.array([1, 3, 3]), np.array([-1, 0, 1]),
                                  np.array([1, 2, 3]), 0.2)
    assert none is None


def test_radius_is_diameter_halves_all():
    out, note = halve_radii(np.array([2.0, 3.0]))
    np.testing.assert_array_equal(out, [1.0, 1.5])
    assert "2 samples" in note
    m = parse_swc_text("1 1 0 0 0 20 -1\n2 3 10 0 0 2 1\n", repairs=Repairs(radius_is_diameter=True))
    assert m.soma_radius_um == 10.0 and m.radius_um[1] == 1.0
    assert any("radius_is_diameter" in n for n in m.notes)


ZERO = ("1 1 0 0 0 5 -1\n2 3 10 0 0 1 1\n3 3 10 0 0 1 2\n4 3 10 0 0 1 3\n"
        "5 3 20 0 0 1 4\n6 3 10 10 0 1 3\n")


def test_merge_zero_length_reattaches_children():
    m = parse_swc_text(ZERO)
    merged = parse_swc_text(ZERO, repairs=Repairs(merge_zero_length=True))
    np.testing.assert_array_equal(merged.sample_id, [1, 2, 5, 6])
    np.testing.assert_array_equal(merged.parent_index, [-1, 0, 1, 1])
    assert any("2 neurite sample(s)" in n and "ids 3, 4" in n for n in merged.notes)
    # total cable length is unchanged by removing zero-length segments
    def total_length(x):
        return np.linalg.norm(x.xyz_um[1:] - x.xyz_um[x.parent_index[1:]], axis=1).sum()
    assert total_length(merged) == pytest.approx(total_length(m))
    assert m.n_samples == 6  # the input morphology is not modified
    assert merge_zero_length_samples(merged) is merged  # nothing more to merge


def test_merge_does_not_touch_soma_samples():
    text = "1 1 0 0 0 5 -1\n2 1 0 0 0 5 1\n3 1 0 10 0 5 2\n4 3 10 10 0 1 3\n"
    m = parse_swc_text(text, repairs=Repairs(merge_zero_length=True))
    assert m.n_samples == 4 and m.soma_kind == "cylinders"
