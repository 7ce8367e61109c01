"""The proposal head: a feature pyramid over the encoder's four levels and a small classifier.

Layout (``width`` = FPN channels, ``K`` = classes)::

    encoder features (strides 4, 8, 16, 32)
      -> feature pyramid (width channels on every level; :mod:`labeler.model.pyramid`)
      -> sum of the four levels, bilinearly resized to stride 4, ReLU
      -> 1x1 convolution width -> width, ReLU                       ("trunk", deterministic)
      -> dropout (element-wise, p = ``dropout``; :mod:`labeler.model.dropout`)
      -> 1x1 convolution width -> K  ("classifier")
      -> logits at stride 4, bilinearly upsampled to the tile size

With ``refine_channels`` > 0 the head also holds a :class:`~labeler.model.refine.Refiner`:
given the tile's pixels, the final logits are the dropout-free stride-4 logits,
bilinearly upsampled, plus a full-resolution correction computed from the pixels and
the trunk features (:mod:`labeler.model.refine`). Without pixels the head gives the
plain upsampled logits.

The trunk runs once per tile; only the classifier (dropout + one 1x1 convolution) runs
T times for MC-dropout uncertainty (:mod:`labeler.model.predict`). Everything is kept in
channels-last memory order, which is several times faster on CPU for these narrow layers.

Channel ``k`` of the output stands for the class index ``class_indices[k]`` of the schema.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Sequence
from dataclasses import asdict, dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from labeler.classes import UNLABELLED
from labeler.model.dropout import ElementDropout
from labeler.model.encoder import FEATURE_CHANNELS
from labeler.model.pyramid import FeaturePyramid
from labeler.model.refine import RefineConfig, Refiner

__all__ = ["HeadConfig", "ProposalHead", "features_to_tensors", "class_lut", "REFINE_CHANNELS"]

#: Channels of the refinement that :func:`labeler.model.train.train_head` adds by default.
REFINE_CHANNELS = 16


@dataclass(frozen=True)
class HeadConfig:
    """Shape of a :class:`ProposalHead` (saved with checkpoints).

    Parameters
    ----------
    class_indices : tuple of int
        Schema class index of each output channel, increasing (``(0, 1, 2, 3)``).
    width : int
        FPN channels.
    dropout : float
        Dropout probability before the classifier (also the MC-dropout rate).
    in_channels : tuple of int
        Channels of the four encoder levels.
    refine_channels : int
        Channels of the full-resolution refinement; 0 (the default of a bare config) means
        no refinement, the stride-4 logits are only upsampled.
    """

    class_indices: tuple[int, ...] = (0, 1, 2, 3)
    width: int = 32
    dropout: float = 0.2
    in_channels: tuple[int, ...] = FEATURE_CHANNELS
    refine_channels: int = 0

    def __post_init__(self) -> None:
        idx = tuple(int(i) for i in self.class_indices)
        if len(idx) < 2:
            raise ValueError(
                f"class_indices: expected at least 2 classes, got {idx}; the head separates classes"
            )
        if list(idx) != sorted(set(idx)) or not all(0 <= i <= 254 for i in idx):
            raise ValueError(
                f"class_indices: expected distinct increasing indices in 0..254, got {idx}"
            )
        if self.width < 1:
            raise ValueError(f"width: expected at least 1 channel, got {self.width}")
        if self.refine_channels < 0:
            raise ValueError(
                f"refine_channels: expected 0 (no refinement) or more channels, got "
                f"{self.refine_channels}"
            )
        if not 0.0 <= self.dropout < 1.0:
            raise ValueError(f"dropout: expected a probability in [0, 1), got {self.dropout}")
        object.__setattr__(self, "class_indices", idx)
        object.__setattr__(self, "in_channels", tuple(int(c) for c in self.in_channels))

    @property
    def n_classes(self) -> int:
        return len(self.class_indices)

    @property
    def refines(self) -> bool:
        """True when the head has a full-resolution refinement."""
        return self.refine_channels > 0

    def as_dict(self) -> dict[str, object]:
        d = asdict(self)
        d["class_indices"] = list(self.class_indices)
        d["in_channels"] = list(self.in_channels)
        return d

    @classmethod
    def from_dict(cls, d: dict[str, object]) -> HeadConfig:
        return cls(
            class_indices=tuple(d["class_indices"]),  # type: ignore[arg-type]
            width=int(d["width"]),  # type: ignore[arg-type]
            dropout=float(d["dropout"]),  # type: ignore[arg-type]
            in_channels=tuple(d["in_channels"]),  # type: ignore[arg-type]
            refine_channels=int(d.get("refine_channels", 0)),  # type: ignore[arg-type]
        )


def class_lut(class_indices: Sequence[int]) -> np.ndarray:
    """Lookup table mask value -> output channel.

    Returns
    -------
    lut : ndarray, shape (256,), int64
        ``lut[class_indices[k]] = k``, ``lut[255] = 255`` (ignored), -1 elsewhere.
    """
    lut = np.full(256, -1, np.int64)
    lut[list(class_indices)] = np.arange(len(class_indices))
    lut[UNLABELLED] = UNLABELLED
    return lut


def features_to_tensors(
    features: Sequence[Sequence[np.ndarray | torch.Tensor]],
) -> list[torch.Tensor]:
    """Stack per-tile features into four float32 channels-last batches.

    Parameters
    ----------
    features : sequence of N tuples of 4 arrays
        Per tile, arrays ``(C_i, h_i, w_i)`` (float16 from the cache or float32); all tiles
        of one call must have equal shapes.

    Returns
    -------
    levels : list of 4 Tensor, shapes (N, C_i, h_i, w_i), float32, channels-last
    """
    if len(features) == 0:
        raise ValueError("features: expected at least one tile, got none")
    first = features[0]
    if len(first) != 4:
        raise ValueError(f"features: expected 4 levels per tile, got {len(first)}")
    levels = []
    for lvl in range(4):
        shape = tuple(np.shape(first[lvl]))
        if len(shape) != 3:
            raise ValueError(
                f"features: level {lvl} expected an array (C, h, w), got shape {shape}"
            )
        c, h, w = shape
        # fill a channels-last float32 batch directly (converts float16 while copying)
        out = torch.empty((len(features), h, w, c), dtype=torch.float32)
        for n, f in enumerate(features):
            part = (
                f[lvl] if isinstance(f[lvl], torch.Tensor) else torch.from_numpy(np.asarray(f[lvl]))
            )
            if tuple(part.shape) != shape:
                raise ValueError(
                    f"features: tile {n} level {lvl} has shape {tuple(part.shape)}, tile 0 has "
                    f"{shape}; pass tiles of one size per call"
                )
            out[n].copy_(part.permute(1, 2, 0))
        levels.append(out.permute(0, 3, 1, 2))
    return levels


class ProposalHead(nn.Module):
    """FPN + small classifier with dropout; see the module docstring for the layout.

    Parameters
    ----------
    config : HeadConfig
    """

    def __init__(self, config: HeadConfig | None = None) -> None:
        super().__init__()
        self.config = config or HeadConfig()
        w = self.config.width
        self.fpn = FeaturePyramid(list(self.config.in_channels), w)
        self.mix = nn.Conv2d(w, w, 1)
        self.dropout = ElementDropout(self.config.dropout)
        self.classifier = nn.Conv2d(w, self.config.n_classes, 1)
        self.refiner: Refiner | None = None
        if self.config.refines:
            self.refiner = Refiner(
                w, self.config.n_classes, RefineConfig(channels=self.config.refine_channels)
            )
        self.to(memory_format=torch.channels_last)

    def _check(self, levels: Sequence[torch.Tensor]) -> None:
        if len(levels) != len(self.config.in_channels):
            raise ValueError(
                f"features: expected {len(self.config.in_channels)} levels, got {len(levels)}"
            )
        for i, (t, c) in enumerate(zip(levels, self.config.in_channels, strict=True)):
            if t.dim() != 4 or t.shape[1] != c:
                raise ValueError(
                    f"features: level {i} expected shape (N, {c}, h, w), got {tuple(t.shape)}; "
                    "pass the encoder's stride 4, 8, 16, 32 features in order"
                )

    def trunk(self, levels: Sequence[torch.Tensor]) -> torch.Tensor:
        """Deterministic part: ``(N, width, h4, w4)`` features at stride 4."""
        self._check(levels)
        pyramid = list(self.fpn(OrderedDict((str(i), t) for i, t in enumerate(levels))).values())
        size = pyramid[0].shape[-2:]
        z = pyramid[0]
        for p in pyramid[1:]:
            z = z + F.interpolate(p, size=size, mode="bilinear", align_corners=False)
        return F.relu(self.mix(F.relu(z)))

    def classify(self, z: torch.Tensor) -> torch.Tensor:
        """Logits at stride 4 ``(N, K, h4, w4)`` from trunk features (dropout as in mode)."""
        return self.classifier(self.dropout(z))

    def refine(self, z: torch.Tensor, pixels: torch.Tensor) -> torch.Tensor:
        """Refined full-resolution logits ``(N, K, H, W)``.

        Parameters
        ----------
        z : Tensor, shape (N, width, ceil(H / 4), ceil(W / 4))
            Trunk features.
        pixels : Tensor, shape (N, 4, H, W)
            :func:`labeler.model.refine.pixel_input` of the tiles.

        The base is the classifier without dropout (deterministic in every mode), bilinearly
        upsampled; the refiner adds its correction.

        Raises
        ------
        ValueError
            If the head has no refinement or the pixels do not fit ``z``.
        """
        if self.refiner is None:
            raise ValueError(
                "pixels: this head has no refinement (config.refine_channels = 0); "
                "use classify() or train a head with refine_channels > 0"
            )
        h4, w4 = z.shape[-2:]
        height, width = pixels.shape[-2:]
        if (
            pixels.dim() != 4
            or pixels.shape[0] != z.shape[0]
            or (-(-height // 4), -(-width // 4)) != (h4, w4)
        ):
            raise ValueError(
                f"pixels: expected {z.shape[0]} tiles of 4 channels whose size divided by 4 "
                f"(rounded up) is {h4} x {w4}, got shape {tuple(pixels.shape)}; pass the pixels "
                "of the tiles the features belong to"
            )
        base = self.classifier(z)
        up = F.interpolate(base, size=(height, width), mode="bilinear", align_corners=False)
        return up + self.refiner(z, pixels)

    def forward(
        self,
        levels: Sequence[torch.Tensor],
        *,
        size: tuple[int, int] | None = None,
        pixels: torch.Tensor | None = None,
    ) -> torch.Tensor:
        """Logits ``(N, K, H, W)``.

        Without ``pixels``: the stride-4 logits (dropout as in mode) bilinearly upsampled to
        ``size`` (default 4 x the stride-4 grid). With ``pixels`` (a refining head only):
        :meth:`refine`, at the pixels' size.
        """
        z = self.trunk(levels)
        if pixels is not None:
            return self.refine(z, pixels)
        logits = self.classify(z)
        if size is None:
            size = (logits.shape[-2] * 4, logits.shape[-1] * 4)
        return F.interpolate(logits, size=size, mode="bilinear", align_corners=False)
