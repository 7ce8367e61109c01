"""The colour overlay: a class mask blended over an image in the schema's palette.

One rule for every picture the program draws (the export's colour previews, the
agreement report, the terminal queue's preview and the editor window)::

    out = round_half_up((1 - opacity) * pixel + opacity * colour)

where the mask value has an overlay colour (the palette of :mod:`labeler.classes`, Okabe & Ito 2008);
pixels of the background class and unlabelled pixels (255) keep their value. The blend is
done in integers with the opacity taken to the nearest thousandth, so a half is always
rounded up exactly (no floating-point ties) and every caller gets the same bytes.
"""

from __future__ import annotations

import numpy as np

from labeler.classes import ClassSchema

__all__ = ["OPACITY_STEPS", "blend_palette", "overlay_mask"]

#: The opacity is used in steps of 1 / OPACITY_STEPS.
OPACITY_STEPS = 1000


def _check_opacity(opacity: float) -> int:
    value = float(opacity)
    if not 0.0 <= value <= 1.0:
        raise ValueError(f"opacity: expected a weight in 0..1, got {opacity}")
    return int(round(value * OPACITY_STEPS))


def blend_palette(
    pixels: np.ndarray,
    mask: np.ndarray,
    *,
    colours: np.ndarray,
    has_colour: np.ndarray,
    opacity: float,
) -> np.ndarray:
    """Blend palette colours over pixels where the mask value has a colour.

    The channel order is the caller's: pass RGB pixels with an RGB table, or BGR pixels
    (OpenCV) with a BGR table.

    Parameters
    ----------
    pixels : ndarray, shape (..., 3), uint8
        The image (or a region of it).
    mask : ndarray, shape (...), uint8
        Mask values, the shape of ``pixels`` without its last axis.
    colours : ndarray, shape (256, 3), uint8
        Colour per mask value, in the channel order of ``pixels``.
    has_colour : ndarray, shape (256,), bool
        True where a mask value has an overlay colour.
    opacity : float
        Weight of the colour, 0..1, used to the nearest thousandth.

    Returns
    -------
    ndarray, shape (..., 3), uint8
        A new array: ``round_half_up((1 - opacity) * pixel + opacity * colour)`` where
        ``has_colour[mask]``, the pixel unchanged elsewhere.

    Raises
    ------
    ValueError
        If ``opacity`` is outside 0..1.
    """
    weight = _check_opacity(opacity)
    sel = has_colour[mask]
    out = pixels.copy()
    under = pixels[sel].astype(np.uint32)
    colour = colours[mask[sel]].astype(np.uint32)
    half = OPACITY_STEPS // 2
    out[sel] = ((OPACITY_STEPS - weight) * under + weight * colour + half) // OPACITY_STEPS
    return out


def overlay_mask(
    rgb: np.ndarray, mask: np.ndarray, *, schema: ClassSchema, opacity: float = 0.45
) -> np.ndarray:
    """Blend a class mask over an RGB image in the schema's palette.

    Parameters
    ----------
    rgb : ndarray, shape (H, W, 3), uint8
        The image.
    mask : ndarray, shape (H, W), integer
        Class indices; classes without a colour (the background), unlabelled pixels (255)
        and values outside 0..255 are left as they are.
    schema : ClassSchema
        Gives the overlay colours (:meth:`labeler.classes.ClassSchema.lut_rgb`).
    opacity : float
        Weight of the class colour, 0..1 (the project's ``editor.opacity``, 0.45).

    Returns
    -------
    ndarray, shape (H, W, 3), uint8
        ``round_half_up((1 - opacity) * rgb + opacity * colour)`` where the class has a
        colour, ``rgb`` elsewhere.

    Raises
    ------
    ValueError
        If ``rgb`` is not a uint8 (H, W, 3) image, ``mask`` has another shape, or
        ``opacity`` is outside 0..1.
    TypeError
        If ``mask`` does not hold integers.
    """
    img = np.asarray(rgb)
    m = np.asarray(mask)
    if img.dtype != np.uint8 or img.ndim != 3 or img.shape[2] != 3:
        raise ValueError(f"rgb: expected a uint8 (H, W, 3) image, got {img.dtype} {img.shape}")
    if m.shape != img.shape[:2]:
        raise ValueError(
            f"mask: expected shape {img.shape[:2]} like rgb, got {m.shape}; pass the mask "
            "of this image"
        )
    if m.dtype.kind not in "ui":
        raise TypeError(f"mask: expected integer class indices, got dtype {m.dtype}")
    colours, has = schema.lut_rgb()
    if m.dtype == np.uint8:
        return blend_palette(img, m, colours=colours, has_colour=has, opacity=opacity)
    inside = (m >= 0) & (m <= 255)
    values = np.where(inside, m, 0).astype(np.uint8)
    out = blend_palette(img, values, colours=colours, has_colour=has, opacity=opacity)
    out[~inside] = img[~inside]
    return out
