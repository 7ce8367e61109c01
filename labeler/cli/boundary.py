"""The error boundary of the command line: whatever goes wrong ends as one line on stderr.

:func:`run_command` runs one command and turns what escapes it into one line
``labeler: error: ...`` and exit code 1 (the traceback only with ``--debug``):

* a :class:`~labeler.errors.LabelerError` is printed as it is: the rooms below word
  their own errors, including the database's (:mod:`labeler.store.failures`) and the
  settings' (:mod:`labeler.settings`);
* an ``OSError`` (disk full, permission denied, a read-only disk, a file where a folder
  is expected, ...) is worded here by its ``errno``, naming the file (:func:`os_error_message`);
* ``MemoryError`` says what to do about it;
* anything else is a bug of ours: one line that says so and asks for ``--debug``.

Warnings of the libraries underneath (Pillow, rasterio, NumPy, ...) are printed as one
line ``labeler: warning: ...`` each, and log records of level warning and above likewise,
instead of the libraries' own multi-line output. ``Ctrl-C`` ends with exit code 130; a
closed output pipe (``labeler status | head``) ends quietly.
"""

from __future__ import annotations

import errno
import logging
import os
import re
import sys
import traceback
import warnings
from collections.abc import Callable
from pathlib import Path

from labeler.errors import LabelerError

__all__ = ["EXIT_OK", "EXIT_ERROR", "EXIT_INTERRUPTED", "os_error_message", "run_command"]

EXIT_OK = 0
EXIT_ERROR = 1
EXIT_INTERRUPTED = 130

#: What an errno means for the user and what to do, by errno name.
_OS_PROBLEMS = {
    "ENOSPC": ("the disk is full", "free some space and run the command again"),
    "EDQUOT": ("the disk quota is used up", "free some space and run the command again"),
    "EACCES": ("permission denied", "check the permissions of the file and its folder"),
    "EPERM": ("operation not permitted", "check the permissions of the file and its folder"),
    "EROFS": ("the disk is read-only", "choose a place you can write to"),
    "ENOTDIR": (
        "a part of this path is a file, not a folder",
        "choose a path whose folders are folders",
    ),
    "EISDIR": ("is a folder, expected a file", "give the path of a file"),
    "ENOENT": ("no such file or folder", "check the path"),
    "EEXIST": ("already exists", "choose another name or remove it first"),
    "ENAMETOOLONG": ("the name is too long", "choose a shorter path"),
    "EIO": ("the disk failed to read or write", "check the disk or network share"),
    "EMFILE": ("too many files are open", "close other programs and run the command again"),
    "ENFILE": ("too many files are open", "close other programs and run the command again"),
    "ENOTEMPTY": ("the folder is not empty", "choose an empty or new folder"),
    "EXDEV": ("cannot move a file across disks", "choose a place on the same disk"),
}

#: Temporary files of labeler.fileio: ``.<target>.<random>.part`` / ``.tmp`` beside the target.
_TEMPORARY = re.compile(r"^\.(?P<target>.+)\.[A-Za-z0-9_]+\.(?:part|tmp)$")


def _shown(filename: object) -> str:
    """The file to name: a temporary file of an atomic write is named by its target."""
    path = Path(os.fsdecode(filename))  # type: ignore[arg-type]
    m = _TEMPORARY.match(path.name)
    return str(path.with_name(m.group("target")) if m else path)


def os_error_message(error: OSError) -> str:
    """One line for an ``OSError``: the file, the problem, the fix.

    Parameters
    ----------
    error : OSError
        As raised by the operating system (``errno``, ``strerror``, ``filename`` set).

    Returns
    -------
    str
        E.g. ``"exports/plot.png: the disk is full (No space left on device); free some
        space and run the command again"``.
    """
    name = errno.errorcode.get(error.errno or 0, "")
    problem, fix = _OS_PROBLEMS.get(name, ("the operating system refused", "check the path"))
    said = error.strerror or str(error) or type(error).__name__
    where = _shown(error.filename) if error.filename is not None else "a file"
    if error.filename2 is not None:
        where += f" -> {_shown(error.filename2)}"
    if problem.lower() == said.lower():
        return f"{where}: {problem}; {fix}"
    return f"{where}: {problem} ({said}); {fix}"


class _OneLineHandler(logging.Handler):
    def emit(self, record: logging.LogRecord) -> None:
        try:
            text = record.getMessage().strip().replace("\n", " ")
        except Exception:  # noqa: BLE001 - a malformed log call must not end the command
            text = str(record.msg)
        _say(f"labeler: warning: {text}")


def _say(line: str) -> None:
    try:
        print(line, file=sys.stderr)
    except (OSError, ValueError):  # stderr closed: nothing more to say
        pass


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    text = str(message).strip().replace("\n", " ")
    _say(f"labeler: warning: {text}")


def run_command(command: Callable[[object], int | None], args: object, *, debug: bool) -> int:
    """Run ``command(args)`` inside the error boundary; the exit code.

    Parameters
    ----------
    command : callable
        One of :mod:`labeler.cli.commands`.
    args : argparse.Namespace
        Its parsed arguments.
    debug : bool
        Print the traceback before the one line (``labeler --debug ...``), and show
        warnings with their category and place.

    Returns
    -------
    int
        0 on success, 1 on an error (one line on stderr), 130 when interrupted.
    """
    handler = _OneLineHandler(level=logging.WARNING)
    root = logging.getLogger()
    root.addHandler(handler)
    try:
        with warnings.catch_warnings():
            if not debug:
                warnings.showwarning = _show_warning
            return int(command(args) or EXIT_OK)
    except KeyboardInterrupt:
        _say("labeler: interrupted; saved work is kept")
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader of our output went away (labeler status | head): stop quietly
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        return EXIT_ERROR
    except Exception as exc:  # noqa: BLE001 - the boundary: every failure is one line
        if debug:
            traceback.print_exc()
        _say(f"labeler: error: {_message(exc)}")
        return EXIT_ERROR
    finally:
        root.removeHandler(handler)


def _message(exc: BaseException) -> str:
    if isinstance(exc, LabelerError):
        return str(exc)
    if isinstance(exc, OSError):
        return os_error_message(exc)
    if isinstance(exc, MemoryError):
        return (
            "out of memory; close other programs, or lower model.batch_size or tiles.size "
            "in labeler.toml, and run the command again"
        )
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return (
        f"unexpected {type(exc).__name__}{': ' + text if text else ''}; this is a fault in "
        "labeler, not in your data: run the command again with 'labeler --debug ...' and "
        "report the traceback"
    )
