"""Values of project settings: allowed ranges, conversion, and where a value sits in a file.

:mod:`labeler.settings` declares the options; this module holds what checks their values,
so that every section is checked the same way:

* :class:`Range` and :data:`RANGES`: the allowed values of each numeric option;
* :class:`Checked`: the base of the section dataclasses, which checks every numeric
  option on creation (finite, whole where a count is meant, inside its range) and then
  the section's own rules between options;
* :func:`coerce`: a TOML value or environment text as the option's type;
* :func:`line_of`: the line of ``labeler.toml`` that sets an option (for messages).

Every failure is a :class:`~labeler.errors.SettingsError` naming ``section.option``.
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass

from labeler.errors import SettingsError

__all__ = [
    "INT_MAX",
    "RANGES",
    "Range",
    "Checked",
    "bad_value",
    "check_choice",
    "coerce",
    "line_of",
]


@dataclass(frozen=True)
class Range:
    """The allowed values of a numeric option: ``low <= value <= high`` (ends optional).

    Attributes
    ----------
    low, high : float or None
        The ends; None means unbounded on that side.
    low_open, high_open : bool
        The end itself is excluded (``low < value``, ``value < high``).
    """

    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False

    def __contains__(self, value: float) -> bool:
        if self.low is not None and (value <= self.low if self.low_open else value < self.low):
            return False
        if self.high is not None and (value >= self.high if self.high_open else value > self.high):
            return False
        return True

    def describe(self, *, whole: bool) -> str:
        """The range in words, e.g. ``"a whole number of at least 1"``."""
        noun = "a whole number" if whole else "a number"
        parts = []
        if self.low is not None:
            parts.append(f"{'above' if self.low_open else 'at least'} {self.low:g}")
        if self.high is not None:
            parts.append(f"{'below' if self.high_open else 'at most'} {self.high:g}")
        return noun + (" " + " and ".join(parts) if parts else "")


#: Largest whole number a count or seed may be: a signed 32-bit integer (NumPy, torch and
#: every database column hold it). Common practice, no source.
INT_MAX = 2**31 - 1
#: Options counting pixels of a whole image, which exceed INT_MAX (a 50 000 x 50 000
#: orthomosaic has 2.5e9): they are held as Python/NumPy 64-bit integers, never in a
#: 32-bit column; bounded by the largest whole number a float holds exactly, 2**53.
WIDE_OPTIONS = {"tiles.max_image_px": 2**53}


def int_cap(where: str) -> int:
    """Largest size of the whole-number option ``where`` (``section.option``)."""
    return WIDE_OPTIONS.get(where, INT_MAX)


#: Allowed values of every numeric option (checked when the settings are made). Options
#: not listed need only be finite numbers (whole numbers for counts).
RANGES: dict[str, dict[str, Range]] = {
    "tiles": {"size": Range(16, 16384), "overlap": Range(0), "max_image_px": Range(1, 2**40)},
    "cold_start": {"exr_coefficient": Range(0), "min_object_px": Range(0)},
    "model": {
        "mc_samples": Range(1, 1000),
        "seed": Range(0),
        "epochs": Range(1),
        "batch_size": Range(1),
        "min_labelled_tiles": Range(1),
        "val_share": Range(0, 1, high_open=True),
        "threads": Range(0, 1024),
        "patience": Range(1),
    },
    "picker": {"k": Range(1), "seed": Range(0)},
    "agreement": {
        "overlap_share": Range(0, 1),
        "annotators_per_tile": Range(2, 64),
        # Cohen's kappa lies in [-1, 1], IoU in [0, 1] (checked against the metric below)
        "threshold": Range(-1, 1),
    },
    "export": {
        "simplify_tolerance_px": Range(0),
        "min_area_px": Range(0),
        "val_share": Range(0, 1),
        "seed": Range(0),
        "block_tiles": Range(1),
    },
    "editor": {"autosave_seconds": Range(0, low_open=True), "opacity": Range(0, 1)},
    "holds": {
        "lease_minutes": Range(0, low_open=True),
        "heartbeat_seconds": Range(0, low_open=True),
    },
    "cluster": {"connect_timeout": Range(0, 3600, low_open=True), "worker_threads": Range(0, 1024)},
}


def bad_value(section: str, option: str, expected: str, got: object) -> SettingsError:
    return SettingsError(
        f"{section}.{option}: expected {expected}, got {got!r}", option=f"{section}.{option}"
    )


class Checked:
    """Base of the section dataclasses: every numeric option is checked on creation."""

    _section = ""

    def __post_init__(self) -> None:
        ranges = RANGES.get(self._section, {})
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            kind = f.type if isinstance(f.type, str) else f.type.__name__
            if kind not in ("int", "float"):
                continue
            whole = kind == "int"
            limits = ranges.get(f.name, Range())
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise bad_value(self._section, f.name, limits.describe(whole=whole), value)
            if not math.isfinite(value):
                raise bad_value(
                    self._section, f.name, limits.describe(whole=whole) + " (finite)", value
                )
            cap = int_cap(f"{self._section}.{f.name}")
            if whole and (value != int(value) or abs(value) > cap):
                raise bad_value(self._section, f.name, limits.describe(whole=True), value)
            if value not in limits:
                raise bad_value(self._section, f.name, limits.describe(whole=whole), value)
        self._check()

    def _check(self) -> None:
        """Checks between options of the section (after each option's own range)."""


def check_choice(
    section: str, option: str, value: str | int, choices: tuple[str, ...] | tuple[int, ...]
) -> None:
    if value not in choices:
        raise bad_value(section, option, "one of " + ", ".join(map(str, choices)), value)


_HEADER = re.compile(r"^\s*\[\s*([A-Za-z0-9_\-]+)\s*\]\s*(#.*)?$")


def line_of(text: str, section: str, option: str | None) -> int | None:
    """1-based line of ``option`` in table ``[section]`` of TOML ``text`` (or the header).

    A plain scan (``tomllib`` keeps no positions): ``option =`` inside ``[section]``,
    ``section.option =`` at the top, or the section's header when the option is not found.
    """
    current = None
    header_line = None
    key = re.compile(rf"^\s*[\"']?{re.escape(option or '')}[\"']?\s*=")
    dotted = re.compile(rf"^\s*{re.escape(section)}\s*\.\s*{re.escape(option or '')}\s*=")
    inline = re.compile(rf"^\s*{re.escape(section)}\s*=")
    for n, line in enumerate(text.splitlines(), start=1):
        m = _HEADER.match(line)
        if m:
            current = m.group(1)
            if current == section and header_line is None:
                header_line = n
            continue
        if option and current == section and key.match(line):
            return n
        if current is None and option and dotted.match(line):
            return n
        if current is None and header_line is None and inline.match(line):
            header_line = n
    return header_line


def coerce(where: str, value: object, target: type, *, limits: Range | None = None) -> object:
    """``value`` (from TOML or an environment variable) as the option's type.

    Parameters
    ----------
    where : str
        ``section.option``, for the message.
    value : object
        The value as read: a TOML value, or the text of an environment variable.
    target : {int, float, str}
        The option's type.
    limits : Range, optional
        The option's range, only to describe what is expected in a message.

    Returns
    -------
    int, float or str

    Raises
    ------
    SettingsError
        For a value of another kind, a fraction where a whole number is meant, or a number
        that is not finite (``nan``, ``inf``, ``1e400``) or too large to hold.
    """
    if target is str:
        if isinstance(value, Mapping | list):
            raise SettingsError(f"{where}: expected text, got {value!r}", option=where)
        return str(value)
    whole = target is int
    expected = (limits or Range()).describe(whole=whole)
    if isinstance(value, bool) or isinstance(value, Mapping | list):
        raise bad_value(*where.split(".", 1), expected, value)
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError, OverflowError):
        raise bad_value(*where.split(".", 1), expected, value) from None
    cap = int_cap(where)
    if not math.isfinite(number) or (isinstance(value, int) and abs(value) > cap):
        raise bad_value(
            *where.split(".", 1), f"{expected} (finite, at most {cap:,} in size)", value
        )
    if whole:
        if number != int(number):
            raise bad_value(*where.split(".", 1), expected, value)
        return value if isinstance(value, int) else int(number)
    return number
