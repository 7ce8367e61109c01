"""Reading PNG class masks made elsewhere.

8-bit single-channel PNGs whose values are schema indices or 255 (unlabelled), or
whose grey values a ``values`` table maps to classes. RGB (or fully opaque RGBA)
PNGs are read only with a ``colours`` table mapping every colour present to a class.
Palette PNGs are read by their palette INDEX (the common convention of segmentation
datasets), or by colour when a ``colours`` table is given. 16-bit PNGs are accepted
when every value is a valid 8-bit class value, refused otherwise.

Every problem raises :class:`labeler.errors.MaskImportError` naming the file and the
problem; nothing partial is returned.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

import numpy as np
from PIL import Image, UnidentifiedImageError

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.errors import MaskImportError

__all__ = ["read_png_mask"]


def _map_values(
    raw: np.ndarray, table: Mapping[int, int], name: str, what: str
) -> np.ndarray:
    lut = np.full(1 << 16, -1, np.int32)
    for key, value in table.items():
        lut[int(key)] = int(value)
    mapped = lut[raw]
    if (mapped < 0).any():
        unknown, counts = np.unique(raw[mapped < 0], return_counts=True)
        listed = ", ".join(
            f"{int(v)} ({int(n)} px)" for v, n in zip(unknown[:5], counts[:5], strict=True)
        )
        raise MaskImportError(
            f"{name}: {what} {listed}{' ...' if len(unknown) > 5 else ''} are not in the "
            "given table; add them to it"
        )
    return mapped.astype(np.uint8)


def _map_colours(
    rgb: np.ndarray, colours: Mapping[tuple[int, int, int], int], name: str
) -> np.ndarray:
    key = (rgb[..., 0].astype(np.int64) << 16) | (rgb[..., 1].astype(np.int64) << 8) | rgb[..., 2]
    uniq, inverse = np.unique(key.ravel(), return_inverse=True)
    table: dict[int, int] = {}
    for colour, value in colours.items():
        if len(colour) != 3:
            raise MaskImportError(
                f"{name}: colours table key {colour!r} is not an (r, g, b) triple"
            )
        r, g, b = (int(v) for v in colour)
        table[(r << 16) | (g << 8) | b] = int(value)
    missing = [int(u) for u in uniq if int(u) not in table]
    if missing:
        shown = ", ".join(f"({u >> 16}, {(u >> 8) & 255}, {u & 255})" for u in missing[:5])
        known = ", ".join(f"{tuple(int(v) for v in c)} -> {v}" for c, v in colours.items())
        raise MaskImportError(
            f"{name}: {len(missing)} colour(s) are not in the colour table: {shown}"
            f"{' ...' if len(missing) > 5 else ''}; the table knows {known}"
        )
    out = np.asarray([table[int(u)] for u in uniq], np.uint8)[inverse]
    return out.reshape(rgb.shape[:2])


def _check_table_values(table: Mapping, schema: ClassSchema, name: str, what: str) -> None:
    for key, value in table.items():
        if not isinstance(value, int | np.integer) or (
            int(value) != UNLABELLED and int(value) not in schema.indices
        ):
            raise MaskImportError(
                f"{name}: {what} maps {key!r} to {value!r}, which is not a class index "
                f"{schema.indices} or 255"
            )


def read_png_mask(
    path: str | os.PathLike[str],
    *,
    shape: tuple[int, int],
    schema: ClassSchema = DEFAULT_SCHEMA,
    colours: Mapping[tuple[int, int, int], int] | None = None,
    values: Mapping[int, int] | None = None,
) -> np.ndarray:
    """Read a PNG class mask (see the module docstring for the accepted kinds).

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
    p = Path(path)
    name = str(p)
    if colours is not None:
        _check_table_values(colours, schema, name, "colours table")
    if values is not None:
        _check_table_values(values, schema, name, "values table")
        for key in values:
            if not isinstance(key, int | np.integer) or not 0 <= int(key) < 1 << 16:
                raise MaskImportError(f"{name}: values table key {key!r} is not a grey value")
    try:
        with Image.open(p) as im:
            fmt = im.format
            im.load()
            mode = im.mode
            size = im.size
            if fmt != "PNG":
                raise MaskImportError(f"{name}: expected a PNG file, got {fmt or 'unknown'} data")
            if mode == "P":
                raw_index = np.asarray(im)
                as_rgb = np.asarray(im.convert("RGB")) if colours is not None else None
            else:
                raw_index = None
                as_rgb = None
                arr = np.asarray(im)
    except MaskImportError:
        raise
    except FileNotFoundError:
        raise MaskImportError(f"{name}: no such file") from None
    except Image.DecompressionBombError as err:
        raise MaskImportError(f"{name}: image too large to read safely ({err})") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as err:
        raise MaskImportError(f"{name}: not a readable PNG image ({err})") from None
    width, height = size
    if (height, width) != (int(shape[0]), int(shape[1])):
        raise MaskImportError(
            f"{name}: mask is {height} x {width} pixels (rows x columns) but its image is "
            f"{int(shape[0])} x {int(shape[1])}; a mask must have the size of its image"
        )
    if mode == "P":
        if as_rgb is not None:
            mask = _map_colours(as_rgb, colours, name)  # type: ignore[arg-type]
        elif values is not None:
            mask = _map_values(raw_index.astype(np.int64), values, name, "palette indices")
        else:
            mask = raw_index.astype(np.uint8)
    elif mode in ("L", "I;16", "I;16B", "I;16L", "I"):
        raw = arr.astype(np.int64)
        if values is not None:
            if raw.min() < 0 or raw.max() >= 1 << 16:
                raise MaskImportError(f"{name}: grey values outside 0..65535")
            mask = _map_values(raw, values, name, "grey values")
        else:
            if raw.min() < 0 or raw.max() > 255:
                raise MaskImportError(
                    f"{name}: {'16-bit' if mode != 'L' else 'grey'} mask holds values up to "
                    f"{int(raw.max())}; class masks are 8-bit (0..254 classes, 255 "
                    "unlabelled): save it as 8-bit or pass a values table"
                )
            mask = raw.astype(np.uint8)
    elif mode in ("LA", "RGBA"):
        if (arr[..., -1] != 255).any():
            raise MaskImportError(
                f"{name}: the mask has transparent pixels (alpha channel); a class mask must "
                "be fully opaque: remove the alpha channel"
            )
        if mode == "LA":
            if values is not None:
                mask = _map_values(arr[..., 0].astype(np.int64), values, name, "grey values")
            else:
                mask = arr[..., 0].astype(np.uint8)
        elif colours is None:
            raise MaskImportError(
                f"{name}: an RGBA mask needs a colour table (colour -> class); pass colours"
            )
        else:
            mask = _map_colours(arr[..., :3], colours, name)
    elif mode == "RGB":
        if colours is None:
            raise MaskImportError(
                f"{name}: an RGB mask needs a colour table (colour -> class); pass colours, "
                "or save the mask as 8-bit single-channel class indices"
            )
        mask = _map_colours(arr, colours, name)
    else:
        raise MaskImportError(
            f"{name}: PNG mode {mode!r} is not a class mask; save it as 8-bit single-channel "
            "class indices (or RGB with a colour table)"
        )
    allowed = np.zeros(256, bool)
    allowed[list(schema.indices)] = True
    allowed[UNLABELLED] = True
    present = np.flatnonzero(np.bincount(mask.ravel(), minlength=256))
    bad = [int(v) for v in present if not allowed[v]]
    if bad:
        raise MaskImportError(
            f"{name}: holds values {bad[:10]}{' ...' if len(bad) > 10 else ''} that are not "
            f"class indices {schema.indices} or 255 (unlabelled); pass a values table to map them"
        )
    return np.ascontiguousarray(mask)
