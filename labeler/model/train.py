"""Training the proposal head on full masks and weak labels together.

Loss: partial cross-entropy with class weights (:mod:`labeler.model.loss`): pixels a weak
label leaves open contribute nothing, so full masks and weak labels mix freely.

Augmentation modes (how a batch is built and moved: :mod:`labeler.model.augment`):

``"turns"``
    The exact flips and quarter turns of the tiles: the encoder features of each turned
    tile were computed once and cached (:mod:`labeler.model.turned`); each batch reads the
    features of one of the turns, with the masks and pixels turned alike, and colour
    jitter on the pixels of the refinement. No encoder pass while training.
``"features"``
    Cached encoder features of the tiles themselves, turned as feature maps (an
    approximation: the encoder is not equivariant to flips and turns). For callers that
    have only the tiles' features.
``"images"``
    Joint ``torchvision.transforms.v2`` augmentation of images and masks, each augmented
    batch through the frozen encoder: one encoder pass per tile per step (slow).
``"auto"`` (default)
    ``"turns"`` when the turned tiles' features are given, else ``"images"`` when images
    and an encoder are given and at most ``image_mode_max_tiles`` (24) tiles train, else
    ``"features"``.

Budget. An epoch is one shuffled pass over the training tiles, repeated until it has
made at least ``min_steps_per_epoch`` (16) optimiser steps. Training runs for at most
``model.epochs`` epochs and at most a budget of optimiser steps that grows sub-linearly
with the number of training tiles (:func:`labeler.model.budget.step_budget`), whichever
ends first. A held-out slice of the labelled tiles (``val_share``, at least one tile;
none when ``val_share`` is 0 or only one tile is labelled, and then the last epoch is
kept) is scored after each epoch: a fixed sample of at most 32 held-out tiles
(:func:`labeler.model.budget.validation_sample`). With ``keep="best"`` it drives early
stopping: training stops after ``patience`` epochs without a lower validation loss, and
the best state is kept (:mod:`labeler.model.validation`). With ``keep="last"`` (what
:func:`labeler.model.fit.fit_head`, hence ``labeler retrain``, asks for) training runs
to the end of the budget, where the cosine schedule has brought the learning rate to
zero, and keeps that state; the validation figures are only reported, so the slice is
scored after at most :data:`REPORTED_VALIDATIONS` evenly spaced epochs and the last one
(the other epochs' history holds NaN): a 200-tile label set would otherwise score its
32-tile sample after each of its 40 epochs. On the demo plots
the slice of two tiles that 12 labelled tiles give is too noisy to choose an epoch by:
keeping the last state scored 0.711 and 0.701 mIoU (seeds 0 and 1) against 0.710 and
0.690 for the state early stopping chose (450 steps, ``benchmarks/proposal_quality.py``
split).

Refinement. When the tiles' pixels are given (``images=``) the default head also learns a
full-resolution refinement (:mod:`labeler.model.refine`). The loss is then the partial
cross-entropy of the refined logits plus ``aux_weight`` (0.4) times that of the coarse
logits (dropout active, bilinearly upsampled): an auxiliary loss on the intermediate
output as in deep supervision (Lee et al. 2015, "Deeply-supervised nets", AISTATS;
PSPNet, Zhao et al. 2017, uses the weight 0.4), which keeps the stride-4 classifier,
whose dropout passes give the uncertainty maps, a segmenter in its own right. Both
full-resolution losses are taken on a random ``crop`` x ``crop`` window of each batch
(:mod:`labeler.model.crop`; the trunk still sees the whole tiles). Validation loss and
IoU are those of the refined output on whole tiles.

Encoder fine-tuning. With ``finetune_stages`` (the ``model.finetune_stages`` setting) 2 or
4, the last stages of the encoder train together with the head, from the cached feature
level before them, at a tenth of the head's learning rate
(:mod:`labeler.model.tail`); the result carries the trained :class:`EncoderTail`, a new
encoder version.

Everything is seeded (``torch.manual_seed`` inside a forked RNG state, so the caller's
global RNG is left as it was; a numpy generator for the split, the validation sample,
the shuffles, the turns and the crops).

:func:`train_head` runs in steps: check the options; prepare the labelled tiles
(:func:`labeler.model.trainset.prepare_training_set`: check the inputs, map the masks to
head channels, split training from validation, resolve the augmentation mode); weigh the
classes; then, epoch by epoch, fit (:func:`labeler.model.steps.train_epoch`), validate
(:func:`labeler.model.validation.validate`) and apply the stopping rule
(:func:`labeler.model.validation.early_stopping`), keeping the state of the best epoch.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import torch

from labeler.model.augment import colour_jitter
from labeler.model.budget import step_budget, validation_sample
from labeler.model.head import REFINE_CHANNELS, HeadConfig, ProposalHead
from labeler.model.loss import class_weights
from labeler.model.steps import cosine_schedule, epoch_batches, optimiser, train_epoch
from labeler.model.tail import EncoderTail
from labeler.model.trainset import prepare_training_set
from labeler.model.validation import early_stopping, iou_from, validate
from labeler.settings import AUGMENT_MODES, ModelSettings

__all__ = [
    "TrainResult",
    "train_head",
    "epoch_batches",
    "IMAGE_MODE_MAX_TILES",
    "MIN_STEPS_PER_EPOCH",
    "AUX_WEIGHT",
    "TRAIN_WIDTH",
    "TRAIN_LR",
    "REPORTED_VALIDATIONS",
]

#: Weight of the coarse (stride-4) auxiliary loss when the head refines.
AUX_WEIGHT = 0.4

#: FPN width of the head :func:`train_head` builds when no ``config`` is given (48 gave
#: higher demo mIoU than 32 at the same steps; :mod:`labeler.model.budget` has the table).
TRAIN_WIDTH = 48
#: Peak AdamW learning rate of the head (3e-3 left the head short of converged within
#: the step budget; :mod:`labeler.model.budget` has the table).
TRAIN_LR = 6e-3

#: Most validations of a ``keep="last"`` training besides the last epoch's (only reported).
REPORTED_VALIDATIONS = 8

#: Fewest optimiser steps per epoch: small label sets are passed over several times.
MIN_STEPS_PER_EPOCH = 16
#: Largest training set for which ``mode="auto"`` augments images through the encoder
#: (when no turned tiles are given).
IMAGE_MODE_MAX_TILES = 24

#: ``progress(step, total_steps, metrics)`` after each epoch.
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
        Per epoch: ``epoch``, ``step``, ``train_loss``, ``val_loss``, ``val_miou``.
    n_train, n_val : int
        Tiles used for training and held out for validation.
    mode : str
        ``"turns"``, ``"features"`` or ``"images"``.
    class_weights : ndarray, shape (K,)
        Loss weight per head class.
    tail : EncoderTail or None
        The fine-tuned encoder stages in their best state (eval mode), or None when the
        encoder stayed frozen.
    steps, budget : int
        Optimiser steps made, and the most that were allowed (the step budget, or the
        steps of ``model.epochs`` epochs if fewer).
    precision : str
        Arithmetic of the training steps' convolutions.
    """

    head: ProposalHead
    val_iou: np.ndarray
    best_epoch: int
    history: list[dict[str, float]] = field(default_factory=list)
    n_train: int = 0
    n_val: int = 0
    mode: str = "features"
    class_weights: np.ndarray = field(default_factory=lambda: np.ones(0))
    tail: EncoderTail | None = None
    steps: int = 0
    budget: int = 0
    precision: str = "float32"


