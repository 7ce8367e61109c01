"""Which mask paths an import reads (labeler/export/mask_files.py)."""

from __future__ import annotations

import os

import pytest

from labeler.errors import MaskImportError
from labeler.export.mask_files import check_mask_path


def test_a_regular_file_gives_its_size(tmp_path):
    path = tmp_path / "plot-a_mask.png"
    path.write_bytes(b"12345")
    assert check_mask_path(path) == 5
    link = tmp_path / "plot-b.png"
    link.symlink_to(path)  # a link to a regular file is read like the file
    assert check_mask_path(link) == 5


@pytest.mark.parametrize(
    ("make", "match"),
    [
        (lambda d: d / "gone.png", r"gone.png: no such file$"),
        (lambda d: (d / "dir.png").mkdir() or d / "dir.png",
         r"dir.png: is a folder, not a mask file; name the mask files in it \(e.g. .*\*.png\)"),
        (lambda d: os.mkfifo(d / "fifo.png") or d / "fifo.png",
         r"fifo.png: not a regular file \(a pipe, device or socket\)"),
        (lambda d: (d / "zero.png").symlink_to("/dev/zero") or d / "zero.png",
         r"zero.png: not a regular file"),
        (lambda d: d / "tab\there.png", r"^'.*tab\\there.png': a file name with control"),
        (lambda d: d / os.fsdecode(b"\xfe.png"), r"\\udcfe.png': the file name is not valid UTF-8"),
    ],
)
def test_paths_that_are_not_read(tmp_path, make, match):
    with pytest.raises(MaskImportError, match=match):
        check_mask_path(make(tmp_path))
