"""Generic file writes that never leave half a file: write, copy, and remove a marked folder.

Every write goes to a temporary file in the target's own folder and is renamed over the
target (``os.replace``, atomic on POSIX and Windows within one file system), so a crash, a
kill or a full disk leaves either the old file or the new one, never half of one.

This module knows nothing about images, masks or models: the rooms that own a kind of
file (``imagery/`` and ``export/`` for image and GeoJSON files, ``model/`` for checkpoints
and the feature cache, ``project`` for the settings file) encode their bytes and hand them
here. It imports only the standard library and :mod:`labeler.errors`.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO

try:  # POSIX: claims are locked, so a claim whose process died can be told from a live one
    import fcntl
except ImportError:  # pragma: no cover - Windows: claims are never judged stale
    fcntl = None

from labeler.errors import InputError, LabelerError

__all__ = [
    "file_mode",
    "atomic_write_bytes",
    "atomic_write_text",
    "atomic_copy_file",
    "atomic_writer",
    "remove_marked_folder",
    "sha256_file",
    "staged_folder",
    "check_output_folder",
    "Claim",
    "claim",
    "claim_is_live",
]


def file_mode() -> int:
    """Permission bits of a new file under the current umask.

    Returns
    -------
    int
        ``0o666 & ~umask``, the mode ``open(path, "w")`` would give a new file.
    """
    return 0o666 & ~_umask()


def _temporary_beside(target: Path, suffix: str) -> tuple[int, str]:
    target.parent.mkdir(parents=True, exist_ok=True)
    return tempfile.mkstemp(prefix=f".{target.name}.", suffix=suffix, dir=target.parent)


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *, fsync: bool = True) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder and rename.

    Parameters
    ----------
    path : path-like
        Target file; missing parent folders are created.
    data : bytes
        The whole new content.
    fsync : bool
        Flush the file to disk before the rename (default). ``False`` is for derivable
        data whose readers verify a checksum anyway, such as the feature cache.

    Returns
    -------
    Path
        The target path.
    """
    target = Path(path)
    fd, tmp = _temporary_beside(target, ".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.chmod(tmp, file_mode())  # mkstemp makes 0600; give the file the usual mode
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


def atomic_write_text(
    path: str | os.PathLike[str], text: str, *, encoding: str = "utf-8"
) -> Path:
    """Write ``text`` to ``path`` atomically (see :func:`atomic_write_bytes`).

    Parameters
    ----------
    path : path-like
        Target file; missing parent folders are created.
    text : str
        The whole new content.
    encoding : str
        Text encoding (default UTF-8).

    Returns
    -------
    Path
        The target path.
    """
    return atomic_write_bytes(path, text.encode(encoding))


def sha256_file(path: str | os.PathLike[str], *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, read in chunks.

    Parameters
    ----------
    path : path-like
        File to hash.
    chunk : int
        Bytes read at a time.

    Returns
    -------
    str
        The digest as 64 lower-case hex digits.
    """
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def atomic_copy_file(
    source: str | os.PathLike[str],
    path: str | os.PathLike[str],
    *,
    sha256: str | None = None,
) -> Path:
    """Copy ``source`` to ``path`` through a temporary file in the target folder and rename.

    Parameters
    ----------
    source : path-like
        File to copy.
    path : path-like
        Target file; missing parent folders are created; an existing file is replaced.
    sha256 : str, optional
        Expected SHA-256 (hex) of the content. The copy is hashed before the rename and
        dropped if it differs (the source changed since it was checked).

    Returns
    -------
    Path
        The target path.

    Raises
    ------
    InputError
        If the copy's SHA-256 differs from ``sha256``; the target is left as it was.
    """
    src = Path(source)
    target = Path(path)
    fd, tmp = _temporary_beside(target, ".part")
    os.close(fd)
    try:
        shutil.copyfile(src, tmp)
        if sha256 is not None and sha256_file(tmp) != sha256:
            raise InputError(f"{src}: the file changed while it was being copied; add it again")
        os.chmod(tmp, file_mode())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


def remove_marked_folder(folder: str | os.PathLike[str], *, marker: str) -> None:
    """Delete ``folder`` and everything in it, but only if it holds the file ``marker``.

    Used to rebuild folders this program made itself (the demo project); a folder
    without the marker may hold someone's work and is never deleted.

    Parameters
    ----------
    folder : path-like
        Folder to delete.
    marker : str
        Name of the file that marks the folder as one this program may delete.

    Raises
    ------
    LabelerError
        If ``folder`` is not a folder or does not hold ``marker``; nothing is deleted.
    """
    root = Path(folder)
    if not root.is_dir():
        raise LabelerError(f"{root}: expected a folder to delete, found none")
    if not (root / marker).is_file():
        raise LabelerError(
            f"{root}: holds no {marker} file, so it was not made by labeler and is not "
            "deleted; choose another folder"
        )
    shutil.rmtree(root)


@contextmanager
def atomic_writer(path: str | os.PathLike[str], *, fsync: bool = True) -> Iterator[BinaryIO]:
    """Write a file piece by piece, atomically: a temporary file beside it, then a rename.

    For content too large to hold in memory at once (:func:`atomic_write_bytes` takes the
    whole content). The target appears only when the ``with`` block ends without an
    error; an error or a kill inside it leaves the old file (or none) and the temporary
    file is removed (a kill leaves it behind, hidden, beside the target).

    Parameters
    ----------
    path : path-like
        Target file; missing parent folders are created.
    fsync : bool
        Flush the file to disk before the rename (default).

    Yields
    ------
    BinaryIO
        The open temporary file, for ``write``.
    """
    target = Path(path)
    fd, tmp = _temporary_beside(target, ".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            yield fh
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.chmod(tmp, file_mode())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def check_output_folder(folder: str | os.PathLike[str], *, what: str = "output folder") -> Path:
    """Check that ``folder`` is, or can become, a folder; nothing is created.

    Parameters
    ----------
    folder : path-like
        Where a command is about to write.
    what : str
        How messages name it (e.g. ``"--out"``).

    Returns
    -------
    Path

    Raises
    ------
    LabelerError
        If ``folder`` is a file, or one of its parents is a file (no folder can be made
        under a file).
    """
    target = Path(folder)
    if target.exists() and not target.is_dir():
        raise LabelerError(f"{what} {target}: is a file, expected a folder; choose another folder")
    for parent in target.parents:
        if parent.exists():
            if not parent.is_dir():
                raise LabelerError(
                    f"{what} {target}: {parent} is a file, so no folder can be made under it; "
                    "choose another folder"
                )
            break
    return target


@contextmanager
def staged_folder(folder: str | os.PathLike[str]) -> Iterator[Path]:
    """Write a set of files all or nothing: into a staging folder, moved into place at the end.

    The caller writes into the yielded folder (a new hidden folder beside ``folder``, on
    the same file system and at the same depth, so relative paths computed in it hold
    for ``folder`` too). When the block ends normally every file is renamed into
    ``folder`` (replacing files of the same name, keeping others); when it raises,
    the staging folder is deleted and ``folder`` is as it was. Folders created for it
    are removed again on failure.

    Parameters
    ----------
    folder : path-like
        The final folder (created if missing).

    Yields
    ------
    Path
        The staging folder to write into.
    """
    target = Path(folder)
    made = [p for p in (target.parent, *target.parent.parents) if not p.exists()]
    target.parent.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".staging", dir=target.parent))
    try:
        os.chmod(stage, 0o777 & ~_umask())  # mkdtemp makes 0700; give the usual mode
        yield stage
        if not target.exists():
            os.replace(stage, target)
            return
        for path in sorted(stage.rglob("*")):
            if path.is_dir():
                continue
            final = target / path.relative_to(stage)
            final.parent.mkdir(parents=True, exist_ok=True)
            os.replace(path, final)
        shutil.rmtree(stage)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        for parent in made:  # nearest first; only if still empty
            try:
                parent.rmdir()
            except OSError:
                break
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


class Claim:
    """A marker file this process holds (see :func:`claim`); :meth:`release` drops it."""

    def __init__(self, path: Path, fd: int) -> None:
        self.path = path
        self._fd = fd

    def release(self) -> None:
        """Delete the marker and let go of it (a second call does nothing)."""
        if self._fd < 0:
            return
        try:
            self.path.unlink(missing_ok=True)
        finally:
            os.close(self._fd)
            self._fd = -1

    def __enter__(self) -> Claim:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def claim(path: str | os.PathLike[str], *, text: str = "") -> Claim | None:
    """Create the marker file ``path`` unless it exists, and hold it while this process lives.

    A claim reserves a name among processes (creating it is atomic: only one of two
    processes gets it) and says "work in progress": the marker is locked (``flock``) from
    the moment it appears until :meth:`Claim.release` or the end of the process, so
    :func:`claim_is_live` can tell the claim of a killed process from a live one.

    Parameters
    ----------
    path : path-like
        The marker file; its folder must exist.
    text : str
        Written into the marker (for a person who finds it).

    Returns
    -------
    Claim or None
        None when the marker exists already (someone else holds the name, or held it and
        died; see :func:`claim_is_live`).
    """
    target = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        os.write(fd, text.encode("utf-8"))
        if fcntl is not None:
            fcntl.flock(fd, fcntl.LOCK_EX)  # locked before it has its name
        try:
            os.link(tmp, target)  # atomic; fails when the name is taken
        except FileExistsError:
            os.close(fd)
            fd = -1
    except BaseException:
        os.close(fd)
        Path(tmp).unlink(missing_ok=True)
        raise
    Path(tmp).unlink(missing_ok=True)
    return None if fd < 0 else Claim(target, fd)


def claim_is_live(path: str | os.PathLike[str]) -> bool:
    """True if the marker ``path`` is held by a running process (or cannot be judged).

    Parameters
    ----------
    path : path-like
        A marker made by :func:`claim`.

    Returns
    -------
    bool
        False only when the marker exists and no process holds its lock: the process
        that made it ended without releasing it (it was killed).
    """
    if fcntl is None:
        return True
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return False
    except OSError:
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return True
    finally:
        os.close(fd)  # closing drops our lock, if we got it
    return False
