"""Progress reports of the long workflow stages.

Every stage that takes a while (adding, proposing, picking, retraining, exporting, the
agreement report) takes a keyword ``progress`` callback and calls it as
``progress(done, total, label)``; the command line draws a bar from it, the terminal
queue a progress widget. :func:`no_progress` is the default that shows nothing.
"""

from __future__ import annotations

from collections.abc import Callable

__all__ = ["Progress", "no_progress"]

#: ``progress(done, total, label)``: ``done`` of ``total`` steps finished, ``label`` says
#: what is being done.
Progress = Callable[[int, int, str], None]


def no_progress(done: int, total: int, label: str) -> None:
    """A progress callback that shows nothing.

    Parameters
    ----------
    done : int
        Steps finished.
    total : int
        Steps in all.
    label : str
        What is being done.
    """
    return None
