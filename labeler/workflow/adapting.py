"""Adapting the encoder to the project's own tiles without labels (``labeler adapt``).

ImageNet-1k holds almost no field images, while a project's tiles are free and plentiful.
``adapt`` gathers the project's tiles (labelled or not; a seeded sample of at most
``max_tiles``), and, where images of the same ground from different dates are in the
project (overlapping georeferenced footprints with capture dates, :func:`capture_dates`),
the revisit pairs: each tile with the same ground of the other date resampled onto its
pixel grid (:mod:`labeler.imagery.revisits`). The model room trains the encoder on them
within the time budget (:func:`labeler.model.adapt.adapt_encoder`: two views of each
tile, or the two dates of a revisit, pulled together; method ``"dense"``, VICRegL-style,
or ``"image"``, SimCLR's NT-Xent), writing a checkpoint every few minutes under
``<project>/models/adapting/``. An interrupted run (Ctrl-C) keeps its last checkpoint and
the same command resumes it; the budget counts the whole run.

The result is a new encoder version (:mod:`labeler.workflow.encoders`): a weights file
``<project>/models/encoder-<n>.pt`` and a model-version row. The next ``labeler retrain``
trains its head on it, and ``labeler propose`` then reads it through that head.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

import numpy as np
from affine import Affine

from labeler.errors import LabelerError
from labeler.fileio import remove_file
from labeler.imagery.read import open_image
from labeler.imagery.revisits import Footprint, align_revisit, pixel_mapping, revisit_pairs
from labeler.project import Project
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord
from labeler.workflow.adding import capture_dates
from labeler.workflow.encoders import load_encoder_version, save_encoder_version
from labeler.workflow.progress import Progress, no_progress

__all__ = ["ADAPT_METHODS", "AdaptOutcome", "adapt", "adapt_checkpoint_path", "revisit_crops"]

#: Methods of ``labeler adapt`` (:data:`labeler.model.adapt.METHODS`).
ADAPT_METHODS = ("dense", "image")
#: Seconds kept back from the budget for saving the new version.
_RESERVE_S = 3.0


@dataclass(frozen=True)
class AdaptOutcome:
    """What ``labeler adapt`` did.

    Attributes
    ----------
    encoder : ModelVersionRecord
        The new encoder version (kind ``"encoder"``).
    base_version : str
        The version the run started from.
    method : str
    tiles, revisit_pairs : int
        Tiles and revisit pairs the run drew from.
    steps : int
        Optimiser steps of the whole run (resumed parts included).
    resumed_from : int
        Step the run resumed from (0: a fresh start).
    seconds : float
        Seconds of training of the whole run.
    stopped : {"time", "steps"}
        Which budget ended it.
    first_loss, last_loss : float
        Mean loss of the first and of the last steps (a tenth of the run, 1 to 20 steps).
    losses : list of float
        Loss of every step.
    """

    encoder: ModelVersionRecord
    base_version: str
    method: str
    tiles: int
    revisit_pairs: int
    steps: int
    resumed_from: int
    seconds: float
    stopped: str
    first_loss: float
    last_loss: float
    losses: list[float] = field(default_factory=list)


def adapt_checkpoint_path(project: Project, *, method: str, base_version: str) -> Path:
    """Where the checkpoint of a run of ``method`` from ``base_version`` is kept.

    Parameters
    ----------
    project : Project
        An open project.
    method : str
        The run's method.
    base_version : str
        The encoder version the run started from.

    Returns
    -------
    Path
        ``<project>/models/adapting/<method>-<base_version>.ckpt``.
    """
    return project.models_dir / "adapting" / f"{method}-{base_version}.ckpt"


def _sample_tiles(project: Project, *, max_tiles: int, seed: int):
    store = project.store
    images = {im.id: im for im in store.images()}
    tiles = store.tiles()
    if len(tiles) > max_tiles:
        pick = np.sort(np.random.default_rng(seed).choice(len(tiles), max_tiles, replace=False))
        tiles = [tiles[int(i)] for i in pick]
    return images, tiles


def _read_tiles(
    project: Project, images: dict[int, ImageRecord], tiles: list[TileRecord], progress: Progress
) -> list[np.ndarray]:
    out: list = [None] * len(tiles)
    by_image: dict[int, list[int]] = {}
    for i, t in enumerate(tiles):
        by_image.setdefault(t.image_id, []).append(i)
    done = 0
    for image_id, idx in by_image.items():
        with open_image(project.image_path(images[image_id])) as reader:
            for i in idx:
                out[i] = reader.read(tiles[i].window)
        done += len(idx)
        progress(done, len(tiles), "reading tiles")
    return out


def _footprint(image: ImageRecord, captured: date | None) -> Footprint | None:
    if image.transform is None:
        return None
    return Footprint(
        image.id, Affine(*image.transform[:6]), image.crs, image.height, image.width, captured
    )


def revisit_crops(
    project: Project, *, max_pairs: int = 256, seed: int = 0, min_share: float = 0.5
) -> list[tuple[np.ndarray, np.ndarray]]:
    """The same ground on two dates: each tile with the other image's crop aligned to it.

    Parameters
    ----------
    project : Project
        An open project; images need georeferencing and a capture date
        (:func:`capture_dates`).
    max_pairs : int
        At most this many pairs (a seeded sample).
    seed : int
        Seeds the sample.
    min_share : float
        Least share of a tile the other image must cover.

    Returns
    -------
    list of (ndarray, ndarray)
        Pairs of (h, w, 3) uint8 crops on one pixel grid: the part of the tile the other
        image covers, and that image's pixels of the same ground.
    """
    store = project.store
    dates = capture_dates(project)
    images = store.images()
    prints = [f for f in (_footprint(im, dates.get(im.id)) for im in images) if f is not None]
    if sum(f.captured is not None for f in prints) < 2:
        return []
    by_id = {im.id: im for im in images}
    tiles = {im.id: [t.window for t in store.tiles(image_id=im.id)] for im in images}
    try:
        pairs = revisit_pairs(prints, tiles, min_share=min_share)
    except ValueError as exc:
        raise LabelerError(f"revisits: {exc}") from None
    if len(pairs) > max_pairs:
        pick = np.sort(np.random.default_rng(seed).choice(len(pairs), max_pairs, replace=False))
        pairs = [pairs[int(i)] for i in pick]
    footprint = {f.key: f for f in prints}
    out = []
    for p in pairs:
        a, b = footprint[p.image_a], footprint[p.image_b]
        with open_image(project.image_path(by_id[p.image_a])) as reader:
            crop_a = reader.read(p.window_a)
        with open_image(project.image_path(by_id[p.image_b])) as reader:
            crop_b = reader.read(p.window_b)
        mapping = pixel_mapping(a, b, near=p.window_a)
        out.append(
            (
                crop_a,
                align_revisit(crop_b, window_a=p.window_a, window_b=p.window_b, mapping=mapping),
            )
        )
    return out


def _minutes(seconds: float) -> str:
    return f"{seconds:.0f} s" if seconds < 120 else f"{seconds / 60:.1f} min"


def adapt(
    project: Project,
    *,
    minutes: float = 10.0,
    method: str = "dense",
    start: str | None = None,
    revisits: bool = True,
    max_steps: int | None = None,
    max_tiles: int = 512,
    batch_size: int = 8,
    view_size: int | None = None,
    checkpoint_minutes: float = 3.0,
    projector_steps: int = 10,
    seed: int = 0,
    progress: Progress = no_progress,
) -> AdaptOutcome:
    """Adapt the encoder to the project's tiles without labels; keep a new encoder version.

    Parameters
    ----------
    project : Project
        An open project.
    minutes : float
        Time budget of the whole run (reading, training and saving; resumed parts
        included).
    method : {"dense", "image"}
        Dense VICRegL-style consistency (suits segmentation) or image-level NT-Xent.
    start : str, optional
        The encoder version to start from (:func:`labeler.workflow.encoders.find_encoder_version`);
        default the newest (adapted, else ImageNet-1k).
    revisits : bool
        Use revisit pairs when the project has images of the same ground on other dates.
    max_steps : int, optional
        Step budget (for tests and quick trials).
    max_tiles : int
        At most this many tiles are read (a seeded sample).
    batch_size : int
        Positive pairs per step.
    view_size : int, optional
        View side in pixels, a multiple of 32 (default: from the tile size).
    checkpoint_minutes : float
        Minutes between checkpoints.
    projector_steps : int
        First steps in which only the projectors learn (the encoder held; see
        :class:`labeler.model.adapt.AdaptConfig`).
    seed : int
        Seeds the sample of tiles and the run.
    progress : Progress
        Called as ``progress(done, total, label)``: over the tiles read, then over the
        seconds of the budget with the step, the loss and the time left.

    Returns
    -------
    AdaptOutcome

    Raises
    ------
    LabelerError
        For an unknown method or start version, fewer than two tiles, a budget too short
        for one step, or a checkpoint made with other settings (the message says to
        delete it).
    KeyboardInterrupt
        After the last finished step was written to the checkpoint; the same command
        resumes.
    """
    from labeler.model.adapt import AdaptConfig, AdaptProgress, adapt_encoder
    from labeler.model.runtime import free_cores

    started = time.monotonic()
    if method not in ADAPT_METHODS:
        raise LabelerError(f"method: expected one of {ADAPT_METHODS}, got {method!r}")
    if not minutes > 0:
        raise LabelerError(f"minutes: expected a positive time budget, got {minutes}")
    if max_tiles < 2:
        raise LabelerError(f"max_tiles: expected at least 2, got {max_tiles}")
    images, tiles = _sample_tiles(project, max_tiles=max_tiles, seed=seed)
    if len(tiles) < 2:
        raise LabelerError(
            f"adapt needs at least 2 tiles (the others of a batch are the contrast), the "
            f"project has {len(tiles)}; add images first ('labeler add')"
        )
    encoder = load_encoder_version(project, start, trainable=True)
    pixels = _read_tiles(project, images, tiles, progress)
    pairs = revisit_crops(project, max_pairs=max(1, max_tiles // 2), seed=seed) if revisits else []
    try:
        config = AdaptConfig(
            method=method,
            batch_size=max(2, min(batch_size, len(pixels) + len(pairs))),
            view_size=view_size,
            revisit_share=0.25 if pairs else 0.0,
            projector_steps=projector_steps,
        )
    except ValueError as exc:
        raise LabelerError(str(exc)) from None
    budget = minutes * 60.0 - (time.monotonic() - started) - _RESERVE_S
    if budget <= 0:
        raise LabelerError(
            f"minutes: {minutes} min is used up by reading the tiles; give a longer budget"
        )
    ckpt = adapt_checkpoint_path(project, method=method, base_version=encoder.version)
    # model.threads 0 means the free cores, as for encoding: all of torch's threads on a
    # busy machine wait for each other at every operation of every step
    threads = project.settings.model.threads or free_cores()

    def report(p: AdaptProgress) -> None:
        total = p.elapsed + p.remaining
        label = f"step {p.step}, loss {p.loss:.3f}, {_minutes(p.remaining)} left"
        progress(int(p.elapsed), max(1, int(math.ceil(total))), label)

    try:
        result = adapt_encoder(
            encoder,
            pixels,
            revisits=pairs,
            config=config,
            seconds=budget,
            max_steps=max_steps,
            checkpoint=ckpt,
            checkpoint_every=max(0.0, checkpoint_minutes * 60.0),
            progress=report,
            seed=seed,
            threads=threads,
        )
    except ValueError as exc:
        raise LabelerError(str(exc)) from None
    if result.steps == 0:
        raise LabelerError(
            f"minutes: {minutes} min was too short for one training step; give a longer budget"
        )
    if result.steps <= projector_steps:
        raise LabelerError(
            f"minutes: the run made {result.steps} steps, all of them among the first "
            f"{projector_steps} in which only the projectors learn, so the encoder did not "
            "change and no version was kept; run the same command with a longer budget (it "
            "resumes from the checkpoint)"
        )
    k = max(1, min(20, len(result.losses) // 10))
    first, last = float(np.mean(result.losses[:k])), float(np.mean(result.losses[-k:]))
    record = save_encoder_version(
        project,
        result.encoder_state,
        base_version=encoder.version,
        root_version=encoder.version,
        details={
            "method": method,
            "steps": result.steps,
            "seconds": round(result.seconds, 1),
            "budget_minutes": float(minutes),
            "stopped": result.stopped,
            "tiles": len(pixels),
            "revisit_pairs": len(pairs),
            "first_loss": round(first, 5),
            "last_loss": round(last, 5),
            "resumed_from": result.resumed_from,
            "seed": seed,
        },
    )
    remove_file(ckpt)  # the run is kept as a version; a new run starts afresh
    progress(1, 1, "done")
    return AdaptOutcome(
        encoder=record,
        base_version=encoder.version,
        method=method,
        tiles=len(pixels),
        revisit_pairs=len(pairs),
        steps=result.steps,
        resumed_from=result.resumed_from,
        seconds=result.seconds,
        stopped=result.stopped,
        first_loss=first,
        last_loss=last,
        losses=list(result.losses),
    )
