"""PNG class masks for training elsewhere, and colour previews to look at them.

Per image two files may be written into an output folder:

``<stem>.png``
    Single-channel 8-bit class indices of the schema; 255 stays 255 (unlabelled), which
    training code should ignore (e.g. ``ignore_index=255`` in a cross-entropy loss).
``<stem>_preview.png``
    RGB: the image blended with the class palette of :mod:`labeler.classes` (Okabe & Ito 2008
    colours) at opacity 0.45. Soil (no overlay colour) and unlabelled pixels show the
    plain image.

Files are written atomically (temporary file + rename).

Caution: masks are decision support; where they drive spot spraying or fungicide
timing, local regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.imagery.write import write_png
from labeler.masks.overlay import overlay_mask

__all__ = ["MaskFiles", "check_stem", "preview_rgb", "write_class_mask", "write_image_masks"]

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


def write_class_mask(
    path: str | os.PathLike[str], mask: np.ndarray, *, schema: ClassSchema = DEFAULT_SCHEMA
) -> Path:
    """Write a class-index mask as a single-channel 8-bit PNG, atomically."""
    m = np.asarray(mask)
    schema.check_mask(m, name="mask")
    if m.size == 0:
        raise ValueError(f"mask: expected a non-empty mask, got shape {m.shape}")
    return write_png(path, m)


def write_image_masks(
    folder: str | os.PathLike[str],
    stem: str,
    mask: np.ndarray,
    *,
    schema: ClassSchema = DEFAULT_SCHEMA,
    image: np.ndarray | None = None,
    opacity: float = 0.45,
) -> MaskFiles:
    """Write ``<stem>.png`` and, when ``image`` is given, ``<stem>_preview.png``.

    Parameters
    ----------
    folder : path
        Output folder (created if needed).
    stem : str
        Plain file name without extension (usually the image's).
    mask : ndarray, shape (H, W), uint8
        The stitched image mask.
    schema : ClassSchema
    image : ndarray, shape (H, W, 3), uint8, or None
        The image, for the preview.
    opacity : float
        Overlay opacity of the preview.

    Returns
    -------
    MaskFiles
    """
    check_stem(stem)
    out = Path(folder)
    preview = None
    if image is not None:
        preview = preview_rgb(image, mask, schema=schema, opacity=opacity)
    mask_path = write_class_mask(out / f"{stem}.png", mask, schema=schema)
    preview_path = None
    if preview is not None:
        preview_path = write_png(out / f"{stem}{PREVIEW_SUFFIX}.png", preview)
    return MaskFiles(mask_path, preview_path)
