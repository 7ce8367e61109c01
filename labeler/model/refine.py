"""Full-resolution refinement of the head's stride-4 logits from the tile's own pixels.

The proposal head predicts on a grid of 4 x 4 pixel cells; thin grass blades (2-4 px
wide) and small lesions do not survive that grid (the truth itself, averaged to stride 4
and upsampled again, loses about a fifth of the demo's mean IoU). The refinement adds a
correction computed from the tile's pixels, in the manner of the low-level skip
connections of U-Net (Ronneberger, Fischer & Brox 2015, "U-Net: convolutional networks
for biomedical image segmentation", MICCAI) and of the decoder of DeepLabv3+ (Chen et al.
2018, ECCV), which fuse coarse semantic features with fine image features:

    pixels (H, W): (R, G, B - 127) / 128 and ExG - ExR          -> 4 input channels
      -> 3 x 3 convolution, stride 2, ``channels``, ReLU         ("fine", stride 2)
    trunk features z (stride 4, ``width`` channels)
      -> 1 x 1 convolution to ``channels``, ReLU, bilinear to stride 2
    [fine, coarse] -> 3 x 3 convolution -> ``channels``, ReLU    ("fuse", stride 2)
      -> 1 x 1 convolution to 4 K channels -> depth-to-space     (K logits per pixel)
    refined logits = bilinear(classifier(z)) + correction

The correction's last convolution starts at zero, so an untrained refinement gives the
plain bilinear proposal. The refinement is deterministic: MC-dropout stays in the head's
classifier (uncertainty maps at stride 4), and the refinement runs once per tile on the
dropout-free trunk features.

The vegetation channel is ExG - ExR (Woebbecke et al. 1995; Meyer & Neto 2008), the same
index as :func:`labeler.masks.vegetation.exg_minus_exr` (the tests hold this torch twin
to it), computed in float32 on the batch.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

__all__ = ["RefineConfig", "Refiner", "pixel_input", "exg_minus_exr_t", "PIXEL_CHANNELS"]

#: Channels of :func:`pixel_input`: normalised R, G, B and ExG - ExR.
PIXEL_CHANNELS = 4


@dataclass(frozen=True)
class RefineConfig:
    """Shape of a :class:`Refiner` (saved with head checkpoints).

    Parameters
    ----------
    channels : int
        Channels of the stride-2 layers.
    exr_coefficient : float
        Coefficient of ExR = c r - g in the vegetation channel (Meyer & Neto 2008: 1.4).
    """

    channels: int = 16
    exr_coefficient: float = 1.4

    def __post_init__(self) -> None:
        if self.channels < 1:
            raise ValueError(f"channels: expected at least 1 channel, got {self.channels}")

    def as_dict(self) -> dict[str, object]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict[str, object]) -> RefineConfig:
        return cls(
            channels=int(d["channels"]),  # type: ignore[arg-type]
            exr_coefficient=float(d["exr_coefficient"]),  # type: ignore[arg-type]
        )


def exg_minus_exr_t(rgb: torch.Tensor, *, exr_coefficient: float = 1.4) -> torch.Tensor:
    """ExG - ExR of a float batch ``(N, 3, H, W)``, shape ``(N, 1, H, W)``.

    Torch twin of :func:`labeler.masks.vegetation.exg_minus_exr`: chromatic coordinates
    ``c = (R, G, B) / (R + G + B)`` (0 for black pixels), ``ExG = 2g - r - b``,
    ``ExR = exr_coefficient * r - g``.
    """
    total = rgb.sum(dim=1, keepdim=True)
    c = rgb / torch.where(total > 0, total, torch.ones_like(total))
    r, g, b = c[:, 0:1], c[:, 1:2], c[:, 2:3]
    return (2.0 * g - r - b) - (exr_coefficient * r - g)


def pixel_input(images: torch.Tensor | np.ndarray, *, exr_coefficient: float = 1.4) -> torch.Tensor:
    """The refinement's input from RGB tiles.

    Parameters
    ----------
    images : Tensor (N, 3, H, W) in 0..255 (any dtype), or ndarray (N, H, W, 3) uint8
    exr_coefficient : float

    Returns
    -------
    x : Tensor, shape (N, 4, H, W), float32, channels-last
        ``(RGB - 127) / 128`` (the encoder's normalisation) and ExG - ExR.

    Raises
    ------
    ValueError
        For any other shape.
    """
    if isinstance(images, np.ndarray):
        if images.ndim != 4 or images.shape[-1] != 3:
            raise ValueError(
                f"images: expected an array (N, H, W, 3) of RGB tiles, got shape {images.shape}"
            )
        t = torch.from_numpy(np.ascontiguousarray(images)).permute(0, 3, 1, 2)
    else:
        t = images
    if t.dim() != 4 or t.shape[1] != 3:
        raise ValueError(
            f"images: expected a batch (N, 3, H, W) of RGB tiles, got shape {tuple(t.shape)}"
        )
    rgb = t.to(torch.float32)
    x = torch.cat([(rgb - 127.0) / 128.0, exg_minus_exr_t(rgb, exr_coefficient=exr_coefficient)], 1)
    return x.contiguous(memory_format=torch.channels_last)


class Refiner(nn.Module):
    """Correction of the coarse logits from the pixels; see the module docstring.

    Parameters
    ----------
    width : int
        Channels of the head's trunk features.
    n_classes : int
        K, logits per pixel.
    config : RefineConfig
    """

    def __init__(self, width: int, n_classes: int, config: RefineConfig | None = None) -> None:
        super().__init__()
        self.config = config or RefineConfig()
        c = self.config.channels
        self.n_classes = n_classes
        self.coarse = nn.Conv2d(width, c, 1)
        self.fine = nn.Conv2d(PIXEL_CHANNELS, c, 3, stride=2, padding=1)
        self.fuse = nn.Conv2d(2 * c, c, 3, padding=1)
        self.out = nn.Conv2d(c, 4 * n_classes, 1)
        nn.init.zeros_(self.out.weight)
        nn.init.zeros_(self.out.bias)
        self.to(memory_format=torch.channels_last)

    def forward(self, z: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
        """Correction ``(N, K, H, W)`` from trunk features ``z`` and :func:`pixel_input` ``x``.

        ``z`` is ``(N, width, ceil(H / 4), ceil(W / 4))``; any ``H``, ``W`` >= 1 work.
        """
        height, width = x.shape[-2:]
        fine = F.relu(self.fine(x))  # (N, c, ceil(H / 2), ceil(W / 2))
        coarse = F.relu(self.coarse(z))
        coarse = F.interpolate(coarse, size=fine.shape[-2:], mode="bilinear", align_corners=False)
        y = F.relu(self.fuse(torch.cat([fine, coarse], dim=1)))
        out = F.pixel_shuffle(self.out(y), 2)  # (N, K, 2 ceil(H / 2), 2 ceil(W / 2))
        return out[:, :, :height, :width]
