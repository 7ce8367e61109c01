"""Proposals and retraining (``labeler propose``, ``labeler retrain``).

``propose`` uses the newest trained head, or the vegetation-index cold start when no head
exists yet; only tiles whose newest proposal comes from another model version are
proposed again. Encoder features are cached per tile under ``<project>/cache/features``.
``retrain`` trains a new head on every saved full mask (accepted, amended, settled,
imported) and every scribble, and records it as a model version with its per-class
validation IoU. Both pass the tiles' pixels to the model room: the head learns a
full-resolution refinement of its stride-4 proposals from them, and proposing uses them
to refine each mask (the uncertainty maps stay on the stride-4 grid). The ``model.augment``
setting chooses how training augments (``labeler.model.train``): by default the tiles
themselves go through the encoder each epoch while there are at most 24 labelled tiles,
and the cached features are turned beyond that.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from labeler.classes import UNLABELLED
from labeler.errors import InputError, LabelerError
from labeler.imagery.read import ImageReader, open_image
from labeler.imagery.tiling import Window
from labeler.masks.coldstart import cold_start_proposal, detect_image_rows
from labeler.metrics import class_fractions
from labeler.project import Project
from labeler.states import CONTESTED, SETTLED
from labeler.store import NewProposal
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord
from labeler.workflow.adding import Progress, _no_progress

__all__ = [
    "ROW_BLOCK_PX",
    "tile_key",
    "ProposeResult",
    "propose",
    "labelled_tiles",
    "RetrainResult",
    "retrain",
]

#: Crop rows are found on blocks of up to this many pixels a side (whole image if smaller).
ROW_BLOCK_PX = 4096


def tile_key(image: ImageRecord, tile: TileRecord) -> str:
    """Feature-cache key of a tile: image content hash and window."""
    return f"{image.sha256}:{tile.row}:{tile.col}:{tile.height}:{tile.width}"


@dataclass(frozen=True)
class ProposeResult:
    """What ``labeler propose`` did."""

    model_version: ModelVersionRecord
    mode: str  # "cold_start" or "head"
    proposed: int
    up_to_date: int
    cache_hits: int = 0
    cache_misses: int = 0


def _encoder_and_cache(project: Project):
    from labeler.model.cache import FeatureCache
    from labeler.model.encoder import load_encoder
    from labeler.model.runtime import configure_threads

    configure_threads(project.settings.model.threads)
    encoder = load_encoder()
    cache = FeatureCache(project.cache_dir / "features", encoder_version=encoder.version)
    return encoder, cache


def _features(
    cache,
    encoder,
    reader: ImageReader,
    image: ImageRecord,
    tiles: Sequence[TileRecord],
    progress=None,
):
    keys = [tile_key(image, t) for t in tiles]
    windows = {k: t.window for k, t in zip(keys, tiles, strict=True)}
    return cache.get_or_compute(
        keys,
        lambda ks: [reader.read(windows[k]) for k in ks],
        encoder,
        tile_shapes=[t.shape for t in tiles],
        progress=progress,
    )


def _cold_start_version(project: Project) -> ModelVersionRecord:
    cs = project.settings.cold_start
    name = f"cold-start exg-exr {cs.exr_coefficient:g} {cs.threshold} min{cs.min_object_px}"
    for mv in reversed(project.store.model_versions()):
        if mv.kind == "cold_start" and mv.name == name:
            return mv
    return project.store.add_model_version(
        kind="cold_start",
        name=name,
        details={
            "exr_coefficient": cs.exr_coefficient,
            "threshold": cs.threshold,
            "min_object_px": cs.min_object_px,
        },
    )


def _blocks(
    tiles: Sequence[TileRecord], image: ImageRecord
) -> list[tuple[Window, list[TileRecord]]]:
    """Group tiles into blocks of at most ROW_BLOCK_PX (by top-left), each with its union window."""
    groups: dict[tuple[int, int], list[TileRecord]] = {}
    for t in tiles:
        groups.setdefault((t.row // ROW_BLOCK_PX, t.col // ROW_BLOCK_PX), []).append(t)
    out = []
    for members in groups.values():
        r0 = min(t.row for t in members)
        c0 = min(t.col for t in members)
        r1 = max(t.row + t.height for t in members)
        c1 = max(t.col + t.width for t in members)
        out.append((Window(r0, c0, r1 - r0, c1 - c0), members))
    return out


def _part(rgb: np.ndarray, block: Window, w: Window) -> np.ndarray:
    """The pixels of window ``w`` from ``rgb``, the pixels of ``block`` (which holds ``w``)."""
    return rgb[
        w.row - block.row : w.row - block.row + w.height,
        w.col - block.col : w.col - block.col + w.width,
    ]


def propose(project: Project, *, progress: Progress = _no_progress) -> ProposeResult:
    """Propose masks for every tile whose proposal is older than the newest model.

    Each image's proposals are stored in one transaction as soon as they are made, so
    an interrupted run keeps what it finished. Unseen tiles become ``proposed``.

    Raises
    ------
    LabelerError
        If the newest head was trained on another encoder version (retrain it) or its
        checkpoint is missing or unreadable.
    """
    store = project.store
    settings = project.settings
    schema = settings.classes
    head_mv = store.latest_model_version(kind="head")
    encoder, cache = _encoder_and_cache(project)
    head = None
    if head_mv is not None:
        from labeler.model.checkpoint import load_checkpoint

        path = project.resolve(head_mv.checkpoint or "", what=f"checkpoint of model {head_mv.name}")
        try:
            head, meta = load_checkpoint(path)
        except (OSError, ValueError, RuntimeError) as exc:
            raise LabelerError(
                f"{path}: cannot load the model {head_mv.name} ({exc}); run 'labeler retrain'"
            ) from None
        if meta.encoder_version != encoder.version:
            raise LabelerError(
                f"model {head_mv.name} was trained on encoder {meta.encoder_version}, the installed encoder "
                f"is {encoder.version}; run 'labeler retrain'"
            )
        mv = head_mv
    else:
        mv = _cold_start_version(project)
    latest = store.latest_proposals()
    images = store.images()
    todo = {}
    up_to_date = 0
    for im in images:
        tiles = [
            t
            for t in store.tiles(image_id=im.id)
            if latest.get(t.id) is None or latest[t.id].model_version_id != mv.id
        ]
        up_to_date += len(store.tiles(image_id=im.id)) - len(tiles)
        if tiles:
            todo[im.id] = tiles
    total = sum(len(v) for v in todo.values())
    done = 0
    proposed = 0
    for im in images:
        tiles = todo.get(im.id)
        if not tiles:
            continue
        items: list[NewProposal] = []
        with open_image(project.image_path(im)) as reader:
            if reader.info.shape != im.shape:
                raise InputError(
                    f"{project.image_path(im)}: size {reader.info.shape} differs from the "
                    f"stored {im.shape}; the image file was changed after it was added"
                )
            for block, members in _blocks(tiles, im):
                feats = _features(
                    cache,
                    encoder,
                    reader,
                    im,
                    members,
                    progress=lambda d, t, base=done, name=im.name: progress(
                        base + d, total, f"{name}: encoding"
                    ),
                )
                rgb = reader.read(block)
                if head is None:
                    rows = detect_image_rows(rgb, settings=settings.cold_start)
                    for t, f in zip(members, feats, strict=True):
                        w = t.window
                        part = _part(rgb, block, w)
                        mask = cold_start_proposal(
                            part,
                            settings=settings.cold_start,
                            rows=rows,
                            origin=(w.row - block.row, w.col - block.col),
                        )
                        emb = np.asarray(f[3], np.float32).mean(axis=(1, 2))
                        items.append(
                            NewProposal(
                                tile_id=t.id,
                                mask=mask,
                                embedding=emb,
                                class_fractions=class_fractions(mask, schema.indices).tolist(),
                            )
                        )
                else:
                    from labeler.model.predict import propose_tiles

                    pixels = [_part(rgb, block, t.window) for t in members]
                    props = propose_tiles(
                        head,
                        feats,
                        tile_shapes=[t.shape for t in members],
                        mc_samples=settings.model.mc_samples,
                        seed=settings.model.seed,
                        images=pixels,
                    )
                    for t, p in zip(members, props, strict=True):
                        items.append(
                            NewProposal(
                                tile_id=t.id,
                                mask=p.mask,
                                uncertainty=p.uncertainty,
                                embedding=p.embedding,
                                mean_entropy=p.mean_entropy,
                                mean_margin=p.mean_margin,
                                mean_least_confidence=p.mean_least_confidence,
                                mean_bald=p.mean_bald,
                                class_fractions=class_fractions(p.mask, schema.indices).tolist(),
                            )
                        )
                done += len(members)
                progress(done, total, f"{im.name}: proposed")
        store.add_proposals(mv.id, items)
        proposed += len(items)
    progress(total, total, "done")
    return ProposeResult(
        model_version=mv,
        mode="cold_start" if head is None else "head",
        proposed=proposed,
        up_to_date=up_to_date,
        cache_hits=cache.hits,
        cache_misses=cache.misses,
    )


@dataclass(frozen=True)
class LabelledTile:
    """A tile with the mask training uses."""

    tile: TileRecord
    image: ImageRecord
    mask: np.ndarray  # (H, W) uint8, 255 unlabelled
    kind: str  # "full" or "scribble"


def labelled_tiles(project: Project) -> list[LabelledTile]:
    """Every tile with a saved mask training may use.

    A tile's newest full mask (accepted, amended, settled or imported) is used; on a
    contested tile only a reviewer's settled mask counts (the annotators' masks are in
    dispute). Tiles without a full mask use their newest scribbles (weak labels).
    """
    store = project.store
    images = {im.id: im for im in store.images()}
    out = []
    newest_full: dict[int, object] = {}
    newest_weak: dict[int, object] = {}
    for a in store.annotations(kind=None):  # oldest first: later rows win
        (newest_full if a.kind == "full" else newest_weak)[a.tile_id] = a
    for t in store.tiles():
        ann = newest_full.get(t.id)
        if t.state == CONTESTED:
            ann = None
        if t.state == SETTLED:
            settled = [
                a for a in store.annotation_history(t.id) if a.state == SETTLED and a.kind == "full"
            ]
            ann = settled[-1] if settled else ann
        kind = "full"
        if ann is None:
            ann = newest_weak.get(t.id)
            kind = "scribble"
        if ann is None:
            continue
        mask = ann.mask()
        if (mask == UNLABELLED).all():
            continue
        out.append(LabelledTile(tile=t, image=images[t.image_id], mask=mask, kind=kind))
    return out


@dataclass(frozen=True)
class RetrainResult:
    """What ``labeler retrain`` did."""

    model_version: ModelVersionRecord
    n_full: int
    n_scribble: int
    n_train: int
    n_val: int
    best_epoch: int
    mode: str
    history: list[dict] = field(default_factory=list)


def retrain(project: Project, *, progress: Progress = _no_progress) -> RetrainResult:
    """Train a new head on every saved mask and record it as a model version.

    Raises
    ------
    LabelerError
        When there are fewer labelled tiles than the ``model.min_labelled_tiles``
        setting (the message says how many more are needed).
    """
    from labeler.model.checkpoint import save_checkpoint
    from labeler.model.train import train_head

    settings = project.settings
    schema = settings.classes
    items = labelled_tiles(project)
    need = settings.model.min_labelled_tiles
    if len(items) < need:
        raise LabelerError(
            f"retrain needs at least {need} labelled tiles (the model.min_labelled_tiles setting), found "
            f"{len(items)}; accept or correct {need - len(items)} more tiles first"
        )
    encoder, cache = _encoder_and_cache(project)
    feats: list = [None] * len(items)
    pixels: list = [None] * len(items)
    by_image: dict[int, list[int]] = {}
    for i, it in enumerate(items):
        by_image.setdefault(it.image.id, []).append(i)
    done = 0
    for idx in by_image.values():
        image = items[idx[0]].image
        with open_image(project.image_path(image)) as reader:
            got = _features(cache, encoder, reader, image, [items[i].tile for i in idx])
            for i in idx:
                pixels[i] = reader.read(items[i].tile.window)
        for i, f in zip(idx, got, strict=True):
            feats[i] = f
        done += len(idx)
        progress(done, len(items), "encoding labelled tiles")
    n_epochs = settings.model.epochs

    def on_epoch(epoch: int, total: int, metrics: dict) -> None:
        miou = metrics.get("val_miou")
        label = f"epoch {epoch}/{total}" + (
            "" if miou is None or math.isnan(miou) else f", val mIoU {miou:.3f}"
        )
        progress(epoch, total, label)

    try:
        result = train_head(
            [it.mask for it in items],
            class_indices=schema.indices,
            features=feats,
            images=pixels,
            encoder=encoder,
            settings=settings.model,
            mode=settings.model.augment,
            progress=on_epoch,
        )
    except InputError as exc:
        raise LabelerError(str(exc)) from None
    store = project.store
    n = len([m for m in store.model_versions() if m.kind == "head"]) + 1
    name = f"head-{n}"
    ckpt = project.models_dir / f"{name}.pt"
    val = {
        c.name: (None if math.isnan(v) else float(v))
        for c, v in zip(schema.classes, result.val_iou, strict=True)
    }
    finite = [v for v in val.values() if v is not None]
    miou = float(np.mean(finite)) if finite else None
    save_checkpoint(
        ckpt,
        result.head,
        encoder_version=encoder.version,
        val_iou=result.val_iou,
        extra={"name": name, "n_train": result.n_train, "n_val": result.n_val},
    )
    mv = store.add_model_version(
        kind="head",
        name=name,
        encoder_version=encoder.version,
        checkpoint=str(ckpt.relative_to(project.root)),
        n_train_tiles=result.n_train,
        val_iou=val,
        miou=miou,
        details={
            "best_epoch": result.best_epoch,
            "mode": result.mode,
            "n_val": result.n_val,
            "full_tiles": sum(it.kind == "full" for it in items),
            "scribble_tiles": sum(it.kind == "scribble" for it in items),
            "epochs_max": n_epochs,
            "refine_channels": result.head.config.refine_channels,
        },
    )
    return RetrainResult(
        model_version=mv,
        n_full=sum(it.kind == "full" for it in items),
        n_scribble=sum(it.kind == "scribble" for it in items),
        n_train=result.n_train,
        n_val=result.n_val,
        best_epoch=result.best_epoch,
        mode=result.mode,
        history=list(result.history),
    )
