"""SWC reading and writing.  Checks follow REFERENCES §7 ("Tests this supports"),
the SWC layout of Cannon et al. 1998 / Ascoli et al. 2007 (REFERENCES §7.1)."""

from __future__ import annotations

import os
import random

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cabletree.errors import MorphologyError, SwcFormatError
from cabletree.morphology import (
    Repairs, SwcWarning, format_swc, parse_swc_text, read_swc, synthetic, write_swc,
)

# A small clean file: NeuroMorpho three-point soma (r = 10) and a forked dendrite.
CLEAN = """\
# a clean test file
1 1 0 0 0 10 -1
2 1 0 -10 0 10 1
3 1 0 10 0 10 1
4 3 10 0 0 1 1
5 3 20 0 0 1 4
6 3 30 5 0 0.8 5
7 3 30 -5 0 0.8 5
8 4 0 20 0 1.5 1
"""


def test_clean_file_values():
    m = parse_swc_text(CLEAN)
    np.testing.assert_array_equal(m.sample_id, [1, 2, 3, 4, 5, 6, 7, 8])
    np.testing.assert_array_equal(m.parent_index, [-1, 0, 0, 0, 3, 4, 4, 0])
    np.testing.assert_array_equal(m.swc_type, [1, 1, 1, 3, 3, 3, 3, 4])
    np.testing.assert_array_equal(m.xyz_um[5], [30, 5, 0])
    assert m.radius_um[5] == 0.8
    assert m.soma_kind == "three_point" and m.soma_radius_um == 10.0
    assert m.source == "<string>"


def test_messy_layout_parses_identically(assert_same_samples):
    # REFERENCES §7 test 5: CRLF, tabs, comments, float ids give the same samples.
    messy = (
        "#header line\r\n\r\n"
        "   1.0\t1  0.0 0 0 1.0e1 -1.0\r\n"
        "2 1 0 -1e1 0 10 1   # trailing comment\r"
        "\t3 1 0 10.000 0 10 1\n"
        "\n#  another comment\r\n"
        "4\t3\t10\t0\t0\t1\t1  \r\n"
        "5 3 2.0E1 0 0 1 4.0\n"
        "6 3 30 5 0 8e-1 5\r\n"
        "  7 3 30 -5 0 0.80 5\n"
        "8 4 0 20 0 1.5 1"
    )
    assert_same_samples(parse_swc_text(messy), parse_swc_text(CLEAN))


def test_shuffled_lines_give_the_same_tree(tree_by_id):
    # REFERENCES §7 test 4: line order does not matter; children before parents accepted.
    lines = CLEAN.splitlines()[1:]
    rng = random.Random(3)
    for _ in range(5):
        rng.shuffle(lines)
        m = parse_swc_text("\n".join(lines))
        assert tree_by_id(m) == tree_by_id(parse_swc_text(CLEAN))
        assert np.all(m.parent_index[1:] < np.arange(1, m.n_samples))
        assert m.soma_kind == "three_point"


def test_children_before_parents_are_reordered():
    text = "5 3 20 0 0 1 4\n4 3 10 0 0 1 1\n1 1 0 0 0 5 -1\n"
    m = parse_swc_text(text)
    np.testing.assert_array_equal(m.sample_id, [1, 4, 5])
    np.testing.assert_array_equal(m.parent_index, [-1, 0, 1])


def test_noncontiguous_ids_are_kept():
    m = parse_swc_text("10 1 0 0 0 5 -1\n20 3 10 0 0 1 10\n35 3 20 0 0 1 20\n")
    np.testing.assert_array_equal(m.sample_id, [10, 20, 35])
    np.testing.assert_array_equal(m.parent_index, [-1, 0, 1])


