"""Atomic writes: all or nothing, with ordinary permissions."""

import os
import stat

import pytest

from cabletree.fileio import write_atomically


def test_complete_write_replaces_and_has_ordinary_permissions(tmp_path):
    target = tmp_path / "table.csv"
    target.write_text("old")
    write_atomically(target, lambda tmp: tmp.write_text("new"))
    assert target.read_text() == "new"
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~mask
    assert [p.name for p in tmp_path.iterdir()] == ["table.csv"]


def test_failed_write_keeps_the_old_file(tmp_path):
    target = tmp_path / "table.csv"
    target.write_text("old")

    def broken(tmp):
        tmp.write_text("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError, match="disk full"):
        write_atomically(target, broken)
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["table.csv"]


def test_stale_temporaries_are_removed(tmp_path):
    from cabletree.fileio import remove_stale_temporaries
    (tmp_path / ".run.nc.abc123.tmp").write_text("half")
    (tmp_path / "run.nc").write_text("done")
    assert remove_stale_temporaries(tmp_path) == 1
    assert [p.name for p in tmp_path.iterdir()] == ["run.nc"]
