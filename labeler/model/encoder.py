"""EfficientNet-Lite0 encoder (Tan & Le 2019, the Lite variant), written for this project.

The network is a stem convolution (32 channels, stride 2), sixteen MBConv blocks
(1x1 expansion, depthwise k x k, 1x1 projection, residual when shapes allow) in seven
stages, and a fixed 1x1 head (1280 channels) with the ImageNet-1k classifier. The Lite
variant has no squeeze-excitation and uses ReLU6 everywhere. Batch normalisation uses
``eps = 1e-3`` (the weights were trained in TensorFlow, whose default that is), and
convolutions pad the TensorFlow "SAME" way: at stride 2 an even input gets its extra
pixel at the bottom/right, not symmetric padding.

Inputs are RGB in 0..255; the network normalises them as ``(x - 127) / 128`` itself.
``forward_features`` returns four maps at strides 4, 8, 16 and 32 with 24, 40, 112 and
320 channels (for a 256 x 256 tile: 64, 32, 16 and 8 pixels square). ``classify``
gives the 1000 ImageNet-1k logits (used by the tests that check the weights).

The encoder is frozen by default (eval mode, no gradients): the head learns on top of
cached features. :func:`fold_batchnorm` folds every batch normalisation into the
convolution before it, which changes the outputs only by float rounding.
"""

from __future__ import annotations

import copy
import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from labeler.model.runtime import available_cores, inference
from labeler.model.weights import (
    map_state_dict,
    read_state_dict,
    source_key_map,
    weights_digest,
    weights_path,
)

__all__ = [
    "STAGES",
    "FEATURE_STRIDES",
    "FEATURE_CHANNELS",
    "BN_EPS",
    "StageSpec",
    "Lite0Encoder",
    "load_encoder",
    "encoder_version",
    "fold_batchnorm",
    "to_input",
    "encode_tiles",
    "feature_shapes",
    "PRECISIONS",
    "resolve_precision",
    "with_precision",
    "precision_of",
    "stages_can_overlap",
]

#: Batch-norm epsilon of the TensorFlow-trained weights.
BN_EPS = 1e-3
#: Batch-norm momentum in the PyTorch sense (TensorFlow's decay 0.99).
BN_MOMENTUM = 0.01
#: Strides and channels of the four feature maps ``forward_features`` returns.
FEATURE_STRIDES = (4, 8, 16, 32)
FEATURE_CHANNELS = (24, 40, 112, 320)
#: Revision of this implementation; part of the encoder version (cache keys).
_CODE_REVISION = "r1"
#: Arithmetic an inference encoder may run in (:func:`with_precision`).
PRECISIONS = ("float32", "bfloat16")
#: CPU flags (Linux ``/proc/cpuinfo``) of native bfloat16 arithmetic: AVX512-BF16, AMX-BF16.
_BF16_FLAGS = ("avx512_bf16", "amx_bf16")


@dataclass(frozen=True)
class StageSpec:
    """One stage of MBConv blocks."""

    repeats: int
    kernel: int
    stride: int
    expand: int
    channels: int


#: EfficientNet-Lite0 stages (width and depth multipliers 1.0, as B0).
STAGES = (
    StageSpec(1, 3, 1, 1, 16),
    StageSpec(2, 3, 2, 6, 24),
    StageSpec(2, 5, 2, 6, 40),
    StageSpec(3, 3, 2, 6, 80),
    StageSpec(3, 5, 1, 6, 112),
    StageSpec(4, 5, 2, 6, 192),
    StageSpec(1, 3, 1, 6, 320),
)


