"""Files and folders the tool writes respect the umask (issue 11: they were 0600 / 0700 whatever it was).

POSIX: open(..., O_CREAT) gives mode 0666 & ~umask and mkdir 0777 & ~umask (IEEE Std 1003.1,
open() and mkdir()); a store or report folder shared with colleagues must get the same.
"""
from __future__ import annotations

import os
import stat

import pytest

from waneguide.core.atomic import atomic_write_text, current_umask, make_private_dir_shareable


@pytest.fixture
def umask_027():
    old = os.umask(0o027)
    yield 0o027
    os.umask(old)


def test_current_umask_reads_the_process_umask(umask_027):
    assert current_umask() == 0o027


def test_atomic_writes_get_the_mode_of_a_plain_open(tmp_path, umask_027):
    out = atomic_write_text(tmp_path / "report.html", "<p>x</p>")
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    assert stat.S_IMODE(out.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode) == 0o640


def test_bundle_folders_get_the_mode_of_mkdir(tmp_path, umask_027):
    import tempfile

    d = make_private_dir_shareable(tempfile.mkdtemp(dir=tmp_path))
    plain = tmp_path / "plain"
    plain.mkdir()
    assert stat.S_IMODE(d.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode) == 0o750
