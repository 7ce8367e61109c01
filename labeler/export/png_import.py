"""Reading PNG class masks made elsewhere, a band of rows at a time.

8-bit single-channel PNGs whose values are schema indices or 255 (unlabelled), or
whose grey values a ``values`` table maps to classes. RGB (or fully opaque RGBA)
PNGs are read only with a ``colours`` table mapping every colour present to a class.
Palette PNGs are read by their palette INDEX (the common convention of segmentation
datasets), or by colour when a ``colours`` table is given. 16-bit grey PNGs are accepted
when every value is a valid 8-bit class value (or is in the ``values`` table), refused
otherwise. Grey PNGs of fewer than 8 bits and 16-bit colour PNGs are refused.

The file's header and chunks are checked first (:mod:`labeler.export.png_header`):
signature, every chunk's CRC, the end of the file, then the size against the image, the
colour type and the bit depth, all before any pixel is decoded.
Only then are pixels decoded, through GDAL's PNG driver, a band of rows at a time and
strictly from top to bottom (a PNG is one compressed stream; going back means decoding
from the start again), so a mask as large as a 20000 x 20000 orthomosaic is never held
whole. An interlaced PNG cannot be read that way and is refused above
:data:`MAX_INTERLACED_BYTES` of pixel data.

Every problem raises :class:`labeler.errors.MaskImportError` naming the file and the
problem.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import rasterio
from rasterio.errors import NotGeoreferencedWarning, RasterioError
from rasterio.windows import Window

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import MaskImportError
from labeler.export.png_header import COLOUR_TYPES, read_png_header

__all__ = ["MAX_INTERLACED_BYTES", "PngMaskReader", "read_png_mask"]

#: Largest pixel data (bytes) of an interlaced PNG that is read (it is decoded whole).
MAX_INTERLACED_BYTES = 256 * 2**20
#: GDAL block cache (MB) while a mask is read: rows are read once, top to bottom.
_GDAL_CACHE_MB = 32
def _check_table_values(table: Mapping, schema: ClassSchema, name: str, what: str) -> None:
    for key, value in table.items():
        if not isinstance(value, int | np.integer) or (
            int(value) != UNLABELLED and int(value) not in schema.indices
        ):
            raise MaskImportError(
                f"{name}: {what} maps {key!r} to {value!r}, which is not a class index "
                f"{schema.indices} or 255"
            )


def _innermost(err: BaseException) -> str:
    """The message of the first error in a chain (the decoder's own words), on one line."""
    seen = err
    while (seen.__cause__ or seen.__context__) is not None:
        seen = seen.__cause__ or seen.__context__  # type: ignore[assignment]
    return " ".join(str(seen).split()) or type(seen).__name__


def _colour_key(rgb: np.ndarray) -> np.ndarray:
    return (rgb[..., 0].astype(np.int64) << 16) | (rgb[..., 1].astype(np.int64) << 8) | rgb[..., 2]


def _rgb_text(key: int) -> str:
    return f"({key >> 16}, {(key >> 8) & 255}, {key & 255})"


class PngMaskReader:
    """A PNG class mask opened for reading a band of rows at a time.

    The header is checked when the reader is made; pixel values are checked as rows are
    read. Rows must be asked for from top to bottom (a band may begin inside the band
    before it: the rows kept from that one are reused); asking for earlier rows decodes
    the file from its start again.

    Parameters
    ----------
    path : path-like
    shape : (int, int)
        ``(height, width)`` of the image the mask belongs to.
    schema : ClassSchema
    colours : mapping (r, g, b) -> class index, or None
        Needed for RGB images; every colour present must be in it.
    values : mapping grey value -> class index, or None
        Optional remapping of a grey (or 16-bit) mask or of palette indices; every
        value present must be in it.

    Raises
    ------
    MaskImportError
        Naming the file: not a PNG, damaged, wrong size, a kind of PNG that is not a
        class mask, a bad table.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        shape: tuple[int, int],
        schema: ClassSchema = DEFAULT_SCHEMA,
        colours: Mapping[tuple[int, int, int], int] | None = None,
        values: Mapping[int, int] | None = None,
    ) -> None:
        self.path = Path(path)
        self.name = name = str(self.path)
        self.schema = schema
        if colours is not None:
            _check_table_values(colours, schema, name, "colours table")
            for colour in colours:
                if not isinstance(colour, tuple | list) or len(colour) != 3:
                    raise MaskImportError(
                        f"{name}: colours table key {colour!r} is not an (r, g, b) triple"
                    )
        if values is not None:
            _check_table_values(values, schema, name, "values table")
            for key in values:
                if not isinstance(key, int | np.integer) or not 0 <= int(key) < 1 << 16:
                    raise MaskImportError(f"{name}: values table key {key!r} is not a grey value")
        header = read_png_header(self.path)
        self.header = header
        if (header.height, header.width) != (int(shape[0]), int(shape[1])):
            raise MaskImportError(
                f"{name}: mask is {header.height} x {header.width} pixels (rows x columns) but "
                f"its image is {int(shape[0])} x {int(shape[1])}; a mask must have the size "
                "of its image"
            )
        self.shape = (header.height, header.width)
        ctype, depth = header.colour_type, header.bit_depth
        if ctype == 0 and depth < 8:
            raise MaskImportError(
                f"{name}: a {header.kind} PNG is not a class mask; save it as 8-bit "
                "single-channel class indices"
            )
        if ctype in (2, 6) and depth == 16:
            raise MaskImportError(
                f"{name}: a {header.kind} PNG is not a class mask; colour masks are 8-bit "
                "(save it as 8-bit RGB, or as 8-bit single-channel class indices)"
            )
        if ctype in (2, 6) and colours is None:
            raise MaskImportError(
                f"{name}: an {COLOUR_TYPES[ctype][0]} mask needs a colour table (colour -> "
                "class); pass colours, or save the mask as 8-bit single-channel class indices"
            )
        stored = header.height * header.width * header.channels * max(1, depth // 8)
        if header.interlaced and stored > MAX_INTERLACED_BYTES:
            raise MaskImportError(
                f"{name}: an interlaced PNG of {header.width} x {header.height} pixels cannot "
                "be read a band of rows at a time; save it without interlacing"
            )
        self.colours = colours
        self.values = values
        self._allowed = np.zeros(256, bool)
        self._allowed[list(schema.indices)] = True
        self._allowed[UNLABELLED] = True
        self._src = self._open()
        self._palette = None
        if ctype == 3 and colours is not None:
            self._palette = self._read_palette()
        self._kept = np.zeros((0, header.width), np.uint8)  # rows [_kept_start, _next)
        self._kept_start = 0
        self._next = 0  # the next row the decoder gives

    # -- the decoder -----------------------------------------------------------------
    def _open(self):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                with rasterio.Env(GDAL_CACHEMAX=_GDAL_CACHE_MB):
                    return rasterio.open(self.path, driver="PNG")
        except (RasterioError, OSError) as err:
            raise MaskImportError(
                f"{self.name}: not a readable PNG image ({_innermost(err)})"
            ) from None

    def _read_palette(self) -> dict[int, int]:
        try:
            cmap = self._src.colormap(1)
        except (RasterioError, ValueError) as err:
            raise MaskImportError(f"{self.name}: palette PNG without a palette ({err})") from None
        return {int(i): (int(c[0]) << 16) | (int(c[1]) << 8) | int(c[2]) for i, c in cmap.items()}

    def _decode(self, start: int, stop: int) -> np.ndarray:
        """Samples of rows ``[start, stop)``: (bands, rows, width), as stored."""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                with rasterio.Env(GDAL_CACHEMAX=_GDAL_CACHE_MB):
                    return self._src.read(window=Window(0, start, self.shape[1], stop - start))
        except (RasterioError, OSError) as err:
            raise MaskImportError(
                f"{self.name}: damaged or truncated PNG: rows {start}..{stop - 1} cannot be "
                f"decoded ({_innermost(err)})"
            ) from None

    # -- values ----------------------------------------------------------------------
    def _map_values(self, raw: np.ndarray, what: str, rows: str) -> np.ndarray:
        lut = np.full(1 << 16, -1, np.int32)
        for key, value in self.values.items():  # type: ignore[union-attr]
            lut[int(key)] = int(value)
        mapped = lut[raw]
        if (mapped < 0).any():
            unknown, counts = np.unique(raw[mapped < 0], return_counts=True)
            listed = ", ".join(
                f"{int(v)} ({int(n)} px)" for v, n in zip(unknown[:5], counts[:5], strict=True)
            )
            raise MaskImportError(
                f"{self.name}: {what} {listed}{' ...' if len(unknown) > 5 else ''} are not in "
                f"the given table (first seen in {rows}); add them to it"
            )
        return mapped.astype(np.uint8)

    def _map_colours(self, keys: np.ndarray, rows: str) -> np.ndarray:
        table = {
            (int(r) << 16) | (int(g) << 8) | int(b): int(v)
            for (r, g, b), v in self.colours.items()  # type: ignore[union-attr]
        }
        uniq, inverse = np.unique(keys.ravel(), return_inverse=True)
        missing = [int(u) for u in uniq if int(u) not in table]
        if missing:
            shown = ", ".join(_rgb_text(u) for u in missing[:5])
            known = ", ".join(
                f"{tuple(int(v) for v in c)} -> {v}"
                for c, v in self.colours.items()  # type: ignore[union-attr]
            )
            raise MaskImportError(
                f"{self.name}: {len(missing)} colour(s) are not in the colour table: {shown}"
                f"{' ...' if len(missing) > 5 else ''} (first seen in {rows}); the table "
                f"knows {known}"
            )
        out = np.asarray([table[int(u)] for u in uniq], np.uint8)[inverse]
        return out.reshape(keys.shape)

    def _to_mask(self, raw: np.ndarray, start: int) -> np.ndarray:
        """Class mask (rows, width) uint8 of decoded samples (bands, rows, width)."""
        rows = f"rows {start}..{start + raw.shape[1] - 1}"
        ctype = self.header.colour_type
        if ctype in (4, 6):
            opaque = 65535 if raw.dtype == np.uint16 else 255
            if (raw[-1] != opaque).any():
                raise MaskImportError(
                    f"{self.name}: the mask has transparent pixels (alpha channel, first in "
                    f"{rows}); a class mask must be fully opaque: remove the alpha channel"
                )
            raw = raw[:-1]
        if ctype in (2, 6):
            mask = self._map_colours(_colour_key(np.moveaxis(raw, 0, -1)), rows)
        elif ctype == 3 and self._palette is not None:
            lut = np.full(256, -1, np.int64)
            for index, key in self._palette.items():
                lut[index] = key
            keys = lut[raw[0]]
            if (keys < 0).any():
                bad = sorted({int(v) for v in np.unique(raw[0][keys < 0])})
                raise MaskImportError(
                    f"{self.name}: palette indices {bad[:5]} have no palette entry ({rows})"
                )
            mask = self._map_colours(keys, rows)
        elif self.values is not None:
            what = "palette indices" if ctype == 3 else "grey values"
            mask = self._map_values(raw[0].astype(np.int64), what, rows)
        else:
            grey = raw[0]
            if grey.dtype != np.uint8 and grey.size and int(grey.max()) > 255:
                raise MaskImportError(
                    f"{self.name}: {self.header.kind} mask holds values up to {int(grey.max())} "
                    f"(in {rows}); class masks are 8-bit (0..254 classes, 255 unlabelled): "
                    "save it as 8-bit or pass a values table"
                )
            mask = grey.astype(np.uint8)
        bad_seen = ~self._allowed[mask]
        if bad_seen.any():
            bad = sorted({int(v) for v in np.unique(mask[bad_seen])})
            raise MaskImportError(
                f"{self.name}: holds values {bad[:10]}{' ...' if len(bad) > 10 else ''} that "
                f"are not class indices {self.schema.indices} or 255 (unlabelled), first seen "
                f"in {rows}; pass a values table to map them"
            )
        return mask

    # -- reading -------------------------------------------------------------------------
    def read_rows(self, start: int, stop: int) -> np.ndarray:
        """The class mask of rows ``[start, stop)``, checked.

        Parameters
        ----------
        start, stop : int
            ``0 <= start < stop <= height``.

        Returns
        -------
        ndarray, shape (stop - start, width), uint8
            Class indices, 255 unlabelled.

        Raises
        ------
        MaskImportError
            For values that are not classes (or not in the tables), transparent
            pixels, or rows that cannot be decoded.
        """
        height = self.shape[0]
        if not 0 <= start < stop <= height:
            raise ValueError(f"rows: expected 0 <= start < stop <= {height}, got {start}, {stop}")
        if start < self._kept_start:  # going back: decode from the top again
            self._src.close()
            self._src = self._open()
            self._kept = np.zeros((0, self.shape[1]), np.uint8)
            self._kept_start = self._next = 0
        if start >= self._next:
            self._kept = np.zeros((0, self.shape[1]), np.uint8)
            self._kept_start = self._next = start
        else:
            self._kept = self._kept[start - self._kept_start :]
            self._kept_start = start
        if stop > self._next:
            fresh = self._to_mask(self._decode(self._next, stop), self._next)
            self._kept = np.concatenate([self._kept, fresh]) if len(self._kept) else fresh
            self._next = stop
        return self._kept[: stop - start].copy()

    def close(self) -> None:
        """Release the file."""
        self._src.close()

    def __enter__(self) -> PngMaskReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def read_png_mask(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    schema: ClassSchema = DEFAULT_SCHEMA,
    colours: Mapping[tuple[int, int, int], int] | None = None,
    values: Mapping[int, int] | None = None,
) -> np.ndarray:
    """Read a whole PNG class mask (see the module docstring for the accepted kinds).

    For large masks use :class:`PngMaskReader`, which reads a band of rows at a time.

    Parameters
    ----------
    path : path
    shape : (int, int)
        ``(height, width)`` of the image the mask belongs to.
    schema : ClassSchema
    colours : mapping (r, g, b) -> class index, or None
        Needed for RGB images; every colour present must be in it.
    values : mapping grey value -> class index, or None
        Optional remapping of a grey (or 16-bit) mask; every value present must be in it.

    Returns
    -------
    mask : ndarray, shape ``shape``, uint8

    Raises
    ------
    MaskImportError
    """
    with PngMaskReader(path, shape=shape, schema=schema, colours=colours, values=values) as r:
        return r.read_rows(0, r.shape[0])
