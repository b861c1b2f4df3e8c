"""The one atomic file writer: complete files or none, normal permissions."""

import os
import stat

import pytest

from rvqlayer.files import atomic_path, atomic_write, new_file_mode


def test_file_appears_whole_with_the_umask_permissions(tmp_path):
    target = tmp_path / "sub" / "out.bin"
    with atomic_write(target) as f:
        f.write(b"abc")
    assert target.read_bytes() == b"abc"
    assert stat.S_IMODE(os.stat(target).st_mode) == new_file_mode()
    assert sorted(p.name for p in target.parent.iterdir()) == ["out.bin"]


def test_failure_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError), atomic_write(target, "w") as f:
        f.write("half")
        raise RuntimeError("killed")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_path_form_for_writers_that_want_a_name(tmp_path):
    with atomic_path(tmp_path / "x.txt") as tmp:
        assert tmp.parent == tmp_path
        tmp.write_text("ok")
    assert (tmp_path / "x.txt").read_text() == "ok"
    assert stat.S_IMODE(os.stat(tmp_path / "x.txt").st_mode) == new_file_mode()
