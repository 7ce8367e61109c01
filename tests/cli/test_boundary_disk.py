"""A real full disk, and the modes of the files a command makes.

Split from ``test_boundary.py`` (same fixtures): a small tmpfs is filled while ``add``
and ``export`` run, and the project must be left as it was, with one error line.
"""

from __future__ import annotations

import errno

import pytest

from tests.cli.conftest import fingerprint, one_error_line, run


# -- a real full disk ------------------------------------------------------------------------
@pytest.fixture
def small_disk(tmp_path):
    """A 2 MB file system of its own (tmpfs); skipped where mounting is not allowed."""
    import os
    import subprocess

    if os.geteuid() != 0:
        pytest.skip("mounting a small file system needs root")
    mount = tmp_path / "disk"
    mount.mkdir()
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=2m", "tmpfs", str(mount)], capture_output=True
    )
    if done.returncode:
        pytest.skip(f"cannot mount a small file system here: {done.stderr.decode().strip()}")
    yield mount
    if subprocess.run(["umount", str(mount)], capture_output=True).returncode:
        subprocess.run(["umount", "-l", str(mount)], check=True)


def _fill(disk):
    """Fill the file system to the last byte; the filler lies outside the project."""
    with open(disk / "filler", "wb", buffering=0) as fh:
        for size in (65536, 1):
            try:
                while fh.write(b"\0" * size):
                    pass
            except OSError as exc:
                assert exc.errno == errno.ENOSPC


def test_really_full_disk_during_add_and_export(template, small_disk, tmp_path, capsys):
    import shutil

    import numpy as np
    from affine import Affine

    from labeler.imagery.write import write_geotiff

    project = small_disk / "brackenlow"
    shutil.copytree(template, project)
    big = tmp_path / "south-field.tif"  # about 1.7 MB: more than the disk has left
    write_geotiff(
        big,
        np.random.default_rng(8).integers(0, 256, (800, 700, 3), dtype=np.uint8),
        transform=Affine(0.004, 0, 431000, 0, -0.004, 5711000),
        crs="EPSG:32631",
    )
    before = fingerprint(project)
    code, _, err = run(["add", project, big], capsys)
    line = one_error_line(err)
    assert code == 1 and "the disk is full (No space left on device)" in line
    assert fingerprint(project) == before
    _fill(small_disk)
    code, _, err = run(["export", project, "--format", "masks"], capsys)
    line = one_error_line(err)
    assert code == 1 and "the disk is full" in line
    (small_disk / "filler").unlink()
    assert fingerprint(project) == before
    code, _, err = run(["export", project, "--format", "masks"], capsys)  # space again
    assert code == 0, err


def test_image_copies_and_database_get_the_same_mode(tmp_path, incoming, capsys):
    import os
    import stat

    old = os.umask(0o027)
    try:
        assert run(["init", tmp_path / "p"], capsys)[0] == 0
        assert run(["add", tmp_path / "p", incoming["strip"], incoming["leaf"]], capsys)[0] == 0
    finally:
        os.umask(old)
    modes = {
        p.name: stat.S_IMODE(p.stat().st_mode)
        for p in [tmp_path / "p" / "labeler.db", *(tmp_path / "p" / "images").iterdir()]
    }
    assert modes == {"labeler.db": 0o640, "north-strip.tif": 0o640, "leaf.png": 0o640}
