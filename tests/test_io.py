"""Atomic output: nothing half-written, ordinary permissions."""

import os
import stat

import pytest

from adfit.io import atomic_write


def test_atomic_write_leaves_old_file_on_error_and_uses_the_umask(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_write(target) as fh:
            fh.write("half")
            raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]  # no temporary left behind
    with atomic_write(target) as fh:
        fh.write("new")
    assert target.read_text() == "new"
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask
