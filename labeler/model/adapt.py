"""Self-supervised adaptation of the encoder to a project's own tiles, within a time budget.

ImageNet-1k holds almost no field images, while a project's unlabelled tiles are free.
:func:`adapt_encoder` trains the encoder on them without labels. Each step draws a batch
of tiles, makes two field views of each (:func:`labeler.model.views.field_views`:
scale, flips and quarter turns, sun and shade, never bare soil from a tile with plants)
and pulls the two views of the same ground together. Revisit pairs (the same ground on
two dates, aligned onto one pixel grid by :mod:`labeler.imagery.revisits`) give view B
from the other date and fill a share of each batch.

Two methods (:mod:`labeler.model.adapt_objective`): ``"image"``, NT-Xent (SimCLR) on
pooled features; ``"dense"`` (the default, suited to segmentation: every feature cell is
trained), VICReg on pooled features and on the cells that see the same ground in the two
views, as in VICRegL.

Small CPU batches. Batch normalisation is kept in evaluation mode: its running
statistics stay those of the pretrained weights (statistics of eight tiles are noise),
while its scale and shift still learn; the projectors have no batch normalisation. The
projectors first learn alone for ``projector_steps`` steps (the encoder held), then all
learning rates rise linearly over ``warmup_steps`` steps, so random projectors do not
jolt the pretrained encoder (see :class:`AdaptConfig`).

Time and interruption. The run stops before a step that would overrun ``seconds`` (the
next step's time is predicted from the last ones) or after ``max_steps``; both count
the whole run, resumed parts included. With a ``checkpoint`` path the state is written
every ``checkpoint_every`` seconds and at the end (:mod:`labeler.model.adapt_checkpoint`);
an existing checkpoint with the same settings is resumed. A KeyboardInterrupt between
two parameter updates writes the state of the last finished step before it propagates
(an interrupt inside an update leaves the previous checkpoint as it was).

Pass an encoder whose batch norms are not folded (``load_encoder(fold=False,
channels_last=False)``) so that the resulting state dict loads into
:class:`~labeler.model.encoder.Lite0Encoder` as is; fold it afterwards for inference.
Any module that maps a float ``(N, 3, H, W)`` batch in 0..255 to a tuple of feature maps
at increasing strides can be adapted.
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
import torch
from torch import nn

from labeler.model.adapt_checkpoint import (
    AdaptCheckpoint,
    load_adapt_checkpoint,
    save_adapt_checkpoint,
)
from labeler.model.adapt_objective import (
    AdaptObjective,
    ProjectionHeads,
    draw_batch,
    feature_strides,
    view_batch,
)
from labeler.model.views import default_view_size

__all__ = ["METHODS", "AdaptConfig", "AdaptProgress", "AdaptResult", "adapt_encoder"]

METHODS = ("image", "dense")


@dataclass(frozen=True)
class AdaptConfig:
    """Settings of an adaptation run (all but the budgets; a resume needs the same).

    Attributes
    ----------
    method : {"dense", "image"}
    batch_size : int
        Positive pairs per step (at least 2; fewer when there are fewer tiles).
    view_size : int or None
        View side in pixels (a multiple of 32); default
        :func:`~labeler.model.views.default_view_size` of the first tile (128 for 256-pixel
        tiles: a training step costs about the square of it).
    frozen_prefixes : tuple of str
        Encoder parameters whose names start with one of these are not trained. The
        default keeps EfficientNet-Lite0's stem and its stride-2 and stride-4 blocks as
        pretrained: generic edge and colour filters, and the dearest to train (the
        largest activations); measured on a loaded two-core machine, a step on 16 views
        of 128 pixels took about a quarter less time with them fixed. Names that match
        nothing (another encoder) fix nothing.
    scale_range : (float, float)
        Source pixels per view pixel (ground sampling distance jitter).
    min_overlap : float
        Least shared share of the two crops.
    learning_rate : float
        AdamW learning rate of the encoder.
    heads_learning_rate : float
        AdamW learning rate of the projectors.
    weight_decay : float
    projector_steps : int
        First steps in which only the projectors learn: the encoder runs without
        gradients (a step costs about a third), so that freshly drawn projectors do not
        pass random gradients into the pretrained encoder (linear probing before
        fine-tuning, Kumar et al., ICLR 2022, "Fine-tuning can distort pretrained
        features"). Without them, 40 dense steps on the demo tiles shrank the spread of
        the pooled deepest features by a third and lowered a linear probe's mIoU.
    warmup_steps : int
        Steps over which all learning rates rise linearly from zero (the encoder's
        counted from the end of ``projector_steps``).
    temperature : float
        NT-Xent temperature (method "image").
    alpha : float
        Weight of the image-level VICReg term against the dense one (method "dense").
    dense_strides : tuple of int
        Feature strides that get the dense loss.
    projector_dim : int
        Output width of the projectors.
    revisit_share : float
        Share of each batch taken from revisit pairs when there are any.
    jitter : bool
        Colour and blur jitter of the views.
    """

    method: str = "dense"
    batch_size: int = 8
    view_size: int | None = None
    frozen_prefixes: tuple[str, ...] = ("stem.", "blocks.0.", "blocks.1.", "blocks.2.")
    scale_range: tuple[float, float] = (0.7, 1.4)
    min_overlap: float = 0.3
    learning_rate: float = 1e-4
    heads_learning_rate: float = 1e-3
    weight_decay: float = 1e-4
    projector_steps: int = 10
    warmup_steps: int = 20
    temperature: float = 0.5
    alpha: float = 0.5
    dense_strides: tuple[int, ...] = (8, 16, 32)
    projector_dim: int = 128
    revisit_share: float = 0.25
    jitter: bool = True

    def __post_init__(self) -> None:
        if self.method not in METHODS:
            raise ValueError(f"method: expected one of {METHODS}, got {self.method!r}")
        if self.batch_size < 2:
            raise ValueError(f"batch_size: expected at least 2 pairs, got {self.batch_size}")
        if not 0 <= self.alpha <= 1:
            raise ValueError(f"alpha: expected a weight in [0, 1], got {self.alpha}")
        if not 0 <= self.revisit_share <= 1:
            raise ValueError(f"revisit_share: expected a share in [0, 1], got {self.revisit_share}")
        if self.view_size is not None and (self.view_size < 32 or self.view_size % 32):
            raise ValueError(
                f"view_size: expected a positive multiple of 32 (the coarsest feature stride), "
                f"got {self.view_size}"
            )
        if self.warmup_steps < 0:
            raise ValueError(f"warmup_steps: expected 0 or more, got {self.warmup_steps}")
        if self.projector_steps < 0:
            raise ValueError(f"projector_steps: expected 0 or more, got {self.projector_steps}")

    def as_dict(self) -> dict[str, object]:
        """Plain data (tuples as lists) for a checkpoint."""
        return {k: list(v) if isinstance(v, tuple) else v for k, v in asdict(self).items()}


@dataclass(frozen=True)
class AdaptProgress:
    """Reported after every step: ``step`` (1-based, whole run), its ``loss``, the
    ``elapsed`` seconds of the run and the estimated seconds ``remaining``."""

    step: int
    loss: float
    elapsed: float
    remaining: float


@dataclass
class AdaptResult:
    """Outcome of :func:`adapt_encoder`.

    Attributes
    ----------
    encoder_state : dict of str -> Tensor
        The adapted encoder's state dict (CPU copies).
    steps : int
        Optimiser steps of the whole run (resumed parts included).
    losses : list of float
        Loss of each step.
    seconds : float
        Seconds used by the whole run.
    stopped : {"time", "steps"}
        Which budget ended the run.
    resumed_from : int
        Step the run resumed from (0 for a fresh start).
    """

    encoder_state: dict[str, torch.Tensor]
    steps: int
    losses: list[float] = field(default_factory=list)
    seconds: float = 0.0
    stopped: str = "steps"
    resumed_from: int = 0


def _keep_batchnorm_statistics(module: nn.Module) -> None:
    for m in module.modules():
        if isinstance(m, nn.modules.batchnorm._BatchNorm):
            m.eval()


@contextlib.contextmanager
def _trainable(
    encoder: nn.Module, threads: int | None, frozen_prefixes: Sequence[str]
) -> Iterator[None]:
    """Encoder in training mode with gradients (batch norms in eval, parameters named
    with ``frozen_prefixes`` fixed); mode, flags and threads restored after."""
    frozen = getattr(encoder, "frozen", None)
    flags = [p.requires_grad for p in encoder.parameters()]
    was_training = encoder.training
    old_threads = torch.get_num_threads()
    if threads is not None:
        torch.set_num_threads(max(1, threads))
    if frozen is not None:
        encoder.frozen = False
    for name, p in encoder.named_parameters():
        p.requires_grad_(not name.startswith(tuple(frozen_prefixes)))
    encoder.train(True)
    _keep_batchnorm_statistics(encoder)
    try:
        yield
    finally:
        for p, flag in zip(encoder.parameters(), flags, strict=True):
            p.requires_grad_(flag)
        if frozen is not None:
            encoder.frozen = frozen
        encoder.train(was_training)
        if threads is not None:
            torch.set_num_threads(old_threads)


def _check_inputs(tiles: Sequence[np.ndarray], revisits, config: AdaptConfig) -> int:
    if len(tiles) + len(revisits) < 2:
        raise ValueError(
            f"tiles: expected at least 2 tiles or revisit pairs (the others in a batch are the "
            f"contrast), got {len(tiles)} tiles and {len(revisits)} pairs"
        )
    first = tiles[0] if len(tiles) else revisits[0][0]
    size = config.view_size or default_view_size(*np.shape(first)[:2])
    for i, pair in enumerate(revisits):
        if len(pair) != 2 or np.shape(pair[0]) != np.shape(pair[1]):
            raise ValueError(
                f"revisits[{i}]: expected two arrays of one shape (the same ground on two "
                "dates), got other shapes; align them with labeler.imagery.revisits.align_revisit"
            )
    return size


def adapt_encoder(
    encoder: nn.Module,
    tiles: Sequence[np.ndarray],
    *,
    revisits: Sequence[tuple[np.ndarray, np.ndarray]] = (),
    config: AdaptConfig | None = None,
    seconds: float = 600.0,
    max_steps: int | None = None,
    checkpoint: str | os.PathLike[str] | None = None,
    checkpoint_every: float = 180.0,
    progress: Callable[[AdaptProgress], None] | None = None,
    seed: int = 0,
    threads: int | None = None,
) -> AdaptResult:
    """Train ``encoder`` without labels on ``tiles`` (and revisit pairs) within a budget.

    Parameters
    ----------
    encoder : nn.Module
        Maps a float ``(N, 3, H, W)`` batch in 0..255 to feature maps at increasing
        strides (e.g. an unfolded :class:`~labeler.model.encoder.Lite0Encoder`). Trained
        in place; its mode and gradient flags are restored afterwards.
    tiles : sequence of ndarray, each (H, W, 3) uint8
        Unlabelled (or labelled) tiles; indexed lazily, so a sequence that reads on
        demand works.
    revisits : sequence of (ndarray, ndarray)
        The same ground on two dates, each pair on one pixel grid.
    config : AdaptConfig, optional
        Method and settings; the defaults when None.
    seconds : float
        Time budget of the whole run in seconds (resumed parts included).
    max_steps : int, optional
        Step budget of the whole run.
    checkpoint : path, optional
        Checkpoint file: resumed when it exists, written every ``checkpoint_every``
        seconds (0 = after every step), at the end and on KeyboardInterrupt.
    progress : callable, optional
        ``progress(AdaptProgress)`` after every step.
    seed : int
        Seeds the projectors and the view draws of a fresh run.
    threads : int, optional
        Torch intra-op threads during the run (restored after); None keeps the current.

    Returns
    -------
    AdaptResult

    Raises
    ------
    ValueError
        For fewer than two tiles and pairs, misshapen revisit pairs, a dense stride the
        encoder lacks, an encoder not in float32, or a checkpoint of other settings.
    KeyboardInterrupt
        Re-raised after writing the last finished step to ``checkpoint``.
    """
    start = time.monotonic()  # the budget counts the setup too
    config = config or AdaptConfig()
    if seconds <= 0:
        raise ValueError(f"seconds: expected a positive time budget, got {seconds}")
    if max_steps is not None and max_steps < 0:
        raise ValueError(f"max_steps: expected 0 or more, got {max_steps}")
    if checkpoint_every < 0:
        raise ValueError(f"checkpoint_every: expected seconds >= 0, got {checkpoint_every}")
    size = _check_inputs(tiles, revisits, config)
    dtypes = {p.dtype for p in encoder.parameters()}
    if dtypes - {torch.float32}:
        raise ValueError(
            f"encoder: expected float32 parameters for training, got {sorted(map(str, dtypes))}; "
            "load it with precision='float32'"
        )
    strides, channels = feature_strides(encoder, size=size)
    missing = [s for s in config.dense_strides if s not in strides]
    if config.method == "dense" and missing:
        raise ValueError(
            f"dense_strides: the encoder gives strides {strides}, not {missing}; "
            "choose dense_strides among them"
        )
    settings = {**config.as_dict(), "view_size": size, "seed": seed}
    with torch.random.fork_rng(), _trainable(encoder, threads, config.frozen_prefixes):
        torch.manual_seed(seed)
        dense = config.dense_strides if config.method == "dense" else ()
        heads = ProjectionHeads(channels, strides, dense_strides=dense, dim=config.projector_dim)
        optimizer = torch.optim.AdamW(
            [
                {
                    "params": [p for p in encoder.parameters() if p.requires_grad],
                    "lr": config.learning_rate,
                },
                {"params": list(heads.parameters()), "lr": config.heads_learning_rate},
            ],
            weight_decay=config.weight_decay,
        )
        base_lrs = [g["lr"] for g in optimizer.param_groups]
        rng = np.random.default_rng(seed)
        step, used, losses = 0, 0.0, []
        if checkpoint is not None and os.path.exists(checkpoint):
            state = load_adapt_checkpoint(checkpoint)
            _check_settings(checkpoint, state.settings, settings)
            try:
                encoder.load_state_dict(state.encoder_state, strict=True)
                heads.load_state_dict(state.heads_state, strict=True)
                optimizer.load_state_dict(state.optimizer_state)
            except (RuntimeError, ValueError, KeyError) as exc:
                first = str(exc).splitlines()[0]
                raise ValueError(
                    f"{checkpoint}: the checkpoint does not fit this encoder ({first}); "
                    "resume with the encoder it was made from, or delete the file"
                ) from None
            torch.set_rng_state(state.torch_rng)
            rng.bit_generator.state = state.numpy_rng
            step, used, losses = state.step, state.elapsed, list(state.losses)
        resumed_from = step
        objective = AdaptObjective(encoder, heads, strides, config)
        plants: dict = {}
        last_save = time.monotonic()
        saved_step = step
        step_time = None
        updating = False
        snapshot = (torch.get_rng_state(), rng.bit_generator.state)

        def elapsed() -> float:
            return used + time.monotonic() - start

        def save() -> None:
            nonlocal saved_step, last_save
            save_adapt_checkpoint(
                checkpoint,
                AdaptCheckpoint(
                    step=step,
                    elapsed=elapsed(),
                    settings=settings,
                    encoder_state=encoder.state_dict(),
                    heads_state=heads.state_dict(),
                    optimizer_state=optimizer.state_dict(),
                    torch_rng=snapshot[0],
                    numpy_rng=snapshot[1],
                    losses=losses,
                ),
            )
            saved_step, last_save = step, time.monotonic()

        stopped = "steps"
        try:
            while max_steps is None or step < max_steps:
                predicted = step_time or 0.0
                if elapsed() + predicted > seconds:
                    stopped = "time"
                    break
                t0 = time.monotonic()
                held = step < config.projector_steps  # the projectors learn alone
                for g, lr, first in zip(
                    optimizer.param_groups, base_lrs, (config.projector_steps, 0), strict=True
                ):
                    g["lr"] = lr * _warm(step - first, config.warmup_steps)
                items = draw_batch(len(tiles), len(revisits), config, rng=rng)
                va, vb, pairs = view_batch(
                    items, tiles, revisits, plants=plants, config=config, size=size, rng=rng
                )
                loss = objective(va, vb, pairs, encoder_grad=not held)
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                updating = True  # from here until the step is booked, no save on interrupt
                optimizer.step()
                step += 1
                snapshot = (torch.get_rng_state(), rng.bit_generator.state)
                losses.append(float(loss.detach()))
                updating = False
                dt = time.monotonic() - t0
                step_time = dt if step_time is None else 0.7 * step_time + 0.3 * dt
                if checkpoint is not None and time.monotonic() - last_save >= checkpoint_every:
                    save()
                if progress is not None:
                    left = seconds - elapsed()
                    if max_steps is not None:
                        left = min(left, (max_steps - step) * step_time)
                    progress(AdaptProgress(step, losses[-1], elapsed(), max(0.0, left)))
            if checkpoint is not None and (saved_step != step or not os.path.exists(checkpoint)):
                save()
        except KeyboardInterrupt:
            if checkpoint is not None and not updating and saved_step != step:
                save()
            raise
        total = elapsed()
    return AdaptResult(
        encoder_state={k: v.detach().clone() for k, v in encoder.state_dict().items()},
        steps=step,
        losses=losses,
        seconds=total,
        stopped=stopped,
        resumed_from=resumed_from,
    )


def _warm(step: int, warmup_steps: int) -> float:
    """Learning-rate factor of 0-based ``step`` of a linear warm-up (0 before it starts)."""
    if step < 0:
        return 0.0
    return min(1.0, (step + 1) / warmup_steps) if warmup_steps else 1.0


def _check_settings(path, stored: dict, wanted: dict) -> None:
    differ = sorted(k for k in set(stored) | set(wanted) if stored.get(k) != wanted.get(k))
    if differ:
        shown = ", ".join(f"{k}: {stored.get(k)!r} there, {wanted.get(k)!r} now" for k in differ)
        raise ValueError(
            f"{path}: the checkpoint was made with other settings ({shown}); resume with the "
            "same settings, or delete the file to start afresh"
        )
