"""Colour jitter of training pixels as one 3 x 3 colour matrix and an offset per tile.

Sun, shade and camera settings change brightness, contrast, saturation and hue from one
flight to the next; the head's refinement reads the pixels, so training jitters them.
Every one of the four changes is linear in RGB once the tile's mean grey is known, so a
tile's whole jitter is ``y = A @ rgb + o`` with one matrix ``A`` and offset ``o``, applied
to every pixel in one batched product (a few hundred microseconds for a batch, against
several milliseconds per tile for a conversion to HSV and back). In order:

1. brightness ``b``: ``y = b * x``;
2. contrast ``c``: ``y = c * y + (1 - c) * mean(grey(y))`` (the tile's mean grey);
3. saturation ``s``: ``y = s * y + (1 - s) * grey(y)`` (each pixel's own grey);
4. hue ``h`` (a fraction of a turn): the chroma plane of YIQ turned by ``2 pi h`` in
   the sense that raises the HSV hue (red towards green), the luma kept:
   ``y = T^-1 R(2 pi h) T y``.

``grey`` is the ITU-R BT.601 luma ``0.299 R + 0.587 G + 0.114 B`` and ``T`` the NTSC
RGB -> YIQ matrix (Y as above, I = 0.596 R - 0.274 G - 0.322 B, Q = 0.211 R - 0.523 G
+ 0.312 B; the FCC's 1953 colour television standard as tabulated in e.g. Gonzalez &
Woods, "Digital image processing"). Turning the chroma in YIQ approximates a shift of
the HSV hue (the two agree for small turns of colours of medium saturation; common
practice, no source). The result is clamped to 0..255 and, for ``uint8`` input,
rounded. Factors are drawn uniformly from ``1 +- brightness``, ``1 +- contrast``,
``1 +- saturation`` and ``+- hue`` by torch's global generator, each tile its own draw.
"""

from __future__ import annotations

import torch

__all__ = ["ColourJitter", "GREY", "YIQ", "jitter_matrices"]

#: ITU-R BT.601 luma weights of R, G, B.
GREY = (0.299, 0.587, 0.114)
#: NTSC RGB -> YIQ (rows Y, I, Q).
YIQ = (
    (0.299, 0.587, 0.114),
    (0.596, -0.274, -0.322),
    (0.211, -0.523, 0.312),
)


def jitter_matrices(
    brightness: torch.Tensor,
    contrast: torch.Tensor,
    saturation: torch.Tensor,
    hue: torch.Tensor,
    mean_grey: torch.Tensor,
) -> tuple[torch.Tensor, torch.Tensor]:
    """Colour matrices and offsets of a batch of jitters.

    Parameters
    ----------
    brightness, contrast, saturation, hue : Tensor, shape (B,)
        Factors per tile (``hue`` in turns).
    mean_grey : Tensor, shape (B,)
        Mean grey of each tile *before* the jitter (the contrast step uses the mean grey
        after the brightness step, which is ``brightness * mean_grey``).

    Returns
    -------
    matrix : Tensor, shape (B, 3, 3), float64
    offset : Tensor, shape (B, 3), float64
        ``y = matrix @ rgb + offset`` per pixel.
    """
    b, c, s, h, m = (
        t.to(torch.float64) for t in (brightness, contrast, saturation, hue, mean_grey)
    )
    n = b.shape[0]
    eye = torch.eye(3, dtype=torch.float64).expand(n, 3, 3)
    grey = torch.tensor(GREY, dtype=torch.float64)
    # saturation: s I + (1 - s) 1 grey^T
    sat = s[:, None, None] * eye + (1 - s)[:, None, None] * torch.outer(torch.ones(3), grey)
    yiq = torch.tensor(YIQ, dtype=torch.float64)
    theta = 2 * torch.pi * h
    rot = torch.zeros(n, 3, 3, dtype=torch.float64)
    rot[:, 0, 0] = 1.0
    rot[:, 1, 1] = torch.cos(theta)
    rot[:, 1, 2] = torch.sin(theta)  # this sense raises the HSV hue (R -> G -> B)
    rot[:, 2, 1] = -torch.sin(theta)
    rot[:, 2, 2] = torch.cos(theta)
    turn = torch.linalg.inv(yiq) @ rot @ yiq
    after = turn @ sat  # what acts after the contrast step
    matrix = (c * b)[:, None, None] * after
    offset = after @ ((1 - c) * b * m)[:, None].expand(n, 3)[..., None]
    return matrix, offset[..., 0]


class ColourJitter:
    """Random brightness, contrast, saturation and hue per tile (module docstring).

    Parameters
    ----------
    brightness, contrast, saturation : float
        Largest relative change (factors drawn from ``[1 - v, 1 + v]``); in ``[0, 1)``.
    hue : float
        Largest turn of the hue, in turns; in ``[0, 0.5]``.
    """

    def __init__(
        self,
        *,
        brightness: float = 0.2,
        contrast: float = 0.2,
        saturation: float = 0.2,
        hue: float = 0.03,
    ) -> None:
        for name, v in (
            ("brightness", brightness),
            ("contrast", contrast),
            ("saturation", saturation),
        ):
            if not 0.0 <= v < 1.0:
                raise ValueError(f"{name}: expected a relative change in [0, 1), got {v}")
        if not 0.0 <= hue <= 0.5:
            raise ValueError(f"hue: expected a fraction of a turn in [0, 0.5], got {hue}")
        self.brightness, self.contrast, self.saturation, self.hue = (
            brightness,
            contrast,
            saturation,
            hue,
        )

    def _draw(self, n: int, v: float, centre: float) -> torch.Tensor:
        return torch.empty(n, dtype=torch.float64).uniform_(centre - v, centre + v)

    def __call__(self, pixels: torch.Tensor) -> torch.Tensor:
        """Jitter one tile ``(3, H, W)`` or a batch ``(B, 3, H, W)``, each tile its own draw.

        Returns the same shape and dtype (``uint8`` rounded, floats unrounded), clamped to
        0..255.
        """
        if pixels.dim() not in (3, 4) or pixels.shape[-3] != 3:
            raise ValueError(
                f"pixels: expected RGB tiles (3, H, W) or (B, 3, H, W), got shape "
                f"{tuple(pixels.shape)}"
            )
        batch = pixels if pixels.dim() == 4 else pixels[None]
        n = batch.shape[0]
        x = batch.reshape(n, 3, -1).to(torch.float32)
        grey = torch.tensor(GREY, dtype=torch.float32)
        mean_grey = (grey @ x).mean(dim=-1)
        matrix, offset = jitter_matrices(
            self._draw(n, self.brightness, 1.0),
            self._draw(n, self.contrast, 1.0),
            self._draw(n, self.saturation, 1.0),
            self._draw(n, self.hue, 0.0),
            mean_grey,
        )
        y = torch.baddbmm(offset.to(torch.float32)[..., None], matrix.to(torch.float32), x)
        y = y.clamp_(0.0, 255.0)
        if pixels.dtype == torch.uint8:
            y = y.round_().to(torch.uint8)
        else:
            y = y.to(pixels.dtype)
        y = y.reshape(batch.shape)
        return y if pixels.dim() == 4 else y[0]

    def __repr__(self) -> str:
        return (
            f"ColourJitter(brightness={self.brightness}, contrast={self.contrast}, "
            f"saturation={self.saturation}, hue={self.hue})"
        )
