"""Proposals (``labeler propose``).

``propose`` uses the newest trained head, or the vegetation-index cold start when no head
exists yet; only tiles whose newest proposal comes from another model version are
proposed again. Encoder features are cached per tile under ``<project>/cache/features``
(:mod:`labeler.workflow.features`). The tiles' pixels go to the model room too: the head
refines each stride-4 proposal to full resolution with them (the uncertainty maps stay on
the stride-4 grid). Training the head is :mod:`labeler.workflow.retraining`.
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from labeler.errors import InputError
from labeler.imagery.read import open_image
from labeler.imagery.tiling import Window
from labeler.masks.coldstart import cold_start_proposal, detect_image_rows
from labeler.metrics import class_fractions
from labeler.project import Project
from labeler.settings import Settings
from labeler.states import HELD, SAVED_STATES
from labeler.store import NewProposal
from labeler.store.records import ImageRecord, ModelVersionRecord, TileRecord
from labeler.workflow.features import (
    encoder_and_cache,
    head_encoder,
    head_features,
    load_head,
    tile_features,
)
from labeler.workflow.progress import Progress, no_progress

__all__ = ["ROW_BLOCK_PX", "ProposeResult", "propose"]

#: Tiles are proposed in blocks of up to this many pixels a side (by their top-left
#: corner; a block reaches one tile further), and crop rows are found per block. 2048 px
#: show at least 13 rows at a 150 px spacing, and keep the row search (about 45 bytes
#: per pixel) and the block's pixels and features within a few hundred MB.
ROW_BLOCK_PX = 2048


@dataclass(frozen=True)
class ProposeResult:
    """What ``labeler propose`` did."""

    model_version: ModelVersionRecord
    mode: str  # "cold_start" or "head"
    proposed: int
    up_to_date: int
    cache_hits: int = 0
    cache_misses: int = 0
    left_alone: int = 0  # with only_open: tiles with a saved mask or held, not proposed


def _cold_start_name(project: Project) -> str:
    cs = project.settings.cold_start
    return f"cold-start exg-exr {cs.exr_coefficient:g} {cs.threshold} min{cs.min_object_px}"


def _cold_start_version(project: Project) -> ModelVersionRecord | None:
    """The stored cold-start version of the current settings, or None if never used."""
    name = _cold_start_name(project)
    for mv in reversed(project.store.model_versions()):
        if mv.kind == "cold_start" and mv.name == name:
            return mv
    return None


def _new_cold_start_version(project: Project) -> ModelVersionRecord:
    cs = project.settings.cold_start
    return project.store.add_model_version(
        kind="cold_start",
        name=_cold_start_name(project),
        details={
            "exr_coefficient": cs.exr_coefficient,
            "threshold": cs.threshold,
            "min_object_px": cs.min_object_px,
        },
    )


def _check_image_files(project: Project, images: Sequence[ImageRecord]) -> None:
    """Every image file to read is there (and an in-place one unchanged), before any work."""
    for im in images:
        path = project.image_path(im)  # checks an in-place image's content
        if not path.is_file():
            raise InputError(
                f"{path}: the file of image {im.name!r} is missing from the project; put it "
                "back (from a backup or the original) and run 'labeler propose' again; "
                "nothing was proposed"
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


def _block_proposals(
    rgb: np.ndarray,
    block: Window,
    members: Sequence[TileRecord],
    feats: list,
    *,
    head,
    tail=None,
    settings: Settings,
    dropout_weights: dict | None = None,
) -> list[NewProposal]:
    """Proposals of the tiles of one block.

    Parameters
    ----------
    rgb : ndarray, shape (block.height, block.width, 3), uint8
        The block's pixels.
    block : Window
        The block in the image; holds every member tile.
    members : sequence of TileRecord
        The block's tiles to propose.
    feats : list
        Their encoder features, in order (:func:`labeler.workflow.features.tile_features`).
    head : labeler.model.head.ProposalHead or None
        The trained head, or None for the vegetation-index cold start.
    tail : labeler.model.tail.EncoderTail or None
        The encoder stages fine-tuned with the head (:func:`load_head`), or None.
    settings : Settings
        The project's settings (cold start, model, classes).
    dropout_weights : dict, optional
        Kept across the blocks of one run (``propose_tiles``'s ``dropout_weights``).

    Returns
    -------
    list of NewProposal
        One per member, in order.
    """
    schema = settings.classes
    items: list[NewProposal] = []
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
        from labeler.model.encoder import resolve_precision
        from labeler.model.predict import propose_tiles

        pixels = [_part(rgb, block, t.window) for t in members]
        props = propose_tiles(
            head,
            head_features(tail, feats),
            tile_shapes=[t.shape for t in members],
            mc_samples=settings.model.mc_samples,
            seed=settings.model.seed,
            images=pixels,
            dropout_weights=dropout_weights,
            precision=resolve_precision(settings.model.precision),
        )
        for t, p, f in zip(members, props, feats, strict=True):
            items.append(
                NewProposal(
                    tile_id=t.id,
                    mask=p.mask,
                    uncertainty=p.uncertainty,
                    # the installed encoder's pooled features, comparable across heads
                    embedding=p.embedding
                    if tail is None
                    else np.asarray(f[3], np.float32).mean(axis=(1, 2)),
                    mean_entropy=p.mean_entropy,
                    mean_margin=p.mean_margin,
                    mean_least_confidence=p.mean_least_confidence,
                    mean_bald=p.mean_bald,
                    class_fractions=class_fractions(p.mask, schema.indices).tolist(),
                )
            )
    return items


class _BlockWriter:
    """Writes each block's proposals to the store in a thread of its own.

    The next block is read, encoded and proposed while the last one is written (PNG
    encoding of the masks, the transaction): at most one block waits, so memory stays
    one block's worth. A block's proposals are still stored in one transaction, in
    block order; an error of a write is raised at the next :meth:`submit` or on leaving
    the ``with`` block, and leaving it always waits for the write under way, so an
    interrupted run keeps every block it finished.
    """

    def __init__(self, store, *, only_open: bool, progress: Progress, total: int) -> None:
        self._store = store
        self._only_open = only_open
        self._progress = progress
        self._total = total
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="labeler-proposals")
        self._pending: tuple[Future, int, str] | None = None
        self.proposed = 0
        self.left_alone = 0
        self.done = 0

    def submit(self, model_version_id: int, items: list[NewProposal], *, label: str) -> None:
        """Write ``items`` once the block before is written."""
        self.wait()
        future = self._pool.submit(
            self._store.add_proposals, model_version_id, items, only_open=self._only_open
        )
        self._pending = (future, len(items), label)

    def wait(self) -> None:
        """Wait for the write under way (raising its error) and count it."""
        if self._pending is None:
            return
        future, n, label = self._pending
        self._pending = None
        written = future.result()
        self.proposed += len(written)
        self.left_alone += n - len(written)
        self.done += n
        self._progress(self.done, self._total, label)

    def __enter__(self) -> _BlockWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        try:
            if exc_type is None:
                self.wait()
        finally:
            self._pool.shutdown(wait=True)


def propose(
    project: Project,
    *,
    progress: Progress = no_progress,
    only_open: bool = False,
    cluster: str | None = None,
    overlap: bool | None = None,
) -> ProposeResult:
    """Propose masks for every tile whose proposal is older than the newest model.

    Tiles are proposed block by block (:data:`ROW_BLOCK_PX`): only one block's pixels,
    features and proposals are held at a time (and the proposals of the block before,
    being written), and each block's proposals are stored in one transaction in a
    writing thread while the next block is computed, so an interrupted run keeps the
    blocks it finished. Unseen tiles become ``proposed``.

    Parameters
    ----------
    project : Project
        An open project.
    progress : Progress
        Called as ``progress(done, total, label)`` over the tiles to propose.
    only_open : bool
        Renew only the tiles without a saved full mask that nobody holds (checked again
        when each block's proposals are written, so a tile opened meanwhile is left
        alone); the others keep their proposals and count as ``left_alone``.
    cluster : str, optional
        Address of a Dask scheduler: the same work is done by its workers
        (:func:`labeler.workflow.cluster.propose_on_cluster`); None works here.
    overlap : bool, optional
        Read and encode the next block in a thread of its own while the head proposes
        this one. None (the default): when torch runs fewer threads than this process
        has cores (:func:`labeler.model.encoder.stages_can_overlap`), so the two stages
        each get a core; the proposals are the same either way. Background renewal
        passes False to leave its spare core to the queue and the editor.

    Returns
    -------
    ProposeResult
        The model version used, how many tiles were proposed or already up to date,
        and the feature cache's hits and misses.

    Raises
    ------
    LabelerError
        If the newest head was trained on another encoder version (retrain it) or its
        checkpoint is missing or unreadable.
    """
    if cluster:  # the cluster path; Dask is imported there only
        from labeler.workflow.cluster import propose_on_cluster

        return propose_on_cluster(project, address=cluster, progress=progress)
    store = project.store
    settings = project.settings
    head_mv = store.latest_model_version(kind="head")
    # a head reads the encoder version it was trained on; the cold start the newest one
    encoder, cache = encoder_and_cache(
        project,
        encoder=None if head_mv is None else head_encoder(head_mv),
        unknown_is_default=True,  # load_head then names the head's own problem
        precision=settings.model.precision,
    )
    head = tail = None
    if head_mv is not None:
        head, tail = load_head(project, head_mv, encoder)  # with its tuned encoder stages
        mv = head_mv
    else:
        mv = _cold_start_version(project)  # made when its first proposals are stored
    mv_id = None if mv is None else mv.id
    latest = store.latest_proposal_versions()  # {tile id: model version id}, no masks
    images = store.images()
    todo = {}
    up_to_date = 0
    left_alone = 0
    for im in images:
        all_tiles = store.tiles(image_id=im.id)
        tiles = [t for t in all_tiles if latest.get(t.id) is None or latest[t.id] != mv_id]
        up_to_date += len(all_tiles) - len(tiles)
        if only_open:
            open_tiles = [
                t for t in tiles if t.state not in (HELD, *SAVED_STATES) and t.held_by is None
            ]
            left_alone += len(tiles) - len(open_tiles)
            tiles = open_tiles
        if tiles:
            todo[im.id] = tiles
    _check_image_files(project, [im for im in images if im.id in todo])
    total = sum(len(v) for v in todo.values())
    jobs = [
        (im, block, members)
        for im in images
        if todo.get(im.id)
        for block, members in _blocks(todo[im.id], im)
    ]
    if overlap is None:
        from labeler.model.encoder import stages_can_overlap

        overlap = stages_can_overlap()
    started = 0  # tiles whose proposals are made (written or being written)
    dropout_weights: dict = {}  # the head's MC-dropout weights per grid size, made once

    def prepare(job, report=None) -> tuple[np.ndarray, list]:
        """Read a block's pixels and its tiles' features (from the cache or encoded)."""
        im, block, members = job
        with open_image(project.image_path(im)) as reader:
            if reader.info.shape != im.shape:
                raise InputError(
                    f"{project.image_path(im)}: size {reader.info.shape} differs from the "
                    f"stored {im.shape}; the image file was changed after it was added"
                )
            rgb = reader.read(block)  # once: the tiles are cut from it
            feats = tile_features(
                cache, encoder, reader, im, members, progress=report, block=(rgb, block)
            )
        return rgb, feats

    with (
        _BlockWriter(store, only_open=only_open, progress=progress, total=total) as writer,
        ThreadPoolExecutor(max_workers=1, thread_name_prefix="labeler-encode") as ahead_pool,
    ):
        ahead: Future | None = None
        for k, job in enumerate(jobs):
            im, block, members = job
            if overlap:  # this block was encoded meanwhile; start encoding the next one
                current = ahead if ahead is not None else ahead_pool.submit(prepare, job)
                rgb, feats = current.result()
                ahead = ahead_pool.submit(prepare, jobs[k + 1]) if k + 1 < len(jobs) else None
            else:
                rgb, feats = prepare(
                    job,
                    lambda d, t, base=started, name=im.name: progress(
                        base + d, total, f"{name}: encoding"
                    ),
                )
            items = _block_proposals(
                rgb,
                block,
                members,
                feats,
                head=head,
                tail=tail,
                settings=settings,
                dropout_weights=dropout_weights,
            )
            del rgb
            del feats  # one block's features at a time (and the next one's, overlapping)
            if mv is None:
                mv = _new_cold_start_version(project)
            writer.submit(mv.id, items, label=f"{im.name}: proposed")
            started += len(members)
    proposed, left_alone = writer.proposed, left_alone + writer.left_alone
    progress(total, total, "done")
    if mv is None:  # nothing to propose and the cold start never used: name it anyway
        mv = _new_cold_start_version(project)
    return ProposeResult(
        model_version=mv,
        mode="cold_start" if head is None else "head",
        proposed=proposed,
        up_to_date=up_to_date,
        cache_hits=cache.hits,
        cache_misses=cache.misses,
        left_alone=left_alone,
    )
