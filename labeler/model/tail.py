"""Fine-tuning the later encoder stages on the project's labels: the encoder tail.

The head learns on top of the frozen ImageNet-1k encoder; continuing to train the
pretrained network on the task's own labels is the standard practice of transfer
learning (Yosinski et al. 2014, "How transferable are features in deep neural
networks?", NeurIPS: the later layers are the most specific to the original task, so
they gain most from training on the new one). Here only the later stages learn, starting
at a feature tap, so their input is a cached feature level and the frozen earlier stages
never run again during training:

========  ==========================  ===================  ==========================
stages    blocks of EfficientNet-Lite0  input (cached)      levels recomputed
========  ==========================  ===================  ==========================
2         11-15 (stages 6 and 7)        stride 16, 112 ch   stride 32
4         5-15 (stages 4 to 7)          stride 8, 40 ch     strides 16 and 32
========  ==========================  ===================  ==========================

The tail is copied from the encoder as :func:`labeler.model.encoder.load_encoder` gives
it, with every batch normalisation folded into its convolution: batch statistics of
small CPU batches never replace the running ones (the batch norm stays in eval mode, as
a fixed affine map whose scale and shift the convolution's weights and bias now carry).
The tail trains with a lower learning rate than the head (:data:`TAIL_LR_FACTOR`) and no
weight decay, so it stays near the pretrained weights.

A trained tail makes a new encoder version, ``<base version>-tail<stages>-<digest>``
(the digest is the SHA-256 of its weights), saved inside the head's checkpoint
(:mod:`labeler.model.checkpoint`, loaded with ``weights_only=True``). Its features are
derived from the base encoder's cached features by running the tail
(:func:`tail_features`); the cache only ever holds the base encoder's entries, under the
base version, so features of one version are never served as another's.
"""

from __future__ import annotations

import copy
import hashlib
from collections.abc import Mapping, Sequence

import numpy as np
import torch
from torch import nn

from labeler.model.encoder import Lite0Encoder
from labeler.model.head import features_to_tensors
from labeler.model.runtime import inference

__all__ = [
    "TAIL_STAGES",
    "TAIL_LR_FACTOR",
    "EncoderTail",
    "tail_from_state",
    "tail_features",
]

#: Trained stages -> (first trained block, index of the cached level it reads).
TAIL_STAGES: dict[int, tuple[int, int]] = {2: (11, 2), 4: (5, 1)}
#: Learning rate of the tail relative to the head's (common practice, no source).
TAIL_LR_FACTOR = 0.1


def _check_stages(stages: int) -> tuple[int, int]:
    if stages not in TAIL_STAGES:
        raise ValueError(
            f"stages: expected one of {sorted(TAIL_STAGES)} encoder stages to fine-tune "
            f"(model.finetune_stages; 0 keeps the encoder frozen), got {stages}"
        )
    return TAIL_STAGES[stages]


