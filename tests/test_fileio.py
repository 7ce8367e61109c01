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


# -- staged folders, output checks, claims ------------------------------------------------
def test_staged_folder_moves_everything_into_place_at_the_end(tmp_path):
    from labeler.fileio import staged_folder

    target = tmp_path / "exports"
    target.mkdir()
    (target / "old.txt").write_text("kept")
    (target / "same.txt").write_text("replaced")
    with staged_folder(target) as stage:
        assert stage.parent == tmp_path and stage != target  # same depth: relative paths hold
        atomic_write_text(stage / "same.txt", "new")
        atomic_write_text(stage / "masks" / "plot.txt", "mask")
        assert not (target / "masks").exists()  # nothing visible before the end
    assert (target / "old.txt").read_text() == "kept"
    assert (target / "same.txt").read_text() == "new"
    assert (target / "masks" / "plot.txt").read_text() == "mask"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["exports"]


def test_staged_folder_leaves_everything_as_it_was_on_failure(tmp_path):
    from labeler.fileio import staged_folder

    target = tmp_path / "deep" / "er" / "exports"
    with pytest.raises(OSError, match="disk full"):
        with staged_folder(target) as stage:
            atomic_write_text(stage / "a.txt", "half")
            raise OSError(28, "disk full")
    assert list(tmp_path.iterdir()) == []  # the folders made for it are gone too
    with staged_folder(target) as stage:  # a new folder is renamed into place whole
        atomic_write_text(stage / "a.txt", "whole")
    assert (target / "a.txt").read_text() == "whole"
    assert stat.S_IMODE(target.stat().st_mode) == 0o777 & ~_umask()


def _umask():
    mask = os.umask(0)
    os.umask(mask)
    return mask


def test_output_folder_that_is_a_file_or_under_one(tmp_path):
    from labeler.fileio import check_output_folder

    notes = tmp_path / "notes.txt"
    notes.write_text("x")
    assert check_output_folder(tmp_path / "new" / "out") == tmp_path / "new" / "out"
    with pytest.raises(LabelerError, match=r"--out .*notes\.txt: is a file, expected a folder"):
        check_output_folder(notes, what="--out")
    with pytest.raises(
        LabelerError, match=r"notes\.txt is a file, so no folder can be made under it"
    ):
        check_output_folder(notes / "a" / "b", what="--out")
    assert not (tmp_path / "new").exists()  # nothing is created


def test_a_claim_is_taken_once(tmp_path):
    from labeler.fileio import claim, claim_is_live

    first = claim(tmp_path / ".adding-plot")
    assert first is not None and claim_is_live(tmp_path / ".adding-plot")
    assert claim(tmp_path / ".adding-plot") is None  # taken
    first.release()
    first.release()  # a second release does nothing
    assert not (tmp_path / ".adding-plot").exists()
    assert leftovers(tmp_path) == []


def test_a_claim_of_a_killed_process_is_not_live(tmp_path):
    import subprocess
    import sys

    # the child takes a claim and exits without releasing it (as a killed add would)
    code = (
        "import sys; from labeler.fileio import claim; "
        "c = claim(sys.argv[1]); print('taken' if c else 'refused')"
    )
    out = subprocess.run(
        [sys.executable, "-c", code, str(tmp_path / ".adding-x")],
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    from labeler.fileio import claim_is_live

    assert out.strip() == "taken" and (tmp_path / ".adding-x").exists()
    assert not claim_is_live(tmp_path / ".adding-x")
    assert not claim_is_live(tmp_path / ".adding-nothing")  # no marker: nobody holds it