# -- the steps of train_head ----------------------------------------------------------------------
def _check_options(
    cfg: HeadConfig,
    idx: tuple[int, ...],
    *,
    mode: str,
    min_steps_per_epoch: int,
    patience: int,
    aux_weight: float,
    has_images: bool,
    steps: int | None,
    schedule: str,
    coarse_loss: str,
    keep: str = "best",
    precision: str = "float32",
) -> None:
    if precision not in ("float32", "bfloat16"):
        raise ValueError(f"precision: expected 'float32' or 'bfloat16', got {precision!r}")
    if keep not in ("best", "last"):
        raise ValueError(f"keep: expected 'best' or 'last', got {keep!r}")
    if cfg.class_indices != idx:
        raise ValueError(
            f"config: class_indices {cfg.class_indices} differ from class_indices {idx}"
        )
    if mode not in AUGMENT_MODES:
        raise ValueError(
            f"mode: expected one of {', '.join(repr(m) for m in AUGMENT_MODES)}, got {mode!r}"
        )
    if min_steps_per_epoch < 1:
        raise ValueError(f"min_steps_per_epoch: expected at least 1, got {min_steps_per_epoch}")
    if patience < 1:
        raise ValueError(f"patience: expected at least 1 epoch, got {patience}")
    if aux_weight < 0:
        raise ValueError(f"aux_weight: expected a weight >= 0, got {aux_weight}")
    if coarse_loss not in ("cells", "pixels"):
        raise ValueError(f"coarse_loss: expected 'cells' or 'pixels', got {coarse_loss!r}")
    if schedule not in ("cosine", "constant"):
        raise ValueError(f"schedule: expected 'cosine' or 'constant', got {schedule!r}")
    if steps is not None and steps < 1:
        raise ValueError(
            f"steps: expected at least 1 optimiser step (or None: automatic), got {steps}"
        )
    if cfg.refines and not has_images:
        raise ValueError(
            f"images: a head with refinement (config.refine_channels = {cfg.refine_channels}) "
            "learns from the tiles' pixels; pass images= or a config with refine_channels=0"
        )


