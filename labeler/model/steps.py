"""The optimiser steps of head training: batches of an epoch, the loss of a batch, an epoch.

:func:`epoch_batches` shuffles the training tiles into batches of equal-shape tiles;
:func:`train_epoch` builds each batch the way the augmentation mode says
(:mod:`labeler.model.augment`), passes its features through the fine-tuned encoder
stages when there are any (:mod:`labeler.model.tail`) and makes one AdamW step on
:func:`batch_loss`: the partial cross-entropy of the coarse logits, or of the refined
logits plus ``aux_weight`` times the coarse one, on a random window of the batch
(:mod:`labeler.model.crop`). :func:`optimiser` gives the tail a tenth of the head's
learning rate and no weight decay. The loop around them is
:func:`labeler.model.train.train_head`.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import torch
import torch.nn.functional as F

from labeler.model.augment import feature_batch, turned_batch
from labeler.model.crop import crop_logits, draw_crop
from labeler.model.head import ProposalHead
from labeler.model.loss import cell_cross_entropy, partial_cross_entropy
from labeler.model.refine import pixel_input
from labeler.model.tail import TAIL_LR_FACTOR, EncoderTail
from labeler.model.trainset import TrainingSet

__all__ = ["epoch_batches", "batch_loss", "train_epoch", "optimiser", "cosine_schedule", "WARMUP"]

#: Share of the step budget over which the learning rate rises linearly to its peak.
WARMUP = 0.05


def epoch_batches(
    groups: dict[tuple, list[int]], batch_size: int, rng: np.random.Generator, *, min_steps: int = 1
) -> list[list[int]]:
    """The batches of one epoch: shuffled batches of equal-shape tiles.

    Parameters
    ----------
    groups : dict
        Tile numbers by tile shape; a batch never mixes shapes.
    batch_size : int
        Most tiles per batch.
    rng : numpy.random.Generator
        Shuffles the tiles of each shape, then the order of the batches.
    min_steps : int
        Whole shuffled passes are repeated until there are at least this many batches.

    Returns
    -------
    batches : list of list of int
    """
    out: list[list[int]] = []
    while True:
        one = []
        for members in groups.values():
            order = rng.permutation(members).tolist()
            one += [order[i : i + batch_size] for i in range(0, len(order), batch_size)]
        out += [one[i] for i in rng.permutation(len(one))]
        if len(out) >= min_steps or not one:
            return out


def batch_loss(
    head: ProposalHead,
    levels: list[torch.Tensor],
    target: torch.Tensor,
    pixels: torch.Tensor | None,
    weight: torch.Tensor,
    *,
    aux_weight: float,
    crop: int,
    rng: np.random.Generator,
    tail: EncoderTail | None = None,
    coarse_loss: str = "cells",
    jitter: Callable[[torch.Tensor], torch.Tensor] | None = None,
    precision: str = "float32",
) -> torch.Tensor | None:
    """Loss of one batch: coarse logits alone, or refined plus ``aux_weight`` x coarse.

    ``coarse_loss="cells"`` scores the stride-4 logits on their own grid over the whole
    tiles (:func:`labeler.model.loss.cell_cross_entropy`); ``"pixels"`` upsamples them
    bilinearly and scores every pixel. With ``crop`` > 0 the full-resolution losses (the
    refined logits, and the coarse ones with ``"pixels"``) are taken on one random window
    of the batch (:mod:`labeler.model.crop`); the trunk always sees the whole tiles.
    ``jitter`` (colour jitter per tile) acts on the pixels the refinement reads: the
    window and its margin, or the whole tiles without a window. ``precision="bfloat16"``
    runs the forward pass under CPU autocast in bfloat16 (the losses, the weights and
    their updates stay float32).
    """
    with torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bfloat16"):
        target = target.to(torch.long)
        if tail is not None:
            levels = tail(levels)
        z = head.trunk(levels)
        cells = coarse_loss == "cells"
        loss = cell_cross_entropy(head.classify(z).float(), target, weight) if cells else None
        refines = head.config.refines and pixels is not None
        window = draw_crop(tuple(target.shape[-2:]), crop, rng) if crop else None
        coarse = refined = None
        if window is not None:
            coarse, refined = crop_logits(
                head, z, pixels if refines else None, window, coarse=not cells, jitter=jitter
            )
            target = target[
                :, window.row : window.row + window.height, window.col : window.col + window.width
            ]
        else:
            if not cells:
                coarse = F.interpolate(
                    head.classify(z),
                    size=tuple(target.shape[-2:]),
                    mode="bilinear",
                    align_corners=False,
                )
            if refines and jitter is not None:
                pixels = jitter(pixels)
            refined = head.refine(z, pixel_input(pixels)) if refines else None
        if not cells:
            loss = partial_cross_entropy(coarse.float(), target, weight)
        if loss is None or refined is None:
            return loss
        fine = partial_cross_entropy(refined.float(), target, weight)
        return aux_weight * loss if fine is None else fine + aux_weight * loss


def train_epoch(
    head: ProposalHead,
    opt: torch.optim.Optimizer,
    data: TrainingSet,
    rng: np.random.Generator,
    weight: torch.Tensor,
    *,
    batch_size: int,
    min_steps: int,
    max_steps: int,
    aux_weight: float,
    crop: int,
    augment: Callable | None,
    jitter: Callable[[torch.Tensor], torch.Tensor] | None,
    encoder: Callable | None,
    tail: EncoderTail | None,
    scheduler: torch.optim.lr_scheduler.LRScheduler | None = None,
    coarse_loss: str = "cells",
    precision: str = "float32",
) -> tuple[float, int]:
    """One epoch of at most ``max_steps`` optimiser steps (``precision`` as in :func:`batch_loss`).

    Returns
    -------
    loss : float
        Mean loss per tile (NaN if none counted).
    steps : int
        Optimiser steps made.
    """
    head.train()
    if tail is not None:
        tail.train()
    total, seen, steps = 0.0, 0, 0
    for batch in epoch_batches(data.groups, batch_size, rng, min_steps=min_steps):
        if steps >= max_steps:
            break
        if data.mode == "turns":
            levels, target, pixels = turned_batch(
                batch, data.turned, data.masks, rng, images=data.images
            )
        elif data.mode == "features":
            levels, target, pixels = feature_batch(
                batch,
                data.features,
                data.masks,
                data.shape_of,
                rng,
                images=data.images,
            )
        else:
            from labeler.model.augment_images import image_batch  # torchvision: images mode only

            levels, target, pixels = image_batch(batch, data.images, data.masks, augment, encoder)
        loss = batch_loss(
            head,
            levels,
            target,
            pixels,
            weight,
            aux_weight=aux_weight,
            crop=crop,
            rng=rng,
            tail=tail,
            coarse_loss=coarse_loss,
            jitter=None if data.mode == "images" else jitter,  # images mode jitters in augment
            precision=precision,
        )
        steps += 1  # a batch without labelled pixels still spends its step
        if loss is None:
            if scheduler is not None:
                scheduler.step()
            continue
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        if scheduler is not None:
            scheduler.step()
        total += loss.item() * len(batch)
        seen += len(batch)
    return (total / seen if seen else math.nan), steps


def optimiser(
    head: ProposalHead, tail: EncoderTail | None, *, lr: float, weight_decay: float
) -> torch.optim.Optimizer:
    groups: list[dict] = [{"params": list(head.parameters())}]
    if tail is not None:  # lower rate, no decay: the tail stays near the pretrained weights
        groups.append(
            {"params": list(tail.parameters()), "lr": lr * TAIL_LR_FACTOR, "weight_decay": 0.0}
        )
    # fused: the update of every parameter in one kernel, not a loop of small ones
    return torch.optim.AdamW(groups, lr=lr, weight_decay=weight_decay, fused=True)


def cosine_schedule(
    opt: torch.optim.Optimizer, total_steps: int, *, warmup: float = WARMUP
) -> torch.optim.lr_scheduler.LambdaLR:
    """Linear warm-up over ``warmup`` of the steps, then a half cosine down to zero.

    The learning rate of step ``t`` (0-based) is ``lr * (t + 1) / w`` for ``t < w``
    (``w = max(1, round(warmup * total_steps))``), then
    ``lr * (1 + cos(pi * (t - w) / (total_steps - w))) / 2`` (Loshchilov & Hutter 2017,
    "SGDR: stochastic gradient descent with warm restarts", ICLR, without restarts; the
    warm-up as in Goyal et al. 2017, "Accurate, large minibatch SGD").
    """
    if total_steps < 1:
        raise ValueError(f"total_steps: expected at least 1 step, got {total_steps}")
    w = max(1, round(warmup * total_steps))

    def factor(t: int) -> float:
        if t < w:
            return (t + 1) / w
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, (t - w) / max(1, total_steps - w))))

    return torch.optim.lr_scheduler.LambdaLR(opt, factor)