ERRORS = [
    ("1 1 0 0 0 5 -1\n2 3 abc 0 0 1 1\n", r"<string>, line 2: field 'x' is not a number: 'abc'"),
    ("1 1 0 0 0 5 -1\n2 3 1_0 0 0 1 1\n", r"line 2: field 'x' is not a number: '1_0'"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 0x1\n", r"line 2: field 'parent' is not a number: '0x1'"),
    ("1 1 0 0 0 5 -1\n\n2 3 1 0 0 1\n", r"line 3: expected 7 fields .* found 6"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1 7\n", r"line 2: expected 7 fields .* found 8"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1\n2 3 2 0 0 1 1\n", r"line 3: duplicate sample id 2 \(already defined on line 2\)"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1\n3 3 2 0 0 1 9\n", r"line 3: sample id 3 has parent id 9, which does not exist"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 4\n3 3 2 0 0 1 2\n4 3 3 0 0 1 3\n", r"line 2: the parent links form a cycle through sample ids"),
    ("1 3 1 0 0 1 1\n", r"line 1: the parent links form a cycle"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1\n3 1 9 0 0 5 -1\n", r"line 3: sample id 3 is a second root .*line 1"),
    ("1 3 0 0 0 1 -1\n2 3 1 0 0 1 1\n", r"line 1: no soma: the root \(sample id 1\) has SWC type 3"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1\n3 3 2 0 0 0 2\n", r"line 3: sample id 3 has radius 0.0 µm; neurite radii must be positive"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 -1 1\n", r"line 2: sample id 2 has radius -1.0"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 nan 1\n", r"line 2: sample id 2 has radius nan"),
    ("1 1 0 0 0 5 -1\n2.5 3 1 0 0 1 1\n", r"line 2: field 'id' must be an integer, found 2.5"),
    ("1 1 0 0 0 5 -1\n2 3.5 1 0 0 1 1\n", r"line 2: field 'type' must be an integer, found 3.5"),
    ("1 1 0 0 0 5 -1\n2 3 1 0 0 1 1.5\n", r"line 2: field 'parent' must be an integer, found 1.5"),
    ("1 1 0 0 0 5 -1\n2 3 inf 0 0 1 1\n", r"line 2: coordinates must be finite"),
    ("# only a comment\n\n", r"no samples found"),
]


@pytest.mark.parametrize("text, message", ERRORS)
def test_errors_name_the_line(text, message):
    # REFERENCES §7 test 6 (and §7.4 defects): a clear error naming the offending line.
    with pytest.raises(SwcFormatError, match=message):
        parse_swc_text(text)


def test_error_carries_path_and_line(tmp_path):
    path = tmp_path / "bad.swc"
    path.write_text("# x\n1 1 0 0 0 5 -1\n2 3 1 0 0 1 1\n2 3 1 0 0 1 1\n")
    with pytest.raises(SwcFormatError) as info:
        read_swc(path)
    assert info.value.path == str(path)
    assert info.value.line_number == 4
    assert str(path) in str(info.value)


def test_missing_file_is_a_clear_error(tmp_path):
    with pytest.raises(SwcFormatError, match="cannot read the file"):
        read_swc(tmp_path / "nope.swc")


def test_unknown_type_is_kept_with_a_warning():
    # REFERENCES §7 test 7: unknown code 10 is preserved and reported, not rejected.
    text = "1 1 0 0 0 5 -1\n2 3 5 0 0 1 1\n3 10 10 0 0 1 2\n4 10 15 0 0 1 3\n"
    with pytest.warns(SwcWarning, match=r"<string>, line 3: SWC type code 10 .*2 sample"):
        m = parse_swc_text(text)
    assert list(m.swc_type) == [1, 3, 10, 10]
    assert any("type code 10" in note for note in m.notes)


def test_cable_without_soma_needs_require_soma_false():
    text = "1 3 0 0 0 1 -1\n2 3 10 0 0 1 1\n"
    m = parse_swc_text(text, require_soma=False)
    assert m.soma_kind == "none" and not m.has_soma and m.soma_center_um is None


def test_round_trip_keeps_arrays(assert_same_samples):
    # REFERENCES §7 test 1: parse -> write -> parse yields identical samples (ids kept).
    m = parse_swc_text("10 1 0 0 0 5.5 -1\n20 3 0.1 0.2 0.3 0.123456789 10\n30 3 1e-3 2 3 1 20\n")
    assert_same_samples(parse_swc_text(format_swc(m)), m)


def test_header_has_provenance():
    text = format_swc(parse_swc_text(CLEAN, source="cell.swc"))
    head = [line for line in text.splitlines() if line.startswith("#")]
    assert head[0].startswith("# SWC file generated by cabletree")
    assert "# source: cell.swc" in head
    assert any(line.startswith("# soma: three_point") for line in head)


@pytest.mark.parametrize("name", [
    "l5_ttpc_pyramidal_rat_hay2013_cell4.swc",
    "l23_pyramidal_rat_svoboda_gR004P1.swc",
    "messy_contour_soma_martinotti_rat_TKB071114A2.swc",
])
def test_real_files_round_trip(tmp_path, data_dir, name, assert_same_samples):
    m = read_swc(data_dir / name)
    out = write_swc(m, tmp_path / name)
    assert_same_samples(read_swc(out), m)


def test_write_is_atomic(tmp_path, monkeypatch):
    # DESIGN §8: nothing is half-written; a failed rename leaves the old file and no temp.
    path = tmp_path / "cell.swc"
    path.write_text("old content\n")

    def broken_replace(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError, match="disk full"):
        write_swc(parse_swc_text(CLEAN), path)
    assert path.read_text() == "old content\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.swc"]


def test_write_creates_file(tmp_path, assert_same_samples):
    m = parse_swc_text(CLEAN)
    path = write_swc(m, tmp_path / "cell.swc")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cell.swc"]
    assert_same_samples(read_swc(path), m)


@settings(max_examples=40, deadline=None)
@given(n_branches=st.integers(1, 40), seed=st.integers(0, 10_000), shuffle_seed=st.integers(0, 10))
def test_property_round_trip_random_trees(n_branches, seed, shuffle_seed, tree_by_id):
    # parse(format(m)) == m for generated trees, and any line order gives the same tree.
    m = synthetic.random_tree(n_branches, seed, samples_per_branch=3)
    text = format_swc(m)
    back = parse_swc_text(text)
    for name in ("sample_id", "swc_type", "xyz_um", "radius_um", "parent_index"):
        np.testing.assert_array_equal(getattr(back, name), getattr(m, name))
    assert back.soma_radius_um == m.soma_radius_um
    lines = [line for line in text.splitlines() if not line.startswith("#")]
    random.Random(shuffle_seed).shuffle(lines)
    assert tree_by_id(parse_swc_text("\n".join(lines))) == tree_by_id(m)


def test_soma_radius_error_is_a_format_error_with_line(data_dir):
    with pytest.raises(SwcFormatError, match=r"purk2.swc, line 23: the single-point soma .* radius 0"):
        read_swc(data_dir / "purkinje_guineapig_rapp_v_e_purk2.swc")
    assert issubclass(SwcFormatError, MorphologyError)


def test_repairs_argument_is_used():
    m = parse_swc_text("1 1 0 0 0 10 -1\n2 3 10 0 0 2 1\n", repairs=Repairs(radius_is_diameter=True))
    np.testing.assert_array_equal(m.radius_um, [5.0, 1.0])
    assert m.soma_radius_um == 5.0
