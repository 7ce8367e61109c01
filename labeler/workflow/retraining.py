"""Retraining the proposal head on every saved mask (``labeler retrain``).

``retrain`` trains a new head on every saved full mask (accepted, amended, settled,
imported) and every weak label, and records it as a model version with its
per-class validation IoU and the seconds it took. The model room does the training
(:func:`labeler.model.fit.fit_head`): the flips and quarter turns of each labelled tile
are encoded once into the project's feature cache and reused by every later retrain, the
step budget grows sub-linearly with the labelled tiles, and the tiles' pixels teach the
head a full-resolution refinement of its stride-4 proposals. With
``model.finetune_stages`` set, the encoder's last stages train with the head: the
model version then names a new encoder version (base encoder plus tuned stages, saved in
the head's checkpoint), which ``labeler propose`` loads with the head
(:func:`labeler.workflow.features.load_head`).

Progress goes first over the tiles read and encoded, then over the optimiser steps, with
the validation mIoU and an estimate of the time left. Renewing the proposals of the open
tiles with the new model afterwards is :mod:`labeler.workflow.renewing`.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from labeler.classes import UNLABELLED
from labeler.errors import InputError, LabelerError
from labeler.imagery.read import open_image
from labeler.project import Project
from labeler.states import CONTESTED, KIND_FULL, KIND_WEAK, SETTLED
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord
from labeler.workflow.features import encoder_and_cache, tile_key
from labeler.workflow.progress import Progress, no_progress

__all__ = ["LabelledTile", "labelled_tiles", "RetrainResult", "retrain"]


@dataclass(frozen=True)
class LabelledTile:
    """A tile with the mask training uses.

    Attributes
    ----------
    tile : TileRecord
    image : ImageRecord
        The tile's image.
    mask : ndarray, shape (H, W), uint8
        Class indices, 255 unlabelled.
    kind : {KIND_FULL, KIND_WEAK}
        A full mask or a weak label (:mod:`labeler.states`).
    """

    tile: TileRecord
    image: ImageRecord
    mask: np.ndarray
    kind: str


def labelled_tiles(project: Project) -> list[LabelledTile]:
    """Every tile with a saved mask training may use.

    A tile's newest full mask (accepted, amended, settled or imported) is used; on a
    contested tile only a reviewer's settled mask counts (the annotators' masks are in
    dispute). Tiles without a full mask use their weak labels: every weak-label save of
    the tile, by any annotator, merged, the newer save winning where two mark the same
    pixel.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of LabelledTile
        In tile order; tiles whose mask is all unlabelled are left out.
    """
    store = project.store
    images = {im.id: im for im in store.images()}
    out = []
    newest_full: dict[int, object] = {}
    weak: dict[int, list] = {}
    for a in store.annotations(kind=None):  # oldest first: later rows win
        if a.kind == KIND_FULL:
            newest_full[a.tile_id] = a
        else:
            weak.setdefault(a.tile_id, []).append(a)
    for t in store.tiles():
        ann = newest_full.get(t.id)
        if t.state == CONTESTED:
            ann = None
        if t.state == SETTLED:
            settled = [
                a
                for a in store.annotation_history(t.id)
                if a.state == SETTLED and a.kind == KIND_FULL
            ]
            ann = settled[-1] if settled else ann
        kind = KIND_FULL
        if ann is not None:
            mask = ann.mask()
        elif t.id in weak:
            kind = KIND_WEAK
            mask = np.full(t.shape, UNLABELLED, np.uint8)
            for a in weak[t.id]:  # oldest first: a newer save overwrites where it marks
                m = a.mask()
                mask[m != UNLABELLED] = m[m != UNLABELLED]
        else:
            continue
        if (mask == UNLABELLED).all():
            continue
        out.append(LabelledTile(tile=t, image=images[t.image_id], mask=mask, kind=kind))
    return out


@dataclass(frozen=True)
class RetrainResult:
    """What ``labeler retrain`` did.

    Attributes
    ----------
    model_version : ModelVersionRecord
        The new model version.
    n_full, n_weak : int
        Labelled tiles with a full mask and with weak labels only.
    n_train, n_val : int
        Tiles that trained and that validated.
    best_epoch : int
        The epoch whose state was kept.
    mode : str
        Augmentation mode (``"turns"``, ``"features"`` or ``"images"``).
    history : list of dict
        Per epoch: epoch, step, train and validation loss, validation mIoU.
    steps : int
        Optimiser steps made.
    seconds : float
        Wall-clock time of the whole retrain.
    encoder_version : str
        The encoder version the head reads (a new one when encoder stages were tuned).
    tuned_stages : int
        Encoder stages fine-tuned with the head (0: the encoder stayed frozen).
    """

    model_version: ModelVersionRecord
    n_full: int
    n_weak: int
    n_train: int
    n_val: int
    best_epoch: int
    mode: str
    history: list[dict] = field(default_factory=list)
    steps: int = 0
    seconds: float = 0.0
    encoder_version: str = ""
    tuned_stages: int = 0


def _time_left(elapsed: float, done: int, total: int) -> str:
    """``", about N s left"`` from the pace so far (empty before the first step)."""
    if done <= 0 or total <= done:
        return ""
    left = elapsed / done * (total - done)
    return f", about {left:.0f} s left" if left < 120 else f", about {left / 60:.0f} min left"


def _read_tiles(
    project: Project, items: list[LabelledTile], progress: Progress
) -> tuple[list[np.ndarray], list[str]]:
    """The pixels and feature-cache keys of the labelled tiles, one image open at a time."""
    pixels: list = [None] * len(items)
    by_image: dict[int, list[int]] = {}
    for i, it in enumerate(items):
        by_image.setdefault(it.image.id, []).append(i)
    done = 0
    for idx in by_image.values():
        with open_image(project.image_path(items[idx[0]].image)) as reader:
            for i in idx:
                pixels[i] = reader.read(items[i].tile.window)
        done += len(idx)
        progress(done, len(items), "reading labelled tiles")
    return pixels, [tile_key(it.image, it.tile) for it in items]


def retrain(
    project: Project, *, encoder: str | None = None, progress: Progress = no_progress
) -> RetrainResult:
    """Train a new head on every saved mask and record it as a model version.

    The head's checkpoint (with the fine-tuned encoder stages, if any) is kept in the
    project's database, as version ``head-<n>`` numbered by the database, and copied to
    ``<project>/models/head-<sha256[:12]>.pt`` on this machine.

    Parameters
    ----------
    project : Project
        An open project.
    encoder : str, optional
        The encoder version to train on (:func:`labeler.workflow.encoders.find_encoder_version`:
        ``"imagenet"``, a name such as ``"encoder-2"``, or a version string); default the
        newest adapted version, else ImageNet-1k. The head records it, and ``propose``
        reads the tiles through the same version.
    progress : Progress
        Called as ``progress(done, total, label)``: over the tiles read, over the turned
        tiles encoded (only those the cache lacks), then over the optimiser steps (with
        the validation mIoU and the time left).

    Returns
    -------
    RetrainResult
        The new model version with its per-class validation IoU, the numbers of tiles
        used, the best epoch, the training history and the seconds it took.

    Raises
    ------
    LabelerError
        When there are fewer labelled tiles than the ``model.min_labelled_tiles``
        setting (the message says how many more are needed), or ``encoder`` names no
        encoder version of the project.
    """
    from labeler.model.checkpoint import checkpoint_bytes, keep_weights_file
    from labeler.model.fit import fit_head

    started = time.perf_counter()
    settings = project.settings
    schema = settings.classes
    items = labelled_tiles(project)
    need = settings.model.min_labelled_tiles
    if len(items) < need:
        raise LabelerError(
            f"retrain needs at least {need} labelled tiles (the model.min_labelled_tiles setting), found "
            f"{len(items)}; accept or correct {need - len(items)} more tiles first"
        )
    encoder, cache = encoder_and_cache(project, encoder=encoder)
    pixels, keys = _read_tiles(project, items, progress)
    ready = [time.perf_counter()]  # when training began: after the last tile was encoded

    def on_encode(done: int, total: int) -> None:
        progress(done, total, "encoding turned tiles")
        ready[0] = time.perf_counter()

    def on_epoch(step: int, total: int, metrics: dict) -> None:
        miou = metrics.get("val_miou")
        label = f"step {step}/{total}" + (
            "" if miou is None or math.isnan(miou) else f", val mIoU {miou:.3f}"
        )
        progress(step, total, label + _time_left(time.perf_counter() - ready[0], step, total))

    try:
        result = fit_head(
            [it.mask for it in items],
            pixels,
            keys,
            class_indices=schema.indices,
            cache=cache,
            encoder=encoder,
            settings=settings.model,
            progress=on_epoch,
            encode_progress=on_encode,
        )
    except InputError as exc:
        raise LabelerError(str(exc)) from None
    tail = result.tail
    encoder_version = tail.version if tail is not None else encoder.version
    store = project.store
    val = {
        c.name: (None if math.isnan(v) else float(v))
        for c, v in zip(schema.classes, result.val_iou, strict=True)
    }
    finite = [v for v in val.values() if v is not None]
    miou = float(np.mean(finite)) if finite else None
    weights = checkpoint_bytes(
        result.head,
        encoder_version=encoder_version,
        val_iou=result.val_iou,
        extra={"n_train": result.n_train, "n_val": result.n_val},
        encoder_tail=tail.state() if tail is not None else None,
    )
    # the database keeps the weights and numbers the version (head-<n>) for the team;
    # this machine's copy is named by their SHA-256
    ckpt = keep_weights_file(project.models_dir, "head", weights)
    n_full = sum(it.kind == "full" for it in items)
    seconds = time.perf_counter() - started
    mv = store.add_model_version(
        kind="head",
        weights=weights,
        encoder_version=encoder_version,
        checkpoint=str(ckpt.relative_to(project.root)),
        n_train_tiles=result.n_train,
        val_iou=val,
        miou=miou,
        details={
            "best_epoch": result.best_epoch,
            "mode": result.mode,
            "n_val": result.n_val,
            "full_tiles": n_full,
            "weak_tiles": len(items) - n_full,
            "epochs_max": settings.model.epochs,
            "steps": result.steps,
            "step_budget": result.budget,
            "refine_channels": result.head.config.refine_channels,
            "base_encoder_version": encoder.version,
            "tuned_stages": tail.stages if tail is not None else 0,
            "train_precision": result.precision,
            "seconds": round(seconds, 2),
        },
    )
    return RetrainResult(
        model_version=mv,
        n_full=n_full,
        n_weak=len(items) - n_full,
        n_train=result.n_train,
        n_val=result.n_val,
        best_epoch=result.best_epoch,
        mode=result.mode,
        history=list(result.history),
        steps=result.steps,
        seconds=seconds,
        encoder_version=encoder_version,
        tuned_stages=tail.stages if tail is not None else 0,
    )
