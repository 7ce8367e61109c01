"""Training the proposal head on full masks and weak (scribble) masks together.

Loss: partial cross-entropy (``ignore_index=255``): pixels a weak label leaves open
contribute nothing, so full masks and scribbles mix freely (Tang et al. 2018). Class
weights counter imbalance: with ``f_k`` the share of class k among the labelled
training pixels, ``w_k = f_k ** -0.5 / sum_j f_j ** 0.5`` (inverse square root of the
frequency, scaled so that the mean weight per labelled pixel is 1), clipped to
``[0.1, 10]``; classes absent from training get weight 1 (it never applies).

Two augmentation modes:

``"features"``
    Works on cached encoder features: each batch gets one of the eight flips/quarter
    turns of the square, applied to the four feature maps and the masks together. Exact
    for the masks; approximate for the features, because the encoder is not equivariant
    to flips and turns (learned filters, asymmetric SAME padding): the turned features
    of a tile are not the features of the turned tile. Quarter turns need square tiles;
    tiles whose sides are not multiples of 32 are not transformed (feature cells would
    not line up with the pixels). Fast: no encoder pass at all.
``"images"``
    Runs ``torchvision.transforms.v2`` on the images and masks jointly (flips, quarter
    turns, colour jitter; masks are ``tv_tensors.Mask`` so they are never interpolated
    and never colour-jittered) and passes each augmented batch through the frozen
    encoder. Truer augmentation, but one encoder pass per tile per epoch.
``"auto"`` (default)
    ``"images"`` when images and an encoder are given and the label set is small
    (at most ``image_mode_max_tiles`` = 24 training tiles, where the encoder cost is a few
    seconds per epoch and augmentation matters most), else ``"features"``.

An epoch is one shuffled pass over the training tiles, repeated until it has made at
least ``min_steps_per_epoch`` (16) optimiser steps, so that a dozen labelled tiles still
train for a useful number of steps per epoch. A held-out slice of the labelled tiles
(``val_share``, at least one tile; none when ``val_share`` is 0 or only one tile is
labelled, and then the last epoch is kept) drives early stopping: training stops after
``patience`` epochs without a lower validation loss and the best state is kept.
Refinement. When the tiles' pixels are given (``images=``) the default head also learns a
full-resolution refinement (:mod:`labeler.model.refine`). The loss is then the partial
cross-entropy of the refined logits plus ``aux_weight`` (0.4) times that of the coarse
logits (dropout active, bilinearly upsampled): an auxiliary loss on the intermediate
output as in deep supervision (Lee et al. 2015, "Deeply-supervised nets", AISTATS;
PSPNet, Zhao et al. 2017, uses the weight 0.4), which keeps the stride-4 classifier,
whose dropout passes give the uncertainty maps, a segmenter in its own right. Validation
loss and IoU are those of the refined output. In ``"features"`` mode the pixels get the
same flip/turn as features and masks, and colour jitter (the same ranges as in
``"images"`` mode) on the pixels only; in ``"images"`` mode the refinement sees the
augmented image the encoder sees.

Measured on the demo scenario with 12 labelled tiles (bilinear masks, no refinement):
"images" mode reached mIoU 0.60-0.63, "features" mode 0.56. With the refinement, in
"images" mode on the quality benchmark's split (10 training and 2 validation tiles):
0.695 with a patience of 5 epochs, 0.729 with 10 (the ``model.patience`` default); the
two-tile validation loss is noisy, and a longer patience lets training run on.
Everything is seeded (``torch.manual_seed`` inside a forked RNG state, so the caller's
global RNG is left as it was; a numpy generator for shuffles).
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import torch
import torch.nn.functional as F
from torchvision import tv_tensors
from torchvision.transforms import v2

from labeler.classes import UNLABELLED
from labeler.errors import InputError
from labeler.metrics import confusion_matrix, iou_per_class
from labeler.model.encoder import to_input
from labeler.model.head import (
    REFINE_CHANNELS,
    HeadConfig,
    ProposalHead,
    class_lut,
    features_to_tensors,
)
from labeler.model.refine import pixel_input
from labeler.settings import AUGMENT_MODES, ModelSettings

__all__ = [
    "TrainResult",
    "train_head",
    "class_weights",
    "image_augmentation",
    "colour_jitter",
    "RandomQuarterTurn",
    "dihedral",
    "IMAGE_MODE_MAX_TILES",
    "MIN_STEPS_PER_EPOCH",
    "AUX_WEIGHT",
]

#: Weight of the coarse (stride-4) auxiliary loss when the head refines.
AUX_WEIGHT = 0.4

#: Fewest optimiser steps per epoch: small label sets are passed over several times.
MIN_STEPS_PER_EPOCH = 16
#: Largest training set for which ``mode="auto"`` augments images through the encoder.
IMAGE_MODE_MAX_TILES = 24

ProgressFn = Callable[[int, int, dict[str, float]], None]


@dataclass
class TrainResult:
    """Outcome of :func:`train_head`.

    Attributes
    ----------
    head : ProposalHead
        The head in its best validation state (eval mode).
    val_iou : ndarray, shape (K,), float64
        Per-class IoU on the validation tiles at the best epoch (labelled pixels only);
        NaN for classes absent from the validation truth, all NaN without validation.
    best_epoch : int
        1-based epoch whose state was kept.
    history : list of dict
        Per epoch: ``epoch``, ``train_loss``, ``val_loss``, ``val_miou``.
    n_train, n_val : int
        Tiles used for training and for validation.
    mode : str
        ``"features"`` or ``"images"``.
    class_weights : ndarray, shape (K,)
        Loss weight per head class.
    """

    head: ProposalHead
    val_iou: np.ndarray
    best_epoch: int
    history: list[dict[str, float]] = field(default_factory=list)
    n_train: int = 0
    n_val: int = 0
    mode: str = "features"
    class_weights: np.ndarray = field(default_factory=lambda: np.ones(0))


def class_weights(counts: np.ndarray, *, clip: tuple[float, float] = (0.1, 10.0)) -> np.ndarray:
    """Inverse square-root frequency weights (see the module docstring).

    Parameters
    ----------
    counts : ndarray, shape (K,)
        Labelled pixels per class.

    Returns
    -------
    weights : ndarray, shape (K,), float64
        1 for classes with no pixel; all ones when nothing is labelled.
    """
    c = np.asarray(counts, np.float64)
    out = np.ones(c.shape, np.float64)
    total = c.sum()
    if total <= 0:
        return out
    f = c / total
    present = f > 0
    out[present] = f[present] ** -0.5 / np.sum(np.sqrt(f[present]))
    out[present] = np.clip(out[present], *clip)
    return out


# -- augmentation ----------------------------------------------------------------------------
class RandomQuarterTurn(v2.Transform):
    """Turn image and mask together by 0, 90, 180 or 270 degrees (exact, no resampling).

    Non-square inputs are turned by 0 or 180 degrees only, so shapes never change.
    """

    def make_params(self, flat_inputs: list) -> dict[str, int]:
        return {"k": int(torch.randint(0, 4, ()).item())}

    def transform(self, inpt, params: dict[str, int]):
        k = params["k"]
        if inpt.shape[-2] != inpt.shape[-1]:
            k = 2 * (k // 2)
        if k == 0:
            return inpt
        out = torch.rot90(inpt, k, dims=(-2, -1))
        if isinstance(inpt, tv_tensors.TVTensor):
            return tv_tensors.wrap(out, like=inpt)
        return out


def colour_jitter() -> v2.ColorJitter:
    """Colour jitter of the training images: brightness, contrast and saturation +-20 %,
    hue +-0.03 (common practice, no source)."""
    return v2.ColorJitter(brightness=0.2, contrast=0.2, saturation=0.2, hue=0.03)


def image_augmentation() -> v2.Compose:
    """The joint image/mask augmentation of ``"images"`` mode.

    Flips (p 0.5 each), quarter turns, and :func:`colour_jitter`, which only touches images.
    """
    return v2.Compose(
        [
            v2.RandomHorizontalFlip(p=0.5),
            v2.RandomVerticalFlip(p=0.5),
            RandomQuarterTurn(),
            colour_jitter(),
        ]
    )


def dihedral(x: torch.Tensor, code: int) -> torch.Tensor:
    """One of the 8 flips/turns of the square on the last two axes.

    ``code`` 0..7: ``code % 4`` quarter turns, then a left-right flip when ``code >= 4``.
    """
    k = code % 4
    y = torch.rot90(x, k, dims=(-2, -1)) if k else x
    return torch.flip(y, dims=(-1,)) if code >= 4 else y


# -- helpers ---------------------------------------------------------------------------------
def _to_channels(masks: Sequence[np.ndarray], class_indices: Sequence[int]) -> list[np.ndarray]:
    lut = class_lut(class_indices)
    out = []
    for n, m in enumerate(masks):
        a = np.asarray(m)
        if a.ndim != 2 or a.dtype != np.uint8:
            raise ValueError(
                f"masks: tile {n} expected a 2-D uint8 class-index mask, got {a.dtype} {a.shape}"
            )
        mapped = lut[a]
        if (mapped < 0).any():
            bad = sorted(int(v) for v in np.unique(a[mapped < 0]))
            raise ValueError(
                f"masks: tile {n} holds values {bad} that are not head classes "
                f"{tuple(class_indices)} or 255 (unlabelled); map them to the schema first"
            )
        out.append(mapped.astype(np.uint8))
    return out


def _batches(
    groups: dict[tuple, list[int]], batch_size: int, rng: np.random.Generator, *, min_steps: int = 1
) -> list[list[int]]:
    """Shuffled batches of equal-shape tiles; whole passes repeated to reach ``min_steps``."""
    out: list[list[int]] = []
    while True:
        one = []
        for members in groups.values():
            order = rng.permutation(members).tolist()
            one += [order[i : i + batch_size] for i in range(0, len(order), batch_size)]
        out += [one[i] for i in rng.permutation(len(one))]
        if len(out) >= min_steps or not one:
            return out


def _loss(logits: torch.Tensor, target: torch.Tensor, weight: torch.Tensor) -> torch.Tensor | None:
    labelled = target != UNLABELLED
    if not bool(labelled.any()):
        return None
    return F.cross_entropy(logits, target, weight=weight, ignore_index=UNLABELLED)


def _can_turn(shape: tuple[int, int]) -> bool:
    return shape[0] % 32 == 0 and shape[1] % 32 == 0


# -- training --------------------------------------------------------------------------------
def train_head(
    masks: Sequence[np.ndarray],
    *,
    class_indices: Sequence[int],
    features: Sequence[Sequence[np.ndarray]] | None = None,
    images: Sequence[np.ndarray] | None = None,
    encoder: Callable | None = None,
    settings: ModelSettings | None = None,
    mode: str = "auto",
    config: HeadConfig | None = None,
    patience: int | None = None,
    lr: float = 3e-3,
    weight_decay: float = 1e-4,
    image_mode_max_tiles: int = IMAGE_MODE_MAX_TILES,
    min_steps_per_epoch: int = MIN_STEPS_PER_EPOCH,
    aux_weight: float = AUX_WEIGHT,
    progress: ProgressFn | None = None,
) -> TrainResult:
    """Train a proposal head on labelled tiles.

    Parameters
    ----------
    masks : sequence of N ndarray, each (H, W) uint8
        Truth per tile: class indices, 255 where unlabelled (scribbles and full masks
        mix). Tiles with no labelled pixel are skipped.
    class_indices : sequence of int
        Schema indices the head predicts (channel order), e.g. ``(0, 1, 2, 3)``.
    features : sequence of N tuples of 4 arrays, optional
        Cached encoder features of the tiles (needed for ``"features"`` mode).
    images : sequence of N ndarray, each (H, W, 3) uint8, optional
        The tiles themselves: needed for ``"images"`` mode (with ``encoder``) and for a
        head with refinement, which the default config adds when they are given.
    encoder : Lite0Encoder or callable, optional
        Frozen encoder for ``"images"`` mode.
    settings : ModelSettings, optional
        ``seed``, ``epochs`` (upper bound), ``batch_size``, ``min_labelled_tiles`` and
        ``val_share``; defaults when omitted.
    mode : {"auto", "features", "images"}
        Augmentation mode; see the module docstring.
    config : HeadConfig, optional
        Head shape; default width 32, dropout 0.2, with ``class_indices``, and a
        refinement of ``REFINE_CHANNELS`` (16) channels when ``images`` are given (none
        without them).
    patience : int, optional
        Epochs without a lower validation loss before stopping; default the
        ``model.patience`` setting (10).
    lr, weight_decay : float
        AdamW options.
    image_mode_max_tiles : int
        ``"auto"`` picks ``"images"`` up to this many training tiles.
    min_steps_per_epoch : int
        An epoch repeats whole shuffled passes over the training tiles until it has
        made at least this many optimiser steps (with fresh augmentations), so that small
        label sets train, and early stopping counts, in meaningful amounts.
    aux_weight : float
        Weight of the coarse logits' loss beside the refined logits' (refining heads).
    progress : callable, optional
        ``progress(epoch, n_epochs, metrics)`` after each epoch (metrics as in history).

    Returns
    -------
    TrainResult

    Raises
    ------
    InputError
        Fewer labelled tiles than ``min_labelled_tiles``.
    ValueError
        Inconsistent inputs or options (the message names them).
    """
    s = settings or ModelSettings()
    idx = tuple(int(i) for i in class_indices)
    cfg = config or HeadConfig(
        class_indices=idx, refine_channels=REFINE_CHANNELS if images is not None else 0
    )
    if cfg.class_indices != idx:
        raise ValueError(
            f"config: class_indices {cfg.class_indices} differ from class_indices {idx}"
        )
    if mode not in AUGMENT_MODES:
        raise ValueError(f"mode: expected 'auto', 'features' or 'images', got {mode!r}")
    if min_steps_per_epoch < 1:
        raise ValueError(f"min_steps_per_epoch: expected at least 1, got {min_steps_per_epoch}")
    if patience is None:
        patience = s.patience
    if patience < 1:
        raise ValueError(f"patience: expected at least 1 epoch, got {patience}")
    if aux_weight < 0:
        raise ValueError(f"aux_weight: expected a weight >= 0, got {aux_weight}")
    if cfg.refines and images is None:
        raise ValueError(
            f"images: a head with refinement (config.refine_channels = {cfg.refine_channels}) "
            "learns from the tiles' pixels; pass images= or a config with refine_channels=0"
        )
    n = len(masks)
    for name, seq in (("features", features), ("images", images)):
        if seq is not None and len(seq) != n:
            raise ValueError(f"{name}: expected one entry per mask ({n}), got {len(seq)}")
    channel_masks = _to_channels(masks, idx)
    if images is not None:
        for i, (im, m) in enumerate(zip(images, channel_masks, strict=True)):
            shape = np.shape(im)
            if len(shape) != 3 or shape[2] != 3 or tuple(shape[:2]) != m.shape:
                raise ValueError(
                    f"images: tile {i} expected an RGB tile of shape {(*m.shape, 3)} like its "
                    f"mask, got {shape}; pass the pixels of the labelled tiles"
                )
    labelled = [i for i, m in enumerate(channel_masks) if (m != UNLABELLED).any()]
    if len(labelled) < s.min_labelled_tiles:
        raise InputError(
            f"labels: retraining needs at least {s.min_labelled_tiles} labelled tiles "
            f"(model.min_labelled_tiles), got {len(labelled)}; label "
            f"{s.min_labelled_tiles - len(labelled)} more tile(s) first"
        )
    rng = np.random.default_rng(s.seed)
    order = rng.permutation(labelled).tolist()
    n_val = 0
    if s.val_share > 0 and len(order) >= 2:
        n_val = min(len(order) - 1, max(1, round(s.val_share * len(order))))
    val_ids, train_ids = sorted(order[:n_val]), sorted(order[n_val:])

    can_images = images is not None and encoder is not None
    if mode == "auto":
        mode = "images" if can_images and len(train_ids) <= image_mode_max_tiles else "features"
    if mode == "images" and not can_images:
        raise ValueError(
            "mode: 'images' needs both images and encoder; pass them or use 'features'"
        )
    if mode == "features" and features is None:
        raise ValueError("features: 'features' mode needs the cached features of the tiles")
    if features is None:
        # images mode without a cache: validation features come from the encoder once
        features = [None] * n
        with torch.no_grad():
            for i in val_ids:
                feats = encoder(to_input(images[i], memory_format=torch.channels_last))
                features[i] = tuple(f[0].to(torch.float16).numpy() for f in feats)

    shape_of = {i: channel_masks[i].shape for i in labelled}
    if mode == "features":
        for i in labelled:
            h4, w4 = np.shape(features[i][0])[-2:]
            if (math.ceil(shape_of[i][0] / 4), math.ceil(shape_of[i][1] / 4)) != (h4, w4):
                raise ValueError(
                    f"features: tile {i} has stride-4 features {h4} x {w4} but its mask is "
                    f"{shape_of[i]}; pass the features of the same tiles"
                )
    counts = np.zeros(cfg.n_classes, np.int64)
    for i in train_ids:
        counts += np.bincount(channel_masks[i].ravel(), minlength=256)[: cfg.n_classes]
    weights = class_weights(counts)
    weight_t = torch.as_tensor(weights, dtype=torch.float32)

    groups: dict[tuple, list[int]] = {}
    for i in train_ids:
        groups.setdefault(shape_of[i], []).append(i)
    val_groups: dict[tuple, list[int]] = {}
    for i in val_ids:
        val_groups.setdefault(shape_of[i], []).append(i)
    augment = image_augmentation()
    jitter = colour_jitter() if cfg.refines else None

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(s.seed)
        head = ProposalHead(cfg)
        opt = torch.optim.AdamW(head.parameters(), lr=lr, weight_decay=weight_decay)
        best_loss, best_epoch, best_state, best_cm = math.inf, 0, None, None
        history: list[dict[str, float]] = []
        stale = 0
        for epoch in range(1, s.epochs + 1):
            head.train()
            total, seen = 0.0, 0
            for batch in _batches(groups, s.batch_size, rng, min_steps=min_steps_per_epoch):
                if mode == "features":
                    levels, target, pixels = _feature_batch(
                        batch, features, channel_masks, shape_of, rng, images=images, jitter=jitter
                    )
                else:
                    levels, target, pixels = _image_batch(
                        batch, images, channel_masks, augment, encoder
                    )
                target = target.to(torch.long)
                z = head.trunk(levels)
                coarse = F.interpolate(
                    head.classify(z),
                    size=tuple(target.shape[-2:]),
                    mode="bilinear",
                    align_corners=False,
                )
                loss = _loss(coarse, target, weight_t)
                if loss is None:
                    continue
                if cfg.refines:
                    refined = head.refine(z, pixel_input(pixels))
                    loss = _loss(refined, target, weight_t) + aux_weight * loss
                opt.zero_grad(set_to_none=True)
                loss.backward()
                opt.step()
                total += loss.item() * len(batch)
                seen += len(batch)
            train_loss = total / seen if seen else math.nan
            val_loss, cm = _validate(
                head, features, channel_masks, val_groups, weight_t, cfg, images=images
            )
            iou = _iou_from(cm)
            miou = float(np.nanmean(iou)) if np.isfinite(iou).any() else math.nan
            metrics = {
                "epoch": float(epoch),
                "train_loss": train_loss,
                "val_loss": val_loss,
                "val_miou": miou,
            }
            history.append(metrics)
            if progress is not None:
                progress(epoch, s.epochs, dict(metrics))
            score = val_loss if n_val else -float(epoch)  # no validation: keep the last
            if score < best_loss:
                best_loss, best_epoch, stale = score, epoch, 0
                best_state = copy.deepcopy(head.state_dict())
                best_cm = cm
            else:
                stale += 1
                if n_val and stale >= patience:
                    break
    if best_state is not None:
        head.load_state_dict(best_state)
    head.eval()
    val_iou = _iou_from(best_cm) if best_cm is not None else np.full(cfg.n_classes, np.nan)
    return TrainResult(
        head=head,
        val_iou=val_iou,
        best_epoch=best_epoch,
        history=history,
        n_train=len(train_ids),
        n_val=n_val,
        mode=mode,
        class_weights=weights,
    )


def _feature_batch(
    batch: list[int],
    features: Sequence,
    channel_masks: Sequence[np.ndarray],
    shape_of: dict[int, tuple[int, int]],
    rng: np.random.Generator,
    *,
    images: Sequence[np.ndarray] | None = None,
    jitter: v2.Transform | None = None,
) -> tuple[list[torch.Tensor], torch.Tensor, torch.Tensor | None]:
    """Cached features, masks and pixels of a batch, one random flip/turn for all of them.

    The pixels (``(B, 3, H, W)`` uint8, None without ``images``) also get ``jitter``, each
    tile its own draw; features and masks never do.
    """
    levels = features_to_tensors([features[i] for i in batch])
    target = torch.from_numpy(np.stack([channel_masks[i] for i in batch]))
    pixels = None
    if images is not None:
        pixels = torch.from_numpy(np.stack([np.asarray(images[i]) for i in batch]))
        pixels = pixels.permute(0, 3, 1, 2)
    shape = shape_of[batch[0]]
    if _can_turn(shape):
        # square tiles: any of the 8; otherwise only those that keep the shape
        code = int(rng.integers(8)) if shape[0] == shape[1] else int(rng.choice([0, 2, 4, 6]))
        levels = [dihedral(t, code).contiguous(memory_format=torch.channels_last) for t in levels]
        target = dihedral(target, code)
        if pixels is not None:
            pixels = dihedral(pixels, code)
    if pixels is not None and jitter is not None:
        pixels = torch.stack([jitter(p) for p in pixels])
    return levels, target, pixels


def _image_batch(
    batch: list[int],
    images: Sequence[np.ndarray],
    channel_masks: Sequence[np.ndarray],
    augment: v2.Transform,
    encoder: Callable,
) -> tuple[list[torch.Tensor], torch.Tensor, torch.Tensor]:
    """Jointly augmented images and masks of a batch, through the frozen encoder.

    Returns the features, the masks and the augmented images ``(B, 3, H, W)`` uint8.
    """
    ims, tgs = [], []
    for i in batch:
        im = tv_tensors.Image(torch.from_numpy(np.asarray(images[i])).permute(2, 0, 1))
        mk = tv_tensors.Mask(torch.from_numpy(channel_masks[i]))
        im, mk = augment(im, mk)
        ims.append(im.as_subclass(torch.Tensor))
        tgs.append(mk.as_subclass(torch.Tensor))
    x = torch.stack(ims).to(torch.float32).contiguous(memory_format=torch.channels_last)
    with torch.no_grad():
        levels = [
            t.to(torch.float32).contiguous(memory_format=torch.channels_last) for t in encoder(x)
        ]
    return levels, torch.stack(tgs), torch.stack(ims)


def _validate(
    head: ProposalHead,
    features: Sequence,
    channel_masks: Sequence[np.ndarray],
    groups: dict[tuple, list[int]],
    weight: torch.Tensor,
    cfg: HeadConfig,
    *,
    images: Sequence[np.ndarray] | None = None,
) -> tuple[float, np.ndarray | None]:
    if not groups:
        return math.nan, None
    head.eval()
    k = cfg.n_classes
    cm = np.zeros((k, k), np.int64)
    loss_sum, weight_sum = 0.0, 0.0
    with torch.no_grad():
        for shape, members in groups.items():
            for start in range(0, len(members), 8):
                batch = members[start : start + 8]
                levels = features_to_tensors([features[i] for i in batch])
                target = torch.from_numpy(np.stack([channel_masks[i] for i in batch])).long()
                pixels = None
                if cfg.refines and images is not None:
                    pixels = pixel_input(np.stack([np.asarray(images[i]) for i in batch]))
                logits = head(levels, size=shape, pixels=pixels)
                lab = target != UNLABELLED
                if bool(lab.any()):
                    # weighted sum and weight total, so batches combine exactly
                    per = F.cross_entropy(
                        logits, target, weight=weight, ignore_index=UNLABELLED, reduction="sum"
                    )
                    loss_sum += float(per)
                    weight_sum += float(weight[target[lab]].sum())
                pred = logits.argmax(dim=1).to(torch.uint8).numpy()
                for t, p in zip(target.to(torch.uint8).numpy(), pred, strict=True):
                    cm += confusion_matrix(t, p, n_classes=k, ignore=UNLABELLED)
    return (loss_sum / weight_sum if weight_sum else math.nan), cm


def _iou_from(cm: np.ndarray | None) -> np.ndarray:
    if cm is None:
        return np.full(0, np.nan)
    iou = iou_per_class(cm)
    iou[cm.sum(axis=1) == 0] = np.nan  # absent from the validation truth
    return iou