class EncoderTail(nn.Module):
    """The later stages of an encoder, trainable, fed by a cached feature level.

    Parameters
    ----------
    encoder : Lite0Encoder
        The base encoder (as :func:`~labeler.model.encoder.load_encoder` gives it,
        batch norms folded); its blocks are copied, the encoder is left as it was.
    stages : int
        Stages to fine-tune, a key of :data:`TAIL_STAGES`.

    Attributes
    ----------
    base_version : str
        The base encoder's version.
    stages, first_block, input_level : int
    """

    def __init__(self, encoder: Lite0Encoder, *, stages: int) -> None:
        super().__init__()
        first, level = _check_stages(stages)
        if not encoder.version:
            raise ValueError(
                "encoder: expected an encoder with a version (load_encoder()), got one with "
                "random weights; the tail's version names its base"
            )
        self.base_version = encoder.version
        self.stages = stages
        self.first_block = first
        self.input_level = level
        self.blocks = nn.ModuleList(copy.deepcopy(encoder.blocks[first:])).float()
        self.taps = tuple(t - first for t in encoder.taps if t >= first)
        self.to(memory_format=torch.channels_last)
        self.requires_grad_(True)

    def forward(self, levels: Sequence[torch.Tensor]) -> list[torch.Tensor]:
        """The four levels with those after ``input_level`` recomputed by the tail.

        Parameters
        ----------
        levels : sequence of 4 Tensor, shapes (B, C_i, h_i, w_i)
            The base encoder's features (strides 4, 8, 16, 32).

        Returns
        -------
        list of 4 Tensor
            ``levels[: input_level + 1]`` unchanged, the later ones from the tail (float32).
        """
        if len(levels) != 4:
            raise ValueError(f"levels: expected the encoder's 4 feature levels, got {len(levels)}")
        out = list(levels[: self.input_level + 1])
        x = levels[self.input_level].to(torch.float32)
        for i, block in enumerate(self.blocks):
            x = block(x)
            if i in self.taps:
                out.append(x)
        return out

    def digest(self) -> str:
        """SHA-256 of the tail's weights (names, shapes and float32 bytes, in order)."""
        h = hashlib.sha256()
        for name, t in self.state_dict().items():
            a = t.detach().to(torch.float32).contiguous().numpy()
            h.update(f"{name}:{tuple(a.shape)};".encode())
            h.update(a.tobytes())
        return h.hexdigest()

    @property
    def version(self) -> str:
        """Encoder version of base plus tail: ``<base>-tail<stages>-<digest[:12]>``."""
        return f"{self.base_version}-tail{self.stages}-{self.digest()[:12]}"

    def state(self) -> dict[str, object]:
        """Plain data for a checkpoint: base version, stages and the weights (tensors)."""
        return {
            "base_version": self.base_version,
            "stages": self.stages,
            "state_dict": {k: v.detach().cpu().contiguous() for k, v in self.state_dict().items()},
        }


def tail_from_state(encoder: Lite0Encoder, state: Mapping[str, object]) -> EncoderTail:
    """Rebuild a tail saved by :meth:`EncoderTail.state` on top of ``encoder``.

    Raises
    ------
    ValueError
        If the tail was trained on another base encoder, or the state is damaged (the
        message says which).
    """
    try:
        base = str(state["base_version"])
        stages = int(state["stages"])  # type: ignore[call-overload]
        weights = state["state_dict"]
    except (KeyError, TypeError, ValueError) as exc:
        raise ValueError(f"encoder tail: damaged state ({type(exc).__name__}: {exc})") from None
    if base != encoder.version:
        raise ValueError(
            f"encoder tail: trained on encoder {base}, the installed encoder is "
            f"{encoder.version}; retrain ('labeler retrain')"
        )
    tail = EncoderTail(encoder, stages=stages)
    try:
        tail.load_state_dict(weights, strict=True)  # type: ignore[arg-type]
    except (RuntimeError, TypeError) as exc:
        raise ValueError(f"encoder tail: weights do not fit ({exc})") from None
    return tail.eval()


def tail_features(
    tail: EncoderTail, features: Sequence[Sequence[np.ndarray]], *, batch_size: int = 16
) -> list[tuple[np.ndarray, ...]]:
    """The tuned encoder's features from the base encoder's cached features.

    Parameters
    ----------
    tail : EncoderTail
    features : sequence of N tuples of 4 ndarray
        Base features per tile (float16 from the cache).
    batch_size : int
        Tiles per pass (consecutive tiles of equal shapes are batched).

    Returns
    -------
    list of N tuple of 4 ndarray
        The unchanged earlier levels and the recomputed later ones (float32), as the head
        saw them in training.
    """
    tail.eval()
    out: list[tuple[np.ndarray, ...]] = []
    i = 0
    with inference():
        while i < len(features):
            shape = [np.shape(a) for a in features[i]]
            j = i + 1
            while (
                j < len(features)
                and j - i < batch_size
                and [np.shape(a) for a in features[j]] == shape
            ):
                j += 1
            new = tail(features_to_tensors(features[i:j]))
            for k in range(j - i):
                out.append(
                    tuple(features[i + k][lv] for lv in range(tail.input_level + 1))
                    + tuple(t[k].contiguous().numpy() for t in new[tail.input_level + 1 :])
                )
            i = j
    return out