def _epoch_steps(groups: dict[tuple, list[int]], batch_size: int, min_steps: int) -> int:
    """Steps of one epoch: whole passes (batches per shape) until ``min_steps`` are made."""
    one = sum(-(-len(m) // batch_size) for m in groups.values())
    return one * -(-min_steps // one) if one else 0


def _make_tail(encoder: Callable | None, stages: int) -> EncoderTail | None:
    if stages == 0:
        return None
    if not hasattr(encoder, "blocks") or not hasattr(encoder, "taps"):
        raise ValueError(
            f"encoder: fine-tuning {stages} encoder stages (finetune_stages) needs the encoder "
            f"itself (load_encoder()), got {type(encoder).__name__}; pass encoder= or set "
            "finetune_stages=0"
        )
    return EncoderTail(encoder, stages=stages)  # type: ignore[arg-type]


# -- training -------------------------------------------------------------------------------------
def train_head(
    masks: Sequence[np.ndarray],
    *,
    class_indices: Sequence[int],
    features: Sequence[Sequence[np.ndarray]] | None = None,
    images: Sequence[np.ndarray] | None = None,
    encoder: Callable | None = None,
    turned: Sequence[Mapping[int, Sequence[np.ndarray]]] | None = None,
    settings: ModelSettings | None = None,
    mode: str = "auto",
    config: HeadConfig | None = None,
    patience: int | None = None,
    steps: int | None = None,
    crop: int = 0,
    finetune_stages: int | None = None,
    schedule: str = "cosine",
    coarse_loss: str = "cells",
    keep: str = "best",
    lr: float = TRAIN_LR,
    weight_decay: float = 1e-4,
    image_mode_max_tiles: int = IMAGE_MODE_MAX_TILES,
    min_steps_per_epoch: int = MIN_STEPS_PER_EPOCH,
    aux_weight: float = AUX_WEIGHT,
    precision: str = "float32",
    progress: ProgressFn | None = None,
) -> TrainResult:
    """Train a proposal head on labelled tiles.

    Parameters
    ----------
    masks : sequence of N ndarray, each (H, W) uint8
        Truth per tile: class indices, 255 where unlabelled (weak labels and full masks
        mix). Tiles with no labelled pixel are skipped.
    class_indices : sequence of int
        Schema indices the head predicts (channel order), e.g. ``(0, 1, 2, 3)``.
    features : sequence of N tuples of 4 arrays, optional
        Cached encoder features of the tiles (``"features"`` mode; default the turn 0
        entries of ``turned``).
    images : sequence of N ndarray, each (H, W, 3) uint8, optional
        The tiles themselves: needed for ``"images"`` mode (with ``encoder``) and for a
        head with refinement, which the default config adds when they are given.
    encoder : Lite0Encoder or callable, optional
        Frozen encoder for ``"images"`` mode, and the base of a fine-tuned tail.
    turned : sequence of N mappings, optional
        Per tile ``{code: features of the turned tile}`` (:mod:`labeler.model.turned`),
        code 0 included, the same codes for every tile (``"turns"`` mode).
    settings : ModelSettings, optional
        ``seed``, ``epochs`` (upper bound), ``batch_size``, ``min_labelled_tiles``,
        ``val_share``, ``patience`` and ``finetune_stages``; defaults when omitted.
    mode : {"auto", "turns", "features", "images"}
        Augmentation mode; see the module docstring.
    config : HeadConfig, optional
        Head shape; default width :data:`TRAIN_WIDTH` (48), dropout 0.2, with ``class_indices``, and a
        refinement of ``REFINE_CHANNELS`` (16) channels when ``images`` are given (none
        without them).
    patience : int, optional
        Epochs without a lower validation loss before stopping; default the
        ``model.patience`` setting.
    steps : int, optional
        Most optimiser steps; default :func:`labeler.model.budget.step_budget` of the
        number of training tiles.
    crop : int
        Side in pixels of the window the full-resolution losses are taken on (a multiple
        of 4); 0 uses whole tiles.
    finetune_stages : int, optional
        Encoder stages trained with the head (0, 2 or 4); default the
        ``model.finetune_stages`` setting. Needs ``encoder``.
    schedule : {"cosine", "constant"}
        Learning rate over the steps: a short warm-up and a cosine decay to zero at the
        end of the budget (:func:`labeler.model.steps.cosine_schedule`), or constant.
    keep : {"best", "last"}
        The state returned: that of the epoch with the lowest validation loss, training
        stopping after ``patience`` epochs without a lower one (``"best"``), or that of
        the last epoch, training running to the end of the budget and the validation
        only reported (``"last"``: with the cosine schedule the learning rate has
        decayed to zero there; :func:`labeler.model.fit.fit_head` asks for it). Without
        validation tiles the last epoch is kept either way.
    coarse_loss : {"cells", "pixels"}
        How the stride-4 logits are scored: on their own 4 x 4 cells over the whole tiles
        (:func:`labeler.model.loss.cell_cross_entropy`), or bilinearly upsampled to every
        pixel of the training window.
    lr, weight_decay : float
        AdamW options (peak rate, default :data:`TRAIN_LR`; the tail uses a tenth of ``lr`` and no decay).
    image_mode_max_tiles : int
        ``"auto"`` picks ``"images"`` up to this many training tiles (without ``turned``).
    min_steps_per_epoch : int
        An epoch repeats whole shuffled passes over the training tiles until it has
        made at least this many optimiser steps.
    aux_weight : float
        Weight of the coarse logits' loss beside the refined logits' (refining heads).
    precision : {"float32", "bfloat16"}
        Arithmetic of the training steps' convolutions (:func:`labeler.model.steps.batch_loss`);
        weights, losses and validation stay float32.
    progress : callable, optional
        ``progress(step, total_steps, metrics)`` after each epoch (metrics as in history;
        ``total_steps`` is the most steps allowed, early stopping may end sooner).

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
        class_indices=idx,
        width=TRAIN_WIDTH,
        refine_channels=REFINE_CHANNELS if images is not None else 0,
    )
    patience = s.patience if patience is None else patience
    stages = s.finetune_stages if finetune_stages is None else finetune_stages
    _check_options(
        cfg,
        idx,
        mode=mode,
        min_steps_per_epoch=min_steps_per_epoch,
        patience=patience,
        aux_weight=aux_weight,
        has_images=images is not None,
        steps=steps,
        schedule=schedule,
        coarse_loss=coarse_loss,
        keep=keep,
        precision=precision,
    )
    rng = np.random.default_rng(s.seed)  # the split, then every epoch's shuffles and turns
    data = prepare_training_set(
        masks,
        class_indices=idx,
        n_classes=cfg.n_classes,
        features=features,
        images=images,
        encoder=encoder,
        turned=turned,
        settings=s,
        mode=mode,
        image_mode_max_tiles=image_mode_max_tiles,
        rng=rng,
    )
    budget = step_budget(len(data.train_ids)) if steps is None else int(steps)
    epoch_steps = _epoch_steps(data.groups, s.batch_size, min_steps_per_epoch)
    budget = min(budget, s.epochs * epoch_steps)
    planned = min(s.epochs, -(-budget // epoch_steps)) if epoch_steps else s.epochs
    every = 1 if keep == "best" else max(1, -(-planned // REPORTED_VALIDATIONS))
    val_groups = data.groups_of(validation_sample(data.val_ids, rng))
    weights = class_weights(data.class_counts)
    weight_t = torch.as_tensor(weights, dtype=torch.float32)
    augment = None
    if data.mode == "images":
        from labeler.model.augment_images import image_augmentation  # needs torchvision

        augment = image_augmentation()
    jitter = colour_jitter() if cfg.refines else None

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(s.seed)
        head = ProposalHead(cfg)
        tail = _make_tail(encoder, stages)
        opt = optimiser(head, tail, lr=lr, weight_decay=weight_decay)
        scheduler = cosine_schedule(opt, budget) if schedule == "cosine" else None
        best_epoch, best_state, best_cm = 0, None, None
        history: list[dict[str, float]] = []
        done = 0
        epoch = 0
        while epoch < s.epochs and done < budget:
            epoch += 1
            train_loss, made = train_epoch(
                head,
                opt,
                data,
                rng,
                weight_t,
                batch_size=s.batch_size,
                min_steps=min_steps_per_epoch,
                max_steps=budget - done,
                aux_weight=aux_weight,
                crop=crop,
                augment=augment,
                jitter=jitter,
                encoder=encoder,
                tail=tail,
                scheduler=scheduler,
                coarse_loss=coarse_loss,
                precision=precision,
            )
            done += made
            if tail is not None:
                tail.eval()
            val_loss, cm = math.nan, None
            if epoch % every == 0 or done >= budget or epoch >= s.epochs:
                val_loss, cm = validate(
                    head,
                    data.features,
                    data.masks,
                    val_groups,
                    weight_t,
                    cfg,
                    images=images,
                    tail=tail,
                )
            iou = iou_from(cm)
            metrics = {
                "epoch": float(epoch),
                "step": float(done),
                "train_loss": train_loss,
                "val_loss": val_loss,
                "val_miou": float(np.nanmean(iou)) if np.isfinite(iou).any() else math.nan,
            }
            history.append(metrics)
            if progress is not None:
                progress(done, budget, dict(metrics))
            stop = False
            if data.val_ids and keep == "best":
                val_losses = [h["val_loss"] for h in history]
                best_epoch, stop = early_stopping(val_losses, patience=patience)
            else:  # no validation, or the last epoch asked for
                best_epoch = epoch
            if best_epoch == epoch:
                best_state = copy.deepcopy(
                    (head.state_dict(), tail.state_dict() if tail is not None else None)
                )
                best_cm = cm
            if stop:
                break
    if best_state is not None:
        head.load_state_dict(best_state[0])
        if tail is not None:
            tail.load_state_dict(best_state[1])
    head.eval()
    if tail is not None:
        tail.eval()
    val_iou = iou_from(best_cm) if best_cm is not None else np.full(cfg.n_classes, np.nan)
    return TrainResult(
        head=head,
        val_iou=val_iou,
        best_epoch=best_epoch,
        history=history,
        n_train=len(data.train_ids),
        n_val=len(data.val_ids),
        mode=data.mode,
        class_weights=weights,
        tail=tail,
        steps=done,
        budget=budget,
        precision=precision,
    )
