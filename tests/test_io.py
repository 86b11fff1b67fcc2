"""Atomic writes: the destination is replaced whole or not at all."""

import os
import stat

import pytest
from astropy.table import Table

from ritzline._io import atomic_write, write_table


def test_atomic_write_replaces_the_file_whole(tmp_path):
    path = tmp_path / "out.txt"
    path.write_text("old")
    with atomic_write(path) as fh:
        fh.write("new")
    assert path.read_text() == "new"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_a_crash_while_writing_leaves_the_old_file_and_no_temporary(tmp_path):
    path = tmp_path / "out.txt"
    path.write_text("old")
    with pytest.raises(RuntimeError), atomic_write(path) as fh:
        fh.write("half")
        raise RuntimeError("crash")
    assert path.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_written_files_get_ordinary_permissions(tmp_path):
    old = os.umask(0o022)
    try:
        with atomic_write(tmp_path / "out.txt") as fh:
            fh.write("x")
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(tmp_path / "out.txt").st_mode) == 0o644


def test_write_table_writes_ecsv_that_reads_back(tmp_path):
    table = Table({"a": [1.0, 2.0]})
    table["a"].unit = "nm"
    write_table(table, tmp_path / "t.ecsv")
    back = Table.read(tmp_path / "t.ecsv")
    assert list(back["a"]) == [1.0, 2.0]
    assert str(back["a"].unit) == "nm"
