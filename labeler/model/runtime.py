"""CPU runtime settings of the model room: torch threads and the inference context.

Everything runs on the CPU. ``configure_threads`` applies the ``model.threads`` setting
(0 = one thread per core); ``inference`` is the context every prediction runs under
(``torch.inference_mode``: no autograd bookkeeping at all).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator

import torch

__all__ = ["configure_threads", "available_cores", "inference"]


def available_cores() -> int:
    """Cores this process may run on (the affinity mask where the OS offers one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # not every OS has sched_getaffinity
        return max(1, os.cpu_count() or 1)


def configure_threads(threads: int = 0) -> int:
    """Set the number of torch intra-op threads.

    Parameters
    ----------
    threads : int
        Threads to use; 0 means one per available core (the ``model.threads`` default).

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
            f"threads: expected 0 (all cores) or a positive count, got {threads}; "
            "set model.threads in labeler.toml"
        )
    wanted = threads or available_cores()
    if torch.get_num_threads() != wanted:
        torch.set_num_threads(wanted)
    return torch.get_num_threads()


@contextlib.contextmanager
def inference() -> Iterator[None]:
    """Context for prediction: ``torch.inference_mode`` (no gradients, no version counters)."""
    with torch.inference_mode():
        yield
