"""Atomic writes: a failed write leaves nothing behind and keeps the old file."""

import os
import stat

import pytest

from bos._io import atomic_path
from bos.errors import DataFileError


def test_success_renames_into_place_with_normal_permissions(tmp_path):
    target = tmp_path / "out.txt"
    with atomic_path(target) as tmp:
        assert tmp != target and tmp.parent == tmp_path
        tmp.write_text("done")
    assert target.read_text() == "done"
    # POSIX umask semantics (common practice: files 0666 & ~umask)
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_failure_keeps_old_file_and_removes_temporary(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("crash mid-write")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]


def test_missing_directory_is_a_one_line_error(tmp_path):
    with pytest.raises(DataFileError, match="does not exist"):
        with atomic_path(tmp_path / "nope" / "x.h5"):
            pass
