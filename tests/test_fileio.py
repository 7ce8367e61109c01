"""Atomic writes and copies, hashing, removing a marked folder (labeler/fileio.py)."""

from __future__ import annotations

import os
import stat

import pytest

from labeler.errors import InputError, LabelerError
from labeler.fileio import (
    atomic_copy_file,
    atomic_write_bytes,
    atomic_write_text,
    file_mode,
    remove_marked_folder,
    sha256_file,
)

#: FIPS 180-2, Appendix B.1: SHA-256("abc").
ABC_SHA256 = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def leftovers(folder):
    """Temporary files a write may have left beside its target."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_sha256_of_the_fips_example_in_small_chunks(tmp_path):
    p = tmp_path / "abc.bin"
    p.write_bytes(b"abc")
    assert sha256_file(p, chunk=2) == ABC_SHA256


def test_write_replaces_the_whole_file_and_creates_folders(tmp_path):
    target = tmp_path / "a" / "b" / "notes.txt"
    assert atomic_write_bytes(target, b"first version, longer") == target
    atomic_write_text(target, "second")
    assert target.read_text(encoding="utf-8") == "second"
    assert leftovers(target.parent) == []


def test_new_files_get_the_umask_mode_not_0600(tmp_path):
    old = os.umask(0o022)
    try:
        assert file_mode() == 0o644
        path = atomic_write_bytes(tmp_path / "x.bin", b"x", fsync=False)
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == 0o644


def test_failed_write_keeps_the_old_file_and_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "settings.toml"
    target.write_bytes(b"old")

    def full_disk(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", full_disk)
    with pytest.raises(OSError, match="No space left"):
        atomic_write_text(target, "new")
    with pytest.raises(OSError, match="No space left"):
        atomic_copy_file(target, tmp_path / "copy.toml")
    assert target.read_bytes() == b"old"
    assert not (tmp_path / "copy.toml").exists()
    assert leftovers(tmp_path) == []


def test_copy_checks_the_hash_and_leaves_nothing_when_it_differs(tmp_path):
    src = tmp_path / "field.png"
    src.write_bytes(b"abc")
    out = tmp_path / "copies" / "field.png"
    assert atomic_copy_file(src, out, sha256=ABC_SHA256) == out
    assert out.read_bytes() == b"abc"
    src.write_bytes(b"abd")  # the file changed after it was checked
    with pytest.raises(InputError, match=r"field.png: the file changed while it was being copied"):
        atomic_copy_file(src, out, sha256=ABC_SHA256)
    assert out.read_bytes() == b"abc"
    assert leftovers(out.parent) == []


def test_remove_marked_folder_only_with_its_marker(tmp_path):
    work = tmp_path / "someone's project"
    work.mkdir()
    (work / "labeler.db").write_bytes(b"hours of work")
    with pytest.raises(LabelerError, match=r"holds no \.made-by-us file, so it was not made by"):
        remove_marked_folder(work, marker=".made-by-us")
    assert (work / "labeler.db").exists()
    with pytest.raises(LabelerError, match="expected a folder to delete"):
        remove_marked_folder(tmp_path / "missing", marker=".made-by-us")
    (work / ".made-by-us").write_text("")
    remove_marked_folder(work, marker=".made-by-us")
    assert not work.exists()


def test_remove_file_deletes_one_file_and_refuses_a_folder(tmp_path):
    from labeler.fileio import remove_file

    f = tmp_path / "run.ckpt"
    f.write_bytes(b"x")
    assert remove_file(f) is True and not f.exists()
    assert remove_file(f) is False
    with pytest.raises(LabelerError, match="expected a file to delete, found a folder"):
        remove_file(tmp_path)
    assert tmp_path.is_dir()
