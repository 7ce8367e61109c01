"""CPU runtime settings of the model room: torch threads and the inference context.

Everything runs on the CPU. ``configure_threads`` applies the ``model.threads`` setting
(0 = one thread per free core: the cores this process may use less those other work
keeps busy right now (:mod:`labeler.model.cpuload`; the 1-minute load average where the
kernel's counters cannot be read), at least one; more threads than free cores make every
thread wait for the others, which once turned a 6-tile retrain on a loaded 2-core machine
from seconds into minutes); ``inference`` is the context every prediction runs under
(``torch.inference_mode``: no autograd bookkeeping at all).
"""

from __future__ import annotations

import contextlib
import math
import os
import time
from collections.abc import Iterator

import torch

from labeler.model import cpuload

__all__ = [
    "configure_threads",
    "available_cores",
    "free_cores",
    "inference",
    "thread_cap",
]

#: Seconds a reading of the busy cores stays valid (a command asks several times).
BUSY_READING_SECONDS = 10.0
#: The last reading: ``(perf_counter time, busy cores)``.
_BUSY: list[tuple[float, float]] = []
#: Most torch threads while background work runs (:func:`thread_cap`); None: no cap.
_CAP: list[int | None] = [None]


def available_cores() -> int:
    """Cores this process may run on (the affinity mask where the OS offers one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # not every OS has sched_getaffinity
        return max(1, os.cpu_count() or 1)


def free_cores(*, load: float | None = None) -> int:
    """Cores not busy with other work: :func:`available_cores` less the busy ones.

    Parameters
    ----------
    load : float, optional
        Busy cores to assume (a load figure); default the cores other processes keep
        busy now (:func:`labeler.model.cpuload.busy_cores`, read at most every
        :data:`BUSY_READING_SECONDS`), or the 1-minute load average where that cannot be
        read. A core counts as busy for every whole unit of a given ``load``
        (``floor(load)``) and for every half unit or more of a measured one (rounded:
        a core another process holds half the time would make every thread wait).

    Returns
    -------
    int
        Between 1 and :func:`available_cores`.
    """
    cores = available_cores()
    if load is None:
        busy = _busy_now()
        if busy is not None:
            return max(1, min(cores, cores - math.floor(busy + 0.5)))
        try:
            load = os.getloadavg()[0]
        except (AttributeError, OSError):  # not every OS has a load average
            return cores
    if not load >= 0:  # NaN or negative: no information
        return cores
    return max(1, min(cores, cores - int(load)))


def _busy_now() -> float | None:
    now = time.perf_counter()
    if _BUSY and now - _BUSY[0][0] < BUSY_READING_SECONDS:
        return _BUSY[0][1]
    busy = cpuload.busy_cores()
    _BUSY.clear()
    if busy is not None:
        _BUSY.append((time.perf_counter(), busy))
    return busy


def configure_threads(threads: int = 0) -> int:
    """Set the number of torch intra-op threads.

    Parameters
    ----------
    threads : int
        Threads to use; 0 means one per free core (:func:`free_cores`; the
        ``model.threads`` default). Never more than the cap of :func:`thread_cap`
        while one is in force.

    Returns
    -------
    threads : int
        The number now in effect.

    Raises
    ------
    ValueError
        If ``threads`` is negative.
    """
    if threads < 0:
        raise ValueError(
            f"threads: expected 0 (the free cores) or a positive count, got {threads}; "
            "set model.threads in labeler.toml"
        )
    wanted = threads or free_cores()
    if _CAP[0] is not None:
        wanted = min(wanted, _CAP[0])
    if torch.get_num_threads() != wanted:
        torch.set_num_threads(wanted)
    return torch.get_num_threads()


@contextlib.contextmanager
def inference() -> Iterator[None]:
    """Context for prediction: ``torch.inference_mode`` (no gradients, no version counters)."""
    with torch.inference_mode():
        yield


@contextlib.contextmanager
def thread_cap(*, spare: int = 1) -> Iterator[int]:
    """Cap torch's threads for background work, leaving ``spare`` free cores to the rest.

    Inside the context, torch uses at most ``free_cores() - spare`` threads (at least
    one), and :func:`configure_threads` never sets more; the count in force before is
    restored on leaving. Torch's thread count is one per process: meant for one
    background job at a time, beside an interface that needs a core to stay responsive.

    Parameters
    ----------
    spare : int
        Free cores left to other work (>= 0).

    Yields
    ------
    int
        The cap.
    """
    if spare < 0:
        raise ValueError(f"spare: expected 0 or more cores left free, got {spare}")
    before, old_cap = torch.get_num_threads(), _CAP[0]
    cap = max(1, free_cores() - spare)
    _CAP[0] = cap
    if torch.get_num_threads() > cap:
        torch.set_num_threads(cap)
    try:
        yield cap
    finally:
        _CAP[0] = old_cap
        if torch.get_num_threads() != before:
            torch.set_num_threads(before)

