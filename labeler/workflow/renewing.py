"""Renewing the proposals after a retrain, so that the loop closes by itself.

After ``labeler retrain`` (or the queue's retrain key) every tile without a saved full
mask that nobody holds gets a new proposal from the new model version
(:func:`labeler.workflow.proposing.propose` with ``only_open=True``; the features come
from the feature cache, so only the head runs), and the queue is put in order again with
the new uncertainty (:func:`labeler.workflow.picking.pick_tiles`). A tile someone holds
is never renewed under their hands: the check is made again in the transaction that
writes each image's proposals.

Work started from the terminal queue runs in the background (:func:`background_work`):
the worker thread's scheduling priority is lowered (``os.setpriority`` on the thread:
on Linux the nice value belongs to each thread) and torch runs on at most the free
cores less one, so the queue and an open editor keep a core.
"""

from __future__ import annotations

import contextlib
import os
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass

from labeler.errors import LabelerError
from labeler.project import Project
from labeler.workflow.picking import PickResult, pick_tiles
from labeler.workflow.progress import Progress, no_progress
from labeler.workflow.proposing import ProposeResult, propose

__all__ = ["BACKGROUND_NICE", "RenewResult", "renew_proposals", "background_work"]

#: Nice increment of a background worker thread (common practice, no source).
BACKGROUND_NICE = 10

#: Set in a thread while it runs :func:`background_work` (no second stage then).
_IN_BACKGROUND = threading.local()


@dataclass(frozen=True)
class RenewResult:
    """What renewing the proposals did.

    Attributes
    ----------
    proposals : ProposeResult
        ``proposed`` tiles renewed, ``left_alone`` tiles with a saved mask or held.
    picked : PickResult or None
        The queue order made with the new uncertainty; None when it could not be made
        (``note`` says why).
    seconds : float
        Wall-clock time of the renewal and the re-pick.
    note : str
        Why the queue was not re-picked, or empty.
    """

    proposals: ProposeResult
    picked: PickResult | None
    seconds: float
    note: str = ""

    @property
    def renewed(self) -> int:
        """Tiles that got a proposal of the new model version."""
        return self.proposals.proposed


def renew_proposals(project: Project, *, progress: Progress = no_progress) -> RenewResult:
    """New proposals from the newest model for the open tiles, then a new queue order.

    Parameters
    ----------
    project : Project
        An open project.
    progress : Progress
        Called as ``progress(done, total, label)`` over the tiles renewed.

    Returns
    -------
    RenewResult

    Raises
    ------
    LabelerError
        As :func:`~labeler.workflow.proposing.propose` (a checkpoint that cannot be
        loaded, an image file changed since it was added).
    """
    started = time.perf_counter()
    # reading the next block's pixels and cached features overlaps the head on this one,
    # but not in the background of the queue: its spare core stays the queue's and editor's
    overlap = False if getattr(_IN_BACKGROUND, "active", False) else None
    proposals = propose(project, progress=progress, only_open=True, overlap=overlap)
    picked, note = None, ""
    try:
        picked = pick_tiles(project)
    except LabelerError as exc:  # e.g. no tile has a proposal with an embedding
        note = str(exc)
    return RenewResult(
        proposals=proposals, picked=picked, seconds=time.perf_counter() - started, note=note
    )


def _lower_thread_priority(increment: int) -> bool:
    """Lower the calling thread's priority by ``increment``; False where the OS refuses."""
    try:
        tid = threading.get_native_id()
        os.setpriority(os.PRIO_PROCESS, tid, os.getpriority(os.PRIO_PROCESS, tid) + increment)
    except (AttributeError, OSError):  # not every OS has per-thread priorities
        return False
    return True


@contextlib.contextmanager
def background_work(*, nice: int = BACKGROUND_NICE) -> Iterator[None]:
    """Run the enclosed model work in the background of an interactive program.

    The calling thread's priority is lowered by ``nice`` for the rest of its life (an
    unprivileged thread cannot raise it again: call this in a worker thread of its own),
    and torch uses at most the free cores less one while the context lasts
    (:func:`labeler.model.runtime.thread_cap`).

    Parameters
    ----------
    nice : int
        How much to lower the calling thread's priority (0 leaves it as it is).

    Yields
    ------
    None
    """
    from labeler.model.runtime import thread_cap

    if nice:
        _lower_thread_priority(nice)
    was = getattr(_IN_BACKGROUND, "active", False)
    _IN_BACKGROUND.active = True
    try:
        with thread_cap(spare=1):
            yield
    finally:
        _IN_BACKGROUND.active = was
