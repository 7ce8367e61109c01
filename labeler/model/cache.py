"""Feature cache: encoder features per tile and encoder version, float16, on disk.

Layout under the folder the caller passes (normally ``<project>/cache/features``)::

    <folder>/<encoder version>/<d[:2]>/<d>.feat     d = sha256(key + NUL + encoder version)

One file per tile, in a format of our own:

    8 bytes   magic ``b"LBLFEAT1"``
    4 bytes   header length n (unsigned, little-endian)
    n bytes   UTF-8 JSON header: key, encoder version, tile shape, level shapes, dtype,
              payload length, SHA-256 of the payload and the precision of the
              encoder that made it ("float32" when absent)
    payload   the four float16 arrays (C, h, w), C order, one after the other

Files are written atomically (temporary file + ``os.replace``). An entry is used only
when every check passes: magic, header, key, encoder version, tile and level shapes,
payload length and checksum. Anything else (a stale entry of another version, key or
shape, a truncated or bit-flipped file) is recomputed and rewritten, never trusted.
The cache holds derivable data: deleting the folder at any time only costs time.

Precision (``model.precision``) is a runtime setting of the same encoder weights, so
entries of both precisions share one version folder. A cache opened for float32 (what
training opens) uses float32 entries only and recomputes the others in float32, so heads
are always trained on float32 features; a cache opened for bfloat16 (proposing) uses
entries of either: a head proposes from bfloat16 features with the mIoU of float32 ones
to 0.0002 on the demo plots (``benchmarks/precision_quality.py``).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import struct
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import torch

from labeler.fileio import atomic_write_bytes
from labeler.model.encoder import (
    FEATURE_CHANNELS,
    PRECISIONS,
    encode_tiles,
    feature_shapes,
    precision_of,
)

__all__ = ["FeatureCache", "MAGIC"]

#: First bytes of every cache file.
MAGIC = b"LBLFEAT1"
_VERSION_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")

Features = tuple[np.ndarray, ...]


class FeatureCache:
    """Encoder features of tiles, kept per encoder version.

    Parameters
    ----------
    folder : path
        Cache root (``<project>/cache/features``); created on first write.
    encoder_version : str
        The encoder's ``version`` (letters, digits, ``.``, ``_``, ``-``).
    precision : {"float32", "bfloat16"}
        Arithmetic of the encoder that fills the cache (recorded in each entry). A
        float32 cache reads float32 entries only; a bfloat16 one reads both.

    Attributes
    ----------
    hits, misses : int
        Entries served from disk and entries (re)computed since creation.
    """

    def __init__(
        self,
        folder: str | os.PathLike[str],
        *,
        encoder_version: str,
        precision: str = "float32",
    ) -> None:
        if not isinstance(encoder_version, str) or not _VERSION_RE.match(encoder_version):
            raise ValueError(
                "encoder_version: expected 1-128 letters, digits, '.', '_' or '-' "
                f"(it names a folder), got {encoder_version!r}"
            )
        if precision not in PRECISIONS:
            raise ValueError(f"precision: expected 'float32' or 'bfloat16', got {precision!r}")
        self.folder = Path(folder)
        self.encoder_version = encoder_version
        self.precision = precision
        self._readable = {"float32"} if precision == "float32" else set(PRECISIONS)
        self.hits = 0
        self.misses = 0

    # -- paths ------------------------------------------------------------------------------
    def path_for(self, key: str) -> Path:
        """File of the entry for tile ``key``."""
        if not isinstance(key, str) or not key:
            raise ValueError(
                f"key: expected a non-empty string (image sha256 + window), got {key!r}"
            )
        digest = hashlib.sha256(f"{key}\0{self.encoder_version}".encode()).hexdigest()
        return self.folder / self.encoder_version / digest[:2] / f"{digest}.feat"

    # -- one entry --------------------------------------------------------------------------
    def load(self, key: str, *, tile_shape: tuple[int, int] | None = None) -> Features | None:
        """The cached features of ``key``, or None when absent, stale or corrupt.

        Parameters
        ----------
        key : str
        tile_shape : (int, int), optional
            ``(H, W)`` the tile must have; an entry of another shape is stale.
        """
        path = self.path_for(key)
        try:
            data = bytearray(path.read_bytes())
        except OSError:
            return None
        return self._decode(data, key=key, tile_shape=tile_shape)

    def _decode(
        self, data: bytearray, *, key: str, tile_shape: tuple[int, int] | None
    ) -> Features | None:
        head_end = len(MAGIC) + 4
        if len(data) < head_end or bytes(data[: len(MAGIC)]) != MAGIC:
            return None
        (n,) = struct.unpack("<I", bytes(data[len(MAGIC) : head_end]))
        if len(data) < head_end + n:
            return None
        try:
            header = json.loads(bytes(data[head_end : head_end + n]).decode("utf-8"))
            stored_tile = tuple(int(v) for v in header["tile_shape"])
            shapes = [tuple(int(v) for v in s) for s in header["shapes"]]
            ok = (
                header["key"] == key
                and header["encoder_version"] == self.encoder_version
                and header["dtype"] == "float16"
                and len(shapes) == len(FEATURE_CHANNELS)
                and all(len(s) == 3 for s in shapes)
                and shapes == [tuple(s) for s in feature_shapes(*stored_tile)]
                and (tile_shape is None or stored_tile == tuple(tile_shape))
                and header.get("precision", "float32") in self._readable
            )
            length = int(header["payload_bytes"])
            checksum = str(header["sha256"])
        except (ValueError, KeyError, TypeError, UnicodeDecodeError):
            return None
        if not ok:
            return None
        payload = memoryview(data)[head_end + n :]
        expected = sum(2 * int(np.prod(s)) for s in shapes)
        if length != expected or len(payload) != expected:
            return None
        if hashlib.sha256(payload).hexdigest() != checksum:
            return None
        out = []
        offset = 0
        for s in shapes:
            count = int(np.prod(s))
            arr = np.frombuffer(payload, dtype="<f2", count=count, offset=offset).reshape(s)
            out.append(arr)  # views into one writable bytearray
            offset += 2 * count
        return tuple(out)

    def store(
        self, key: str, features: Sequence[np.ndarray], *, tile_shape: tuple[int, int]
    ) -> Path:
        """Write the entry of ``key`` atomically; returns its path.

        Raises
        ------
        ValueError
            If the arrays are not the four levels of a ``tile_shape`` tile.
        """
        want = feature_shapes(*tile_shape)
        got = tuple(tuple(np.shape(a)) for a in features)
        if got != want:
            raise ValueError(
                f"features: expected level shapes {want} for a {tile_shape} tile, got {got}"
            )
        arrays = [np.ascontiguousarray(a, dtype="<f2") for a in features]
        payload = b"".join(a.tobytes() for a in arrays)
        header = json.dumps(
            {
                "key": key,
                "encoder_version": self.encoder_version,
                "tile_shape": list(tile_shape),
                "shapes": [list(s) for s in want],
                "dtype": "float16",
                "payload_bytes": len(payload),
                "sha256": hashlib.sha256(payload).hexdigest(),
                "precision": self.precision,
            },
            sort_keys=True,
        ).encode("utf-8")
        blob = MAGIC + struct.pack("<I", len(header)) + header + payload
        # derivable data: skip fsync, a torn file fails its checksum and is recomputed
        return atomic_write_bytes(self.path_for(key), blob, fsync=False)

    # -- many entries -----------------------------------------------------------------------
    def get_or_compute(
        self,
        keys: Sequence[str],
        images_fn: Callable[[list[str]], Sequence[np.ndarray]],
        encoder: Callable,
        *,
        tile_shapes: Sequence[tuple[int, int]] | None = None,
        batch_size: int = 8,
        progress: Callable[[int, int], None] | None = None,
    ) -> list[Features]:
        """Features of every key, from the cache where valid, else computed and stored.

        Parameters
        ----------
        keys : sequence of str
            Tile keys (image sha256 + window), unique per tile.
        images_fn : callable
            ``images_fn(keys) -> images``: the (H, W, 3) uint8 tiles of the keys that must
            be computed, in the same order. Called in chunks, only for missing entries.
        encoder : Lite0Encoder or callable
            Maps a float batch ``(N, 3, H, W)`` in 0..255 to the four feature maps. If it
            has a ``version`` attribute it must equal this cache's ``encoder_version``.
        tile_shapes : sequence of (int, int), optional
            Expected ``(H, W)`` per key; entries of another shape are stale.
        batch_size : int
            Tiles per encoder pass.
        progress : callable, optional
            ``progress(done, total)`` over the entries that are computed.

        Returns
        -------
        features : list of tuple of 4 float16 ndarray, one per key, in order

        Raises
        ------
        ValueError
            An encoder of another version, a wrong number of images, or images whose
            shape differs from ``tile_shapes``.
        """
        version = getattr(encoder, "version", None)
        if isinstance(version, str) and version and version != self.encoder_version:
            raise ValueError(
                f"encoder: its version {version!r} differs from the cache's "
                f"{self.encoder_version!r}; open FeatureCache(..., encoder_version=encoder.version)"
            )
        if isinstance(encoder, torch.nn.Module) and precision_of(encoder) != self.precision:
            raise ValueError(
                f"encoder: it runs in {precision_of(encoder)}, the cache records "
                f"{self.precision}; open FeatureCache(..., precision=precision_of(encoder))"
            )
        if tile_shapes is not None and len(tile_shapes) != len(keys):
            raise ValueError(
                f"tile_shapes: expected one (H, W) per key ({len(keys)}), got {len(tile_shapes)}"
            )
        results: list[Features | None] = []
        missing: list[int] = []
        for i, key in enumerate(keys):
            shape = None if tile_shapes is None else tuple(tile_shapes[i])
            feats = self.load(key, tile_shape=shape)  # type: ignore[arg-type]
            results.append(feats)
            if feats is None:
                missing.append(i)
            else:
                self.hits += 1
        chunk = max(1, batch_size) * 4
        done = 0
        for start in range(0, len(missing), chunk):
            idx = missing[start : start + chunk]
            wanted = [keys[i] for i in idx]
            images = list(images_fn(wanted))
            if len(images) != len(idx):
                raise ValueError(
                    f"images_fn: expected {len(idx)} images for keys {wanted[:3]}..., "
                    f"got {len(images)}"
                )
            for i, im in zip(idx, images, strict=True):
                if tile_shapes is not None and tuple(np.shape(im)[:2]) != tuple(tile_shapes[i]):
                    raise ValueError(
                        f"images_fn: image of key {keys[i]!r} has shape {np.shape(im)}, "
                        f"expected {tuple(tile_shapes[i])} x 3"
                    )
            feats = encode_tiles(encoder, images, batch_size=batch_size)
            for i, im, f in zip(idx, images, feats, strict=True):
                self.store(keys[i], f, tile_shape=tuple(np.shape(im)[:2]))  # type: ignore[arg-type]
                results[i] = f
                self.misses += 1
            done += len(idx)
            if progress is not None:
                progress(done, len(missing))
        return results  # type: ignore[return-value]
