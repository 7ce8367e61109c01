"""How many cores other work keeps busy right now, from two readings of ``/proc/stat``.

The 1-minute load average is a poor guide to the threads a command should start: it
lags by a minute and it counts this user's own earlier work. A ``labeler retrain``
started just after a ``labeler propose`` saw a load of about 1.3 on an idle 2-core
machine and trained on one thread, half as fast as it could. :func:`busy_cores` instead
reads the kernel's CPU time counters twice, a fraction of a second apart, and subtracts
the CPU time this process used in between:

    busy = (delta busy jiffies / CLK_TCK - delta own CPU seconds) / delta wall seconds

The busy jiffies are the ``user``, ``nice``, ``system``, ``irq``, ``softirq`` and
``steal`` columns of the ``cpu`` line (proc(5), "/proc/stat"); ``idle`` and ``iowait``
never count. Processes of lowered priority count in full: torch's threads wait for each
other at every operation, so one thread that a niced process delays now and then holds
up all of them (measured on the 2-core development machine: a 2-thread retrain beside a
niced test run took 165 s, a 1-thread one 50 s). On systems without
``/proc/stat`` :func:`busy_cores` returns None and the caller falls back to the load
average (:func:`labeler.model.runtime.free_cores`).
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import NamedTuple

__all__ = ["CpuTimes", "parse_cpu_line", "busy_between", "busy_cores", "SAMPLE_SECONDS"]

#: Seconds between the two readings of :func:`busy_cores`.
SAMPLE_SECONDS = 0.25

#: The ``/proc/stat`` file (a module attribute so tests can point it elsewhere).
PROC_STAT = Path("/proc/stat")

#: Column positions of the ``cpu`` line after its label (proc(5)).
_USER, _NICE, _SYSTEM, _IDLE, _IOWAIT, _IRQ, _SOFTIRQ, _STEAL = range(8)


class CpuTimes(NamedTuple):
    """Jiffies of the ``cpu`` line of ``/proc/stat``."""

    #: User, system, irq, softirq and steal time.
    busy: int
    #: User time of processes with a lowered priority (busy too).
    nice: int


def parse_cpu_line(line: str) -> CpuTimes:
    """The busy and nice jiffies of the aggregate ``cpu`` line of ``/proc/stat``.

    Parameters
    ----------
    line : str
        E.g. ``"cpu  10132153 290696 3084719 46828483 16683 0 25195 0 175628 0"``
        (the example of proc(5)); kernels older than 2.6.11 give fewer columns, the
        missing ones count as 0.

    Returns
    -------
    CpuTimes

    Raises
    ------
    ValueError
        If the line is not a ``cpu`` line of at least four numbers.
    """
    parts = line.split()
    if not parts or parts[0] != "cpu" or len(parts) < 5:
        raise ValueError(
            f"line: expected the 'cpu' line of /proc/stat (label and at least four counters), "
            f"got {line!r}"
        )
    try:
        values = [int(p) for p in parts[1:9]]
    except ValueError:
        raise ValueError(f"line: expected whole numbers after 'cpu', got {line!r}") from None
    values += [0] * (8 - len(values))
    busy = values[_USER] + values[_SYSTEM] + values[_IRQ] + values[_SOFTIRQ] + values[_STEAL]
    return CpuTimes(busy, values[_NICE])


def busy_between(
    before: CpuTimes,
    after: CpuTimes,
    *,
    own_seconds: float,
    wall_seconds: float,
    clock_ticks: int,
) -> float:
    """Cores kept busy by other work between two readings.

    Parameters
    ----------
    before, after : CpuTimes
        Readings of the ``cpu`` line.
    own_seconds : float
        CPU seconds this process used between the readings.
    wall_seconds : float
        Seconds between the readings (> 0).
    clock_ticks : int
        Jiffies per second (``os.sysconf("SC_CLK_TCK")``).

    Returns
    -------
    float
        At least 0.

    Raises
    ------
    ValueError
        For a non-positive ``wall_seconds`` or ``clock_ticks``.
    """
    if not wall_seconds > 0 or clock_ticks < 1:
        raise ValueError(
            f"wall_seconds, clock_ticks: expected positive values, got {wall_seconds} and "
            f"{clock_ticks}"
        )
    jiffies = after.busy - before.busy + after.nice - before.nice
    return max(0.0, (jiffies / clock_ticks - own_seconds) / wall_seconds)


def _read(path: Path) -> CpuTimes:
    with open(path, encoding="ascii") as fh:
        return parse_cpu_line(fh.readline())


def busy_cores(*, seconds: float = SAMPLE_SECONDS, stat: Path | None = None) -> float | None:
    """Cores other processes keep busy now (see the module docstring); None if unknown.

    Parameters
    ----------
    seconds : float
        Time between the two readings; the call takes that long.
    stat : Path, optional
        The counters file; default ``/proc/stat``.

    Returns
    -------
    float or None
        None where the counters cannot be read (not Linux, a sandbox without /proc).
    """
    path = PROC_STAT if stat is None else stat
    try:
        ticks = int(os.sysconf("SC_CLK_TCK"))
        first = _read(path)
        own0, wall0 = time.process_time(), time.perf_counter()
        time.sleep(seconds)  # the measuring interval itself, not a wait for another process
        second = _read(path)
        own1, wall1 = time.process_time(), time.perf_counter()
    except (OSError, ValueError, AttributeError):
        return None
    return busy_between(
        first,
        second,
        own_seconds=own1 - own0,
        wall_seconds=wall1 - wall0,
        clock_ticks=ticks,
    )
