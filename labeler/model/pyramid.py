"""Feature pyramid: the encoder's stages merged top-down to one width on every level.

The head's neck (Lin et al. 2017, "Feature Pyramid Networks for Object Detection",
CVPR): a 1 x 1 lateral convolution brings each stage to ``width`` channels; from the
deepest stage up, the coarser result is upsampled (nearest neighbour) and added to the
next lateral; a 3 x 3 convolution smooths each sum.

Written here rather than taken from ``torchvision.ops`` because importing torchvision
costs every ``labeler propose`` about 2.5 s on a 2-core machine, and the propose path
needs nothing else from it. Parameter names, initialisation and arithmetic follow
``torchvision.ops.FeaturePyramidNetwork`` without norm layers or extra blocks, so a
head saved with either loads into the other (a test checks both against each other).
"""

from __future__ import annotations

from collections import OrderedDict

import torch.nn.functional as F
from torch import Tensor, nn

__all__ = ["FeaturePyramid"]


class FeaturePyramid(nn.Module):
    """Top-down feature pyramid over a dict of stage maps.

    Parameters
    ----------
    in_channels : list of int
        Channels of each stage, finest first (all > 0).
    width : int
        Channels of every output level.

    Raises
    ------
    ValueError
        If ``in_channels`` is empty or holds a count below 1, or ``width`` is below 1.
    """

    def __init__(self, in_channels: list[int], width: int) -> None:
        super().__init__()
        if not in_channels or min(in_channels) < 1:
            raise ValueError(
                f"in_channels: expected one positive channel count per stage, got {in_channels!r}"
            )
        if width < 1:
            raise ValueError(f"width: expected a positive channel count, got {width!r}")
        self.inner_blocks = nn.ModuleList()
        self.layer_blocks = nn.ModuleList()
        for channels in in_channels:
            # a one-layer Sequential keeps the parameter names "inner_blocks.<i>.0.weight"
            self.inner_blocks.append(nn.Sequential(nn.Conv2d(channels, width, 1)))
            self.layer_blocks.append(nn.Sequential(nn.Conv2d(width, width, 3, padding=1)))
        for module in self.modules():
            if isinstance(module, nn.Conv2d):
                nn.init.kaiming_uniform_(module.weight, a=1)
                nn.init.constant_(module.bias, 0)

    def forward(self, stages: dict[str, Tensor]) -> OrderedDict[str, Tensor]:
        """Merge the stages.

        Parameters
        ----------
        stages : dict of str to Tensor
            Stage maps, finest first, each ``(N, in_channels[i], H_i, W_i)``.

        Returns
        -------
        OrderedDict of str to Tensor
            Same keys and order; each level ``(N, width, H_i, W_i)``.

        Raises
        ------
        ValueError
            If the number of stages differs from ``in_channels``.
        """
        names = list(stages)
        maps = list(stages.values())
        if len(maps) != len(self.inner_blocks):
            raise ValueError(
                f"stages: expected {len(self.inner_blocks)} stage maps, got {len(maps)}; "
                "pass every encoder stage the head was built for"
            )
        last = self.inner_blocks[-1](maps[-1])
        results = [self.layer_blocks[-1](last)]
        for i in range(len(maps) - 2, -1, -1):
            lateral = self.inner_blocks[i](maps[i])
            last = lateral + F.interpolate(last, size=lateral.shape[-2:], mode="nearest")
            results.insert(0, self.layer_blocks[i](last))
        return OrderedDict(zip(names, results, strict=True))
