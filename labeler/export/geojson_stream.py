"""Writing a GeoJSON FeatureCollection feature by feature, so that no export is held whole.

The export of a big orthomosaic holds hundreds of thousands of features; as Python
dicts and then as one JSON text they would take gigabytes. :class:`FeatureCollectionWriter`
takes the features in batches (:meth:`labeler.export.geojson.ImageFeatures.batches`) and
appends each as one line of compact JSON::

    {"type":"FeatureCollection","features":[
    {"type":"Feature",...},
    {"type":"Feature",...}
    ],"bbox":[west,south,east,north]}

The collection's ``bbox`` (RFC 7946 section 5) is known only after the last feature, so
it follows the features: JSON members are unordered (RFC 8259 section 4), and readers
take them in any order. A file in pixel coordinates carries the member
``"labeler:coordinates": "pixel"`` first, as :func:`labeler.export.geojson.write_geojson`
writes it. The file is written through :func:`labeler.fileio.atomic_writer`: it appears
complete or not at all.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Mapping
from pathlib import Path
from types import TracebackType
from typing import BinaryIO

from labeler.export.geojson import COORDINATES_MEMBER
from labeler.fileio import atomic_writer

__all__ = ["FeatureCollectionWriter"]


class FeatureCollectionWriter:
    """A FeatureCollection file written feature by feature (see the module docstring).

    Use it as a context manager; the file is complete when the ``with`` block ends
    without an error (an error leaves no file).

    Parameters
    ----------
    path : path-like
        Target file; missing folders are created; an existing file is replaced only
        when the new one is complete.
    pixel_coordinates : bool
        Mark the collection as holding pixel coordinates (not RFC 7946).

    Attributes
    ----------
    count : int
        Features written so far.
    bbox : list of float or None
        ``[west, south, east, north]`` over the features' ``bbox`` members so far.
    """

    def __init__(self, path: str | os.PathLike[str], *, pixel_coordinates: bool = False) -> None:
        self.path = Path(path)
        self.pixel_coordinates = bool(pixel_coordinates)
        self.count = 0
        self.bbox: list[float] | None = None
        self._ids: set = set()
        self._context = None
        self._fh: BinaryIO | None = None

    def __enter__(self) -> FeatureCollectionWriter:
        self._context = atomic_writer(self.path)
        self._fh = self._context.__enter__()
        head = '{"type":"FeatureCollection"'
        if self.pixel_coordinates:
            head += f',"{COORDINATES_MEMBER}":"pixel"'
        self._fh.write((head + ',"features":[').encode("utf-8"))
        return self

    def write(self, features: Iterable[Mapping]) -> None:
        """Append features (GeoJSON Feature dicts).

        Raises
        ------
        ValueError
            For a feature that is not a GeoJSON Feature, holds NaN or infinite numbers,
            or repeats the ``id`` of an earlier feature of this file.
        """
        if self._fh is None:
            raise ValueError(
                f"{self.path}: open the writer with 'with FeatureCollectionWriter(...)' first"
            )
        lines = []
        for f in features:
            if not isinstance(f, Mapping) or f.get("type") != "Feature":
                raise ValueError(f"features: expected GeoJSON Feature dicts, got {f!r:.80}")
            fid = f.get("id")
            if fid is not None:
                if fid in self._ids:
                    raise ValueError(
                        f"features: feature id {fid!r} occurs twice in {self.path.name}; give "
                        "each image a distinct name"
                    )
                self._ids.add(fid)
            try:
                text = json.dumps(f, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
            except ValueError as err:
                raise ValueError(f"features: cannot be written as JSON ({err})") from None
            lines.append(("\n" if self.count == 0 else ",\n") + text)
            self.count += 1
            box = f.get("bbox")
            if box is not None:
                if self.bbox is None:
                    self.bbox = [float(v) for v in box]
                else:
                    b = self.bbox
                    self.bbox = [
                        min(b[0], box[0]), min(b[1], box[1]), max(b[2], box[2]), max(b[3], box[3])
                    ]
        self._fh.write("".join(lines).encode("utf-8"))

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        context, self._context = self._context, None
        if context is None:
            return
        if error is not None:  # drop the temporary file, let the error pass
            context.__exit__(kind, error, trace)
            return
        try:
            tail = "\n]" if self.count else "]"
            if self.bbox is not None:
                tail += ',"bbox":' + json.dumps(self.bbox, allow_nan=False, separators=(",", ":"))
            self._fh.write((tail + "}\n").encode("utf-8"))
        except BaseException as exc:
            context.__exit__(type(exc), exc, exc.__traceback__)
            raise
        context.__exit__(None, None, None)
        self._fh = None
