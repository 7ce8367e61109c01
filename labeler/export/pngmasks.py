"""PNG class masks for training elsewhere, and colour previews to look at them.

Per image up to three files may be written into an output folder:

``<stem>.png``
    Single-channel 8-bit class indices of the schema; 255 stays 255 (unlabelled), which
    training code should ignore (e.g. ``ignore_index=255`` in a cross-entropy loss).
``<stem>_source.png`` (only when model proposals were exported)
    Single-channel 8-bit: where each pixel's label came from, 0 no label, 1 a saved
    mask (made or checked by a person), 2 a model proposal nobody reviewed
    (:func:`write_source_layer`).
``<stem>_preview.png``
    RGB: the image blended with the class palette of :mod:`labeler.classes` (Okabe & Ito 2008
    colours) at opacity 0.45. Soil (no overlay colour) and unlabelled pixels show the
    plain image.

Files are written atomically (temporary file + rename) and strip by strip, so a mask
or preview of a big orthomosaic is never held whole.

Caution: masks are decision support; where they drive spot spraying or fungicide
timing, local regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

import contextlib
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.imagery.pngstream import PngRowWriter
from labeler.imagery.tiling import row_strips
from labeler.masks.overlay import overlay_mask

__all__ = [
    "MaskFiles",
    "check_stem",
    "preview_rgb",
    "write_class_mask",
    "write_image_masks",
    "write_source_layer",
]

#: Suffix of the colour preview next to ``<stem>.png``.
PREVIEW_SUFFIX = "_preview"


@dataclass(frozen=True)
class MaskFiles:
    """Paths written for one image: the class mask and, if asked for, the preview."""

    mask: Path
    preview: Path | None


def check_stem(stem: str) -> str:
    """Return ``stem`` if it is a plain file name (no folder, no ``..``), else raise."""
    if (
        not isinstance(stem, str)
        or not stem
        or stem in (".", "..")
        or any(ch in stem for ch in ("/", "\\", "\x00"))
    ):
        raise ValueError(
            f"stem: expected a plain file name without folders, got {stem!r}; pass e.g. "
            "the image file name without extension"
        )
    return stem


def preview_rgb(
    image: np.ndarray,
    mask: np.ndarray,
    *,
    schema: ClassSchema = DEFAULT_SCHEMA,
    opacity: float = 0.45,
) -> np.ndarray:
    """Blend the class palette over an image.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3) or (H, W, 4) or (H, W), uint8
        RGB image (an alpha channel is dropped; grey is repeated into RGB).
    mask : ndarray, shape (H, W), uint8
        Class indices of ``schema`` or 255.
    schema : ClassSchema
        Gives the overlay colours (:meth:`ClassSchema.lut_rgb`).
    opacity : float
        Weight of the overlay colour, 0..1 (to the nearest thousandth).

    Returns
    -------
    preview : ndarray, shape (H, W, 3), uint8
        ``round_half_up((1 - opacity) * image + opacity * colour)`` where the class has
        an overlay colour, the plain image elsewhere
        (:func:`labeler.masks.overlay.overlay_mask`).
    """
    img = np.asarray(image)
    m = np.asarray(mask)
    schema.check_mask(m, name="mask")
    if img.dtype != np.uint8:
        raise ValueError(f"image: expected uint8 RGB, got dtype {img.dtype}")
    if img.ndim == 2:
        img = np.repeat(img[:, :, None], 3, axis=2)
    elif img.ndim == 3 and img.shape[2] in (3, 4):
        img = img[:, :, :3]
    else:
        raise ValueError(f"image: expected shape (H, W, 3), (H, W, 4) or (H, W), got {img.shape}")
    if img.shape[:2] != m.shape:
        raise ValueError(
            f"mask: expected shape {img.shape[:2]} like the image, got {m.shape}; pass the "
            "mask of this image"
        )
    return overlay_mask(np.ascontiguousarray(img), m, schema=schema, opacity=opacity)


def _check_raster(mask, name: str = "mask") -> tuple[int, int]:
    shape = tuple(getattr(mask, "shape", ()))
    if len(shape) != 2:
        raise ValueError(
            f"{name}: expected a 2-D uint8 class-index array (H, W), got shape {shape}"
        )
    if shape[0] == 0 or shape[1] == 0:
        raise ValueError(f"{name}: expected a non-empty mask, got shape {shape}")
    return int(shape[0]), int(shape[1])


def write_class_mask(
    path: str | os.PathLike[str], mask, *, schema: ClassSchema = DEFAULT_SCHEMA
) -> Path:
    """Write a class-index mask as a single-channel 8-bit PNG, atomically, strip by strip.

    Parameters
    ----------
    path : path-like
        Target file.
    mask : ndarray, shape (H, W), uint8, or a raster read by rows
        The mask, or an object whose ``mask[r0:r1]`` returns rows (e.g. a
        :class:`labeler.imagery.tiling.StitchedMask`); checked against ``schema``.
    schema : ClassSchema

    Returns
    -------
    Path
    """
    height, width = _check_raster(mask)
    if isinstance(mask, np.ndarray):
        schema.check_mask(mask, name="mask")
    target = Path(path)
    with PngRowWriter(target, height=height, width=width, channels=1) as out:
        for w in row_strips(height, width):
            part = np.asarray(mask[w.row : w.row + w.height])
            schema.check_mask(part, name=f"mask rows {w.row}..{w.row + w.height}")
            out.write(part)
    return target


def write_image_masks(
    folder: str | os.PathLike[str],
    stem: str,
    mask,
    *,
    schema: ClassSchema = DEFAULT_SCHEMA,
    image=None,
    opacity: float = 0.45,
) -> MaskFiles:
    """Write ``<stem>.png`` and, when ``image`` is given, ``<stem>_preview.png``.

    Both files are written strip by strip (:func:`labeler.imagery.tiling.row_strips`,
    :class:`labeler.imagery.pngstream.PngRowWriter`): neither the mask, the image nor the
    preview of a big orthomosaic is held whole. Each file appears complete or not at
    all; a failure leaves neither.

    Parameters
    ----------
    folder : path
        Output folder (created if needed).
    stem : str
        Plain file name without extension (usually the image's).
    mask : ndarray, shape (H, W), uint8, or a raster read by rows
        The stitched image mask, or an object whose ``mask[r0:r1]`` returns rows (e.g.
        a :class:`labeler.imagery.tiling.StitchedMask`).
    schema : ClassSchema
    image : ndarray (H, W, 3) uint8, a raster read by rows, or None
        The image, for the preview (e.g. a :class:`labeler.imagery.tiling.LazyRaster`
        over an open image reader).
    opacity : float
        Overlay opacity of the preview.

    Returns
    -------
    MaskFiles
    """
    check_stem(stem)
    height, width = _check_raster(mask)
    if isinstance(mask, np.ndarray):
        schema.check_mask(mask, name="mask")
    if image is not None and tuple(image.shape[:2]) != (height, width):
        raise ValueError(
            f"mask: expected shape {tuple(image.shape[:2])} like the image, got "
            f"{(height, width)}; pass the mask of this image"
        )
    out = Path(folder)
    mask_path = out / f"{stem}.png"
    preview_path = None if image is None else out / f"{stem}{PREVIEW_SUFFIX}.png"
    with contextlib.ExitStack() as stack:
        masks = stack.enter_context(
            PngRowWriter(mask_path, height=height, width=width, channels=1)
        )
        previews = None
        if preview_path is not None:
            previews = stack.enter_context(
                PngRowWriter(preview_path, height=height, width=width, channels=3)
            )
        for w in row_strips(height, width):
            rows = slice(w.row, w.row + w.height)
            part = np.asarray(mask[rows])
            schema.check_mask(part, name=f"mask rows {w.row}..{w.row + w.height}")
            masks.write(part)
            if previews is not None:
                previews.write(preview_rgb(image[rows], part, schema=schema, opacity=opacity))
    return MaskFiles(mask_path, preview_path)


def write_source_layer(path: str | os.PathLike[str], source) -> Path:
    """Write a source layer (0 no label, 1 saved mask, 2 proposal) as an 8-bit PNG.

    Parameters
    ----------
    path : path-like
        Target file, written atomically strip by strip.
    source : ndarray, shape (H, W), uint8, or a raster read by rows
        The per-pixel source codes.

    Returns
    -------
    Path

    Raises
    ------
    ValueError
        When a value is not 0, 1 or 2.
    """
    height, width = _check_raster(source, "source")
    target = Path(path)
    with PngRowWriter(target, height=height, width=width, channels=1) as out:
        for w in row_strips(height, width):
            part = np.asarray(source[w.row : w.row + w.height], np.uint8)
            if part.size and int(part.max()) > 2:
                raise ValueError(
                    f"source rows {w.row}..{w.row + w.height}: expected codes 0, 1 or 2, got "
                    f"{int(part.max())}"
                )
            out.write(part)
    return target
