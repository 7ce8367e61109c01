"""Proposals on a Dask cluster (``labeler propose --cluster ADDRESS``).

The only module that imports Dask (``dask.distributed``), and only when a function here
is called with a cluster address: without ``--cluster`` (or the ``cluster.address``
setting) Dask is never imported. The work is the local ``propose``'s, cut the same way:
the tiles to propose are grouped into blocks (:data:`labeler.workflow.proposing.ROW_BLOCK_PX`),
each block is one :class:`~labeler.workflow.chunks.ProposeChunk` sent to the workers of
an existing ``dask.distributed`` scheduler, and :func:`~labeler.workflow.chunks.propose_chunk`
makes the same proposals there as here.

What goes over the network: to a worker, per chunk, the image's path and record, the
tiles' windows, the settings, the head checkpoint's path and the encoder version (a few
KB); once per worker, when the head reads an adapted encoder version (``labeler adapt``;
the cold start reads the newest), that version's weights file (about 19 MB, scattered
to every worker before the chunks; the worker checks the weights against the version's
digest and loads them once); back, per tile, the mask as PNG bytes, the float16
uncertainty maps (3 x 64 x 64 for a 256-pixel tile, 24 KB), the 320-float embedding and
the tile's scalars. Pixels and features never travel: each worker reads the image
windows from the shared image root and keeps its own feature cache
(``cluster.worker_cache``, keyed by encoder version). Heads with fine-tuned encoder
stages (``model.finetune_stages``) are proposed on this machine only.

This machine alone writes to the store: the results are written in batches as they
arrive (one transaction per :data:`WRITE_BATCH_TILES` tiles or :data:`WRITE_BATCH_SECONDS`),
so an interrupted run keeps what was written and a rerun proposes only the rest. A worker that dies loses only its
running chunk, which the scheduler gives to another worker.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Callable
from dataclasses import replace
from types import ModuleType

from labeler.errors import LabelerError
from labeler.project import Project
from labeler.store.records import ModelVersionRecord
from labeler.workflow.chunks import ChunkResult, ProposeChunk, new_proposals, propose_chunk
from labeler.workflow.progress import Progress, no_progress
from labeler.workflow.proposing import (
    ProposeResult,
    _blocks,
    _check_image_files,
    _cold_start_version,
    _new_cold_start_version,
)

__all__ = ["connect", "propose_on_cluster", "embed_on_cluster", "run_propose_chunk"]

#: Finished tiles are written to the store in one transaction once this many wait...
WRITE_BATCH_TILES = 2048
#: ... or once the first of them has waited this many seconds.
WRITE_BATCH_SECONDS = 10.0

#: What a user runs to get the cluster extra.
INSTALL_HINT = "pip install 'labeler[cluster]'"


def _distributed() -> ModuleType:
    """``dask.distributed``, imported on first use."""
    try:
        import distributed
    except ImportError:
        raise LabelerError(
            f"--cluster needs Dask, which is not installed; run {INSTALL_HINT} here and on "
            "every worker, or leave out --cluster to work on this machine"
        ) from None
    return distributed


def connect(address: str, *, timeout: float):
    """A client of the Dask scheduler at ``address``.

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://10.0.0.5:8786`` (``--cluster`` or the
        ``cluster.address`` setting).
    timeout : float
        Seconds to wait for the scheduler to answer.

    Returns
    -------
    distributed.Client
        Not made the default client; close it when done.

    Raises
    ------
    LabelerError
        If no scheduler answers at ``address`` within ``timeout`` seconds, or the address
        is malformed.
    """
    distributed = _distributed()
    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, location = parse_address(address)
        host, port = parse_host_port(location, 8786) if scheme == "tcp" else ("", 0)
        if scheme == "tcp" and not (host and 0 < port < 65536):
            raise ValueError(address)
    except ValueError:
        raise LabelerError(
            f"cluster {address!r}: not a scheduler address; expected tcp://HOST:PORT such as "
            "tcp://10.0.0.5:8786 (--cluster or the cluster.address setting)"
        ) from None
    unreachable = LabelerError(
        f"cluster {address!r}: no Dask scheduler answered within {timeout:g} s; start one "
        "with 'dask scheduler' and workers with 'dask worker ADDRESS', check the address "
        "(--cluster or cluster.address), or leave out --cluster to work on this machine"
    )
    if scheme == "tcp":  # fail fast, before Dask's own retries, when nothing listens
        try:
            socket.create_connection((host, port), timeout=timeout).close()
        except OSError:
            raise unreachable from None
    try:
        return distributed.Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError):
        raise unreachable from None


def run_propose_chunk(chunk: ProposeChunk, *, encoder_weights: bytes | None = None) -> ChunkResult:
    """The task a worker runs: :func:`~labeler.workflow.chunks.propose_chunk`.

    With ``threads`` 0 (``cluster.worker_threads`` unset) the worker machine's cores are
    shared among the worker's task threads, so concurrent chunks do not oversubscribe it.

    Parameters
    ----------
    chunk : ProposeChunk
    encoder_weights : bytes, optional
        The adapted encoder's weights file (sent once to every worker), or None.

    Returns
    -------
    ChunkResult
    """
    if chunk.threads == 0:
        from labeler.model.runtime import available_cores

        try:
            per_task = _distributed().get_worker().state.nthreads
        except ValueError:  # not on a worker
            per_task = 1
        chunk = replace(chunk, threads=max(1, available_cores() // max(1, per_task)))
    return propose_chunk(chunk, encoder_weights=encoder_weights)


def _encoder_weights(project: Project, record: ModelVersionRecord) -> bytes:
    """The weights file of an adapted encoder version, as bytes for the workers."""
    path = project.resolve(record.checkpoint or "", what=f"weights of encoder {record.name}")
    try:
        return path.read_bytes()
    except OSError as exc:
        raise LabelerError(f"{path}: cannot read the weights of encoder {record.name} ({exc})") from None


def _head_and_version(
    project: Project,
) -> tuple[ModelVersionRecord | None, str | None, str, bytes | None]:
    """The newest head (version, checkpoint path), its encoder version and, for an
    adapted encoder version, that version's weights (sent to the workers).

    The encoder is the one the local ``propose`` reads: the head's own, or for the cold
    start the newest. The same checks as the local ``propose``: the checkpoint loads and
    was trained on that encoder version. Heads with fine-tuned encoder stages
    (``model.finetune_stages``) are refused: their tuned stages are not sent.
    """
    from labeler.model.encoder import encoder_version
    from labeler.workflow.encoders import find_encoder_version
    from labeler.workflow.features import head_encoder, read_checkpoint

    head_mv = project.store.latest_model_version(kind="head")
    try:
        record = find_encoder_version(project, None if head_mv is None else head_encoder(head_mv))
    except LabelerError:
        if head_mv is None:
            raise
        record = None  # a head of an unknown encoder: the check below names it
    weights = None if record is None else _encoder_weights(project, record)
    # the workers load the encoder, this machine need not
    version = encoder_version() if record is None else record.encoder_version
    if head_mv is None:
        return None, None, version, weights
    _, meta, path = read_checkpoint(project, head_mv)
    if meta.encoder_tail:
        raise LabelerError(
            f"model {head_mv.name} carries fine-tuned encoder stages (model.finetune_stages), "
            "which the cluster path does not send to the workers; propose on this machine "
            "(leave out --cluster), or retrain with model.finetune_stages = 0"
        )
    if meta.encoder_version != version:
        raise LabelerError(
            f"model {head_mv.name} was trained on encoder {meta.encoder_version}, the project's "
            f"encoder for it is {version}; run 'labeler retrain'"
        )
    return head_mv, str(path.resolve()), version, weights


def _chunks(
    project: Project,
    *,
    head_path: str | None,
    mv_id: int | None,
    encoder_version: str,
    missing_only: bool = False,
):
    """The chunks still to propose, and how many tiles are already up to date.

    A tile is to propose when its newest proposal is of another model version, or (with
    ``missing_only``) when it has no proposal with an embedding.
    """
    store = project.store
    cs = project.settings.cluster
    latest = store.latest_proposals()
    images = store.images()
    todo = {}
    up_to_date = 0
    for im in images:
        all_tiles = store.tiles(image_id=im.id)
        tiles = [
            t
            for t in all_tiles
            if latest.get(t.id) is None
            or (
                latest[t.id].embedding_npy is None
                if missing_only
                else latest[t.id].model_version_id != mv_id
            )
        ]
        up_to_date += len(all_tiles) - len(tiles)
        if tiles:
            todo[im.id] = tiles
    _check_image_files(project, [im for im in images if im.id in todo])
    chunks = []
    for im in images:
        if im.id not in todo:
            continue
        path = str(project.image_path(im).resolve())
        for block, members in _blocks(todo[im.id], im):
            chunks.append(
                ProposeChunk(
                    image=im,
                    image_path=path,
                    block=block,
                    tiles=tuple(members),
                    settings=project.settings,
                    head_path=head_path,
                    encoder_version=encoder_version,
                    cache_folder=cs.worker_cache,
                    threads=cs.worker_threads,
                )
            )
    return chunks, up_to_date


class _Batches:
    """Finished proposals waiting to be written, one transaction per batch.

    A batch is written when it holds :data:`WRITE_BATCH_TILES` tiles or its first tile
    waited :data:`WRITE_BATCH_SECONDS`: each write reads the project's tile list, so
    writes of one chunk each would cost more than the work on a large project, while
    an interrupted run still loses at most one batch.
    """

    def __init__(self, project: Project, model_version: ModelVersionRecord | None) -> None:
        self.project = project
        self.model_version = model_version
        self.pending: list = []
        self.since = time.monotonic()
        self.written = 0

    def add(self, items: list) -> None:
        if not self.pending:
            self.since = time.monotonic()
        self.pending.extend(items)
        waited = time.monotonic() - self.since
        if len(self.pending) >= WRITE_BATCH_TILES or waited >= WRITE_BATCH_SECONDS:
            self.flush()

    def flush(self) -> None:
        if not self.pending:
            return
        if self.model_version is None:  # the cold start is named by its first proposals
            self.model_version = _new_cold_start_version(self.project)
        self.project.store.add_proposals(self.model_version.id, self.pending)
        self.written += len(self.pending)
        self.pending = []


def _failure_of(future) -> BaseException:
    """Why a future did not finish."""
    if future.status == "error":
        return future.exception()
    return RuntimeError(f"the task was {future.status}")


def _describe(chunk: ProposeChunk) -> str:
    ids = [t.id for t in chunk.tiles]
    return f"the chunk of image {chunk.image.name!r} with tiles {min(ids)}..{max(ids)}"


def propose_on_cluster(
    project: Project,
    *,
    address: str,
    progress: Progress = no_progress,
    timeout: float | None = None,
    task: Callable[[ProposeChunk], ChunkResult] = run_propose_chunk,
    missing_only: bool = False,
) -> ProposeResult:
    """``propose`` with the work done by the workers of a Dask cluster.

    Parameters
    ----------
    project : Project
        An open project; its image files (and head checkpoint) must be reachable at the
        same paths on every worker.
    address : str
        The scheduler's address.
    progress : Progress
        Called as ``progress(done, total, label)`` over the tiles, as chunks finish.
    timeout : float, optional
        Seconds to wait for the scheduler (default: ``cluster.connect_timeout``).
    task : callable
        What a worker runs per chunk (default :func:`run_propose_chunk`; tests pass a
        wrapper).
    missing_only : bool
        Propose only the tiles without a proposal with an embedding (the encoder pass
        the picker needs, :func:`embed_on_cluster`), not those of an older model.

    Returns
    -------
    ProposeResult
        As the local ``propose``; the cache figures are the workers' caches'.

    Raises
    ------
    LabelerError
        If no scheduler answers, the head cannot be used, or a chunk fails on the
        cluster (after the other chunks' proposals were stored; a rerun does the rest).
    """
    t = project.settings.cluster.connect_timeout if timeout is None else timeout
    client = connect(address, timeout=t)  # first: an unreachable scheduler fails fast
    try:
        return _propose_with(
            client, project, progress=progress, task=task, missing_only=missing_only
        )
    finally:
        client.close()


def _propose_with(
    client, project: Project, *, progress: Progress, task, missing_only: bool
) -> ProposeResult:
    """:func:`propose_on_cluster` with a connected client."""
    head_mv, head_path, encoder_version, weights = _head_and_version(project)
    mv = head_mv if head_mv is not None else _cold_start_version(project)
    chunks, up_to_date = _chunks(
        project,
        head_path=head_path,
        mv_id=None if mv is None else mv.id,
        encoder_version=encoder_version,
        missing_only=missing_only,
    )
    total = sum(len(c.tiles) for c in chunks)
    done = proposed = hits = misses = 0
    failure: tuple[ProposeChunk, BaseException] | None = None
    if chunks:
        distributed = _distributed()
        progress(0, total, f"sending {len(chunks)} chunks")
        extra = {}
        if weights is not None:  # sent once to every worker, not once per chunk
            extra["encoder_weights"] = client.scatter(weights, broadcast=True)
        futures = client.map(task, chunks, pure=False, **extra)
        by_future = dict(zip(futures, chunks, strict=True))
        del futures
        finished = distributed.as_completed(list(by_future), loop=client.loop)
        batches = _Batches(project, mv)
        try:
            for batch in finished.batches():
                for future in batch:
                    chunk = by_future.pop(future)
                    if future.status != "finished":
                        if failure is None:
                            failure = (chunk, _failure_of(future))
                        continue
                    result = future.result()
                    batches.add(new_proposals(result.tiles))
                    hits += result.cache_hits
                    misses += result.cache_misses
                    done += len(chunk.tiles)
                progress(done, total, "proposed on the cluster")
        except KeyboardInterrupt:
            batches.flush()  # keep what finished; the transaction keeps a write whole
            raise
        batches.flush()
        mv, proposed = batches.model_version, batches.written
    if failure is not None:
        chunk, exc = failure
        why = str(exc) if isinstance(exc, LabelerError) else f"{type(exc).__name__}: {exc}"
        raise LabelerError(
            f"{_describe(chunk)} failed on the cluster ({why}); the {proposed} tiles that "
            "finished are stored; fix the cause and run 'labeler propose --cluster' again "
            "for the rest"
        )
    progress(total, total, "done")
    if mv is None:  # nothing to propose and the cold start never used: name it anyway
        mv = _new_cold_start_version(project)
    return ProposeResult(
        model_version=mv,
        mode="cold_start" if head_mv is None else "head",
        proposed=proposed,
        up_to_date=up_to_date,
        cache_hits=hits,
        cache_misses=misses,
    )


def embed_on_cluster(
    project: Project,
    *,
    address: str,
    progress: Progress = no_progress,
    timeout: float | None = None,
) -> ProposeResult:
    """The encoder pass of ``labeler pick --cluster``: embeddings for the whole pool.

    Every tile without a proposal that carries an embedding is proposed on the cluster
    (with the newest model, as ``propose`` would): the encoder pass gives the embedding
    the picker's core-set needs, the head its uncertainty. Tiles that already have one
    are left as they are, so the picker then scores every tile of the project.

    Parameters
    ----------
    project : Project
    address : str
        The scheduler's address.
    progress : Progress
    timeout : float, optional
        Seconds to wait for the scheduler (default: ``cluster.connect_timeout``).

    Returns
    -------
    ProposeResult
    """
    return propose_on_cluster(
        project, address=address, progress=progress, timeout=timeout, missing_only=True
    )
