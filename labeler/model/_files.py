"""Atomic file writes for the model room's own files (feature cache, checkpoints)."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["write_atomic"]


def write_atomic(path: str | os.PathLike[str], data: bytes, *, fsync: bool = True) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same folder + ``os.replace``.

    A crash leaves the old file or the new one, never half of one. ``fsync=False`` skips
    flushing to disk (for derivable data whose readers verify a checksum anyway).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target