def _same_padding(size: int, kernel: int, stride: int) -> tuple[int, int]:
    """TensorFlow "SAME" padding (before, after) along one axis."""
    out = -(-size // stride)
    total = max((out - 1) * stride + kernel - size, 0)
    return total // 2, total - total // 2


class ConvBN(nn.Module):
    """Convolution (no bias) + batch norm + optional ReLU6, with TensorFlow SAME padding."""

    def __init__(
        self, c_in: int, c_out: int, kernel: int, stride: int, *, groups: int = 1, act: bool = True
    ) -> None:
        super().__init__()
        self.kernel = kernel
        self.stride = stride
        # at stride 1 with an odd kernel SAME padding is symmetric: let the conv do it
        pad = kernel // 2 if stride == 1 else 0
        self.conv = nn.Conv2d(c_in, c_out, kernel, stride, pad, groups=groups, bias=False)
        self.bn: nn.Module = nn.BatchNorm2d(c_out, eps=BN_EPS, momentum=BN_MOMENTUM)
        self.act: nn.Module = nn.ReLU6(inplace=True) if act else nn.Identity()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.stride != 1:
            top, bottom = _same_padding(x.shape[-2], self.kernel, self.stride)
            left, right = _same_padding(x.shape[-1], self.kernel, self.stride)
            if top or bottom or left or right:
                x = F.pad(x, (left, right, top, bottom))
        return self.act(self.bn(self.conv(x)))


class MBConv(nn.Module):
    """Inverted residual block without squeeze-excitation (the Lite variant)."""

    def __init__(self, c_in: int, c_out: int, *, kernel: int, stride: int, expand: int) -> None:
        super().__init__()
        mid = c_in * expand
        self.expand: nn.Module = ConvBN(c_in, mid, 1, 1) if expand != 1 else nn.Identity()
        self.depthwise = ConvBN(mid, mid, kernel, stride, groups=mid)
        self.project = ConvBN(mid, c_out, 1, 1, act=False)
        self.residual = stride == 1 and c_in == c_out

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.project(self.depthwise(self.expand(x)))
        return x + y if self.residual else y


class Lite0Encoder(nn.Module):
    """EfficientNet-Lite0 with multi-scale feature output.

    Build it with :func:`load_encoder` to get the ImageNet-1k weights; a bare
    ``Lite0Encoder()`` has random weights.

    Attributes
    ----------
    version : str
        Identifies the weights and this implementation (``"lite0-<sha256[:12]>-r1"``);
        feature caches are kept per version. Empty for random weights.
    frozen : bool
        When True (the default), ``train()`` keeps the encoder in eval mode and its
        parameters need no gradient.
    """

    def __init__(self) -> None:
        super().__init__()
        self.stem = ConvBN(3, 32, 3, 2)
        blocks: list[nn.Module] = []
        last_at_stride: dict[int, int] = {}  # stride -> index of the last block there
        c_in, stride = 32, 2
        for spec in STAGES:
            for r in range(spec.repeats):
                s = spec.stride if r == 0 else 1
                blocks.append(
                    MBConv(c_in, spec.channels, kernel=spec.kernel, stride=s, expand=spec.expand)
                )
                c_in = spec.channels
                stride *= s
                last_at_stride[stride] = len(blocks) - 1
        self.blocks = nn.ModuleList(blocks)
        #: indices of the blocks whose outputs are the stride 4, 8, 16, 32 features
        self.taps = tuple(last_at_stride[s] for s in FEATURE_STRIDES)
        self.expand_ratios = tuple(spec.expand for spec in STAGES for _ in range(spec.repeats))
        self.head = ConvBN(320, 1280, 1, 1)
        self.dropout = nn.Dropout(0.2)
        self.fc = nn.Linear(1280, 1000)
        self.version = ""
        self.frozen = True
        self.freeze()

    # -- freezing -------------------------------------------------------------------------
    def freeze(self) -> Lite0Encoder:
        """Eval mode and no gradients (the default)."""
        self.frozen = True
        self.requires_grad_(False)
        return super().train(False)

    def unfreeze(self) -> Lite0Encoder:
        """Allow training (for fine-tuning; the head normally learns alone)."""
        self.frozen = False
        self.requires_grad_(True)
        return self

    def train(self, mode: bool = True) -> Lite0Encoder:
        return super().train(False if self.frozen else mode)

    # -- forward ----------------------------------------------------------------------------
    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """Feature maps of a float batch ``(N, 3, H, W)`` in 0..255.

        Returns
        -------
        features : tuple of 4 tensors
            Shapes ``(N, C_i, ceil(H / s_i), ceil(W / s_i))`` for strides ``s = 4, 8, 16,
            32`` and channels ``C = 24, 40, 112, 320``.
        """
        x = ((x - 127.0) / 128.0).to(self.stem.conv.weight.dtype)
        x = self.stem(x)
        out = []
        for i, block in enumerate(self.blocks):
            x = block(x)
            if i in self.taps:
                out.append(x)
        return tuple(out)

    def forward_features(self, images: np.ndarray | torch.Tensor) -> tuple[torch.Tensor, ...]:
        """Feature maps of uint8 ``(N, H, W, 3)`` images or a float ``(N, 3, H, W)`` batch.

        Runs without gradients when the encoder is frozen. See :meth:`forward`.
        """
        x = to_input(images, memory_format=_memory_format_of(self))
        if self.frozen:
            with inference():
                return self(x)
        return self(x)

    def classify(self, images: np.ndarray | torch.Tensor) -> torch.Tensor:
        """ImageNet-1k logits ``(N, 1000)`` of the images (input as :meth:`forward_features`)."""
        x = to_input(images, memory_format=_memory_format_of(self))
        with inference():
            top = self(x)[-1]
            pooled = self.head(top).mean(dim=(2, 3))
            return self.fc(self.dropout(pooled)).float()


def _memory_format_of(module: nn.Module) -> torch.memory_format:
    w = module.stem.conv.weight
    if (
        w.dim() == 4
        and not w.is_contiguous()
        and w.is_contiguous(memory_format=torch.channels_last)
    ):
        return torch.channels_last
    return torch.contiguous_format


def to_input(
    images: np.ndarray | torch.Tensor,
    *,
    memory_format: torch.memory_format = torch.contiguous_format,
) -> torch.Tensor:
    """Turn images into the encoder's float ``(N, 3, H, W)`` batch in 0..255.

    Parameters
    ----------
    images : ndarray or Tensor
        uint8 RGB ``(N, H, W, 3)`` or ``(H, W, 3)`` numpy array, or a float/uint8 tensor
        ``(N, 3, H, W)`` / ``(3, H, W)`` in 0..255.
    memory_format : torch.memory_format
        ``torch.channels_last`` for the fast path.

    Raises
    ------
    ValueError
        For any other shape or dtype, naming what was got.
    """
    if isinstance(images, np.ndarray):
        a = images
        if a.ndim == 3:
            a = a[None]
        if a.ndim != 4 or a.shape[-1] != 3 or a.dtype != np.uint8:
            raise ValueError(
                f"images: expected uint8 RGB of shape (N, H, W, 3) or (H, W, 3), got "
                f"{images.dtype} {images.shape}; convert grey or RGBA images to RGB first"
            )
        if a.shape[1] < 1 or a.shape[2] < 1:
            raise ValueError(f"images: expected a non-empty image, got shape {images.shape}")
        t = torch.from_numpy(np.ascontiguousarray(a)).permute(0, 3, 1, 2)
        return t.to(torch.float32, memory_format=memory_format)
    if isinstance(images, torch.Tensor):
        t = images
        if t.dim() == 3:
            t = t[None]
        if t.dim() != 4 or t.shape[1] != 3:
            raise ValueError(
                "images: expected a tensor of shape (N, 3, H, W) in 0..255, got "
                f"{tuple(images.shape)}"
            )
        return t.to(torch.float32).contiguous(memory_format=memory_format)
    raise ValueError(
        f"images: expected a numpy array or a torch tensor, got {type(images).__name__}"
    )


def feature_shapes(height: int, width: int) -> tuple[tuple[int, int, int], ...]:
    """Shapes ``(C, h, w)`` of the four feature maps of one ``height`` x ``width`` tile."""
    return tuple(
        (c, math.ceil(height / s), math.ceil(width / s))
        for c, s in zip(FEATURE_CHANNELS, FEATURE_STRIDES, strict=True)
    )


def load_encoder(
    path: str | os.PathLike[str] | None = None,
    *,
    fold: bool = True,
    channels_last: bool = True,
    precision: str = "float32",
) -> Lite0Encoder:
    """The EfficientNet-Lite0 encoder with its ImageNet-1k weights, frozen.

    Parameters
    ----------
    path : path, optional
        Weights file; default the packaged ``efficientnet-lite0-57934424.pth``.
    fold : bool
        Fold batch norms into the convolutions (faster; same outputs to float rounding).
    channels_last : bool
        Keep weights in channels-last memory order (faster on CPU).
    precision : {"float32", "bfloat16"}
        Arithmetic of the convolutions (:func:`with_precision`). ``"bfloat16"`` is about
        1.5-2 x faster on CPUs with AVX512-BF16 or AMX (and much slower on others); its
        features differ from float32 by about 5 % (relative L2) and the ImageNet checks
        still hold. The precision is a way of running the same weights, not another
        encoder: the ``version`` is the same, so a head trained on either reads features
        of either, and the feature cache keeps one entry per tile.

    Raises
    ------
    WeightsMismatchError
        If the file's keys or shapes do not match (the message names them).
    """
    if precision not in PRECISIONS:
        raise ValueError(f"precision: expected 'float32' or 'bfloat16', got {precision!r}")
    file = weights_path() if path is None else path
    model = Lite0Encoder()
    state = map_state_dict(
        read_state_dict(file), model.state_dict(), key_map=source_key_map(model.expand_ratios)
    )
    model.load_state_dict(state, strict=True)
    model.version = encoder_version(file)
    if fold:
        model = fold_batchnorm(model)
    if channels_last:
        model = model.to(memory_format=torch.channels_last)
    return with_precision(model, precision).freeze()


def _cpu_flags() -> set[str]:
    """Flags of the first CPU in ``/proc/cpuinfo`` (Linux); empty where there is none."""
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as fh:
            for line in fh:
                if line.startswith("flags"):
                    return set(line.split(":", 1)[1].split())
    except OSError:
        pass
    return set()


def resolve_precision(setting: str = "auto", *, flags: set[str] | None = None) -> str:
    """The arithmetic to run inference in, from the ``model.precision`` setting.

    Parameters
    ----------
    setting : {"auto", "float32", "bfloat16"}
        ``"auto"`` (the default): bfloat16 when the CPU computes it natively
        (AVX512-BF16 or AMX-BF16), float32 otherwise (emulated bfloat16 is slower than
        float32); the other two are used as they are.
    flags : set of str, optional
        CPU flags to judge by; default those of this machine's ``/proc/cpuinfo`` (none
        outside Linux, so ``"auto"`` is float32 there).

    Returns
    -------
    str
        ``"float32"`` or ``"bfloat16"``.

    Raises
    ------
    ValueError
        For any other setting.
    """
    if setting in PRECISIONS:
        return setting
    if setting != "auto":
        raise ValueError(
            f"precision: expected 'auto', 'float32' or 'bfloat16', got {setting!r}; "
            "set model.precision"
        )
    have = _cpu_flags() if flags is None else flags
    return "bfloat16" if any(f in have for f in _BF16_FLAGS) else "float32"


def precision_of(module: nn.Module) -> str:
    """``"bfloat16"`` when the module's first parameter is bfloat16, else ``"float32"``."""
    for p in module.parameters():
        return "bfloat16" if p.dtype == torch.bfloat16 else "float32"
    return "float32"


def with_precision(encoder: Lite0Encoder, precision: str) -> Lite0Encoder:
    """The inference ``encoder`` converted to run in ``precision`` (in place; returned).

    The input normalisation runs in float32 and is cast once; the feature maps come out
    in ``precision`` (:func:`encode_tiles` stores them as float16 either way). The
    ``version`` is kept: precision is a runtime setting of the same weights. Measured on
    the demo plots, a head trained on float32 features proposes from bfloat16 features
    with the same mIoU to 0.0005 (README, "Measured"), so cached features of either
    precision serve heads of either.

    Parameters
    ----------
    encoder : Lite0Encoder
        A frozen inference encoder (batch norms folded or not).
    precision : {"float32", "bfloat16"}

    Returns
    -------
    Lite0Encoder

    Raises
    ------
    ValueError
        For another precision, or an encoder being trained (``frozen`` False).
    """
    if precision not in PRECISIONS:
        raise ValueError(f"precision: expected 'float32' or 'bfloat16', got {precision!r}")
    if not getattr(encoder, "frozen", True):
        raise ValueError(
            "encoder: expected a frozen inference encoder, got one being trained; "
            "training runs in float32"
        )
    dtype = torch.bfloat16 if precision == "bfloat16" else torch.float32
    if precision_of(encoder) != precision:
        encoder.to(dtype)
    return encoder


def encoder_version(path: str | os.PathLike[str] | None = None) -> str:
    """The ``version`` :func:`load_encoder` gives (float32), without building the encoder.

    Parameters
    ----------
    path : path-like, optional
        Weights file; default the packaged one.

    Returns
    -------
    str
        ``"lite0-<first 12 hex digits of the weights' SHA-256>-<code revision>"``.
    """
    return f"lite0-{weights_digest(weights_path() if path is None else path)[:12]}-{_CODE_REVISION}"


def _fold_one(unit: ConvBN) -> None:
    bn = unit.bn
    if not isinstance(bn, nn.BatchNorm2d):
        return
    conv = unit.conv
    scale = bn.weight.detach() / torch.sqrt(bn.running_var + bn.eps)
    folded = nn.Conv2d(
        conv.in_channels,
        conv.out_channels,
        conv.kernel_size,
        conv.stride,
        conv.padding,
        groups=conv.groups,
        bias=True,
    )
    with torch.no_grad():
        folded.weight.copy_(conv.weight.detach() * scale[:, None, None, None])
        bias = conv.bias.detach() if conv.bias is not None else torch.zeros_like(scale)
        folded.bias.copy_((bias - bn.running_mean) * scale + bn.bias.detach())
    unit.conv = folded
    unit.bn = nn.Identity()


def fold_batchnorm(encoder: Lite0Encoder) -> Lite0Encoder:
    """A copy of ``encoder`` with every batch norm folded into its convolution.

    For a convolution ``y = W * x + b`` followed by batch norm with statistics ``mu``,
    ``var`` and affine ``gamma``, ``beta``, the folded convolution has
    ``W' = W * s`` and ``b' = (b - mu) * s + beta`` with ``s = gamma / sqrt(var + eps)``
    per output channel. The result is only valid in eval mode (it uses the running
    statistics); the folded copy is frozen.
    """
    out = copy.deepcopy(encoder)
    for module in out.modules():
        if isinstance(module, ConvBN):
            _fold_one(module)
    out.requires_grad_(False)
    return out.freeze()


def encode_tiles(
    encoder: Callable[[torch.Tensor], Sequence[torch.Tensor]] | Lite0Encoder,
    images: Sequence[np.ndarray],
    *,
    batch_size: int = 8,
    memory_format: torch.memory_format = torch.channels_last,
    progress: Callable[[int, int], None] | None = None,
) -> list[tuple[np.ndarray, ...]]:
    """Encoder features of many tiles, as float16 numpy arrays.

    Parameters
    ----------
    encoder : Lite0Encoder or callable
        Maps a float batch ``(N, 3, H, W)`` in 0..255 to the four feature maps (a
        :class:`Lite0Encoder` or a traced version of it).
    images : sequence of ndarray, each (H, W, 3) uint8
        Tiles; consecutive tiles of equal shape are batched together.
    batch_size : int
        Tiles per forward pass.
    progress : callable, optional
        ``progress(done, total)`` after each batch.

    Returns
    -------
    features : list of tuple of 4 ndarray
        Per tile, float16 arrays of shapes :func:`feature_shapes` of the tile.
    """
    if batch_size < 1:
        raise ValueError(f"batch_size: expected at least 1, got {batch_size}")
    out: list[tuple[np.ndarray, ...]] = []
    total = len(images)
    i = 0
    with inference():
        while i < total:
            shape = np.shape(images[i])
            j = i + 1
            while j < total and j - i < batch_size and np.shape(images[j]) == shape:
                j += 1
            batch = to_input(
                np.stack([np.asarray(im) for im in images[i:j]]), memory_format=memory_format
            )
            feats = encoder(batch)
            arrays = [f.to(torch.float16).contiguous().numpy() for f in feats]
            for k in range(j - i):
                out.append(tuple(a[k].copy() for a in arrays))
            i = j
            if progress is not None:
                progress(i, total)
    return out


def stages_can_overlap() -> bool:
    """True when torch runs fewer intra-op threads than this process has cores.

    Then a second stage (reading and encoding the next block of tiles while the head
    proposes this one) has a core of its own instead of competing with torch's threads.
    """
    return torch.get_num_threads() < available_cores()
