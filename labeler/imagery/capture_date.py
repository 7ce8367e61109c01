"""When an image was taken: the date-time tags of TIFF and EXIF.

Tags read, in this order of preference (the first that parses wins):

1. EXIF ``DateTimeOriginal`` (tag 36867): when the picture was taken;
2. EXIF ``DateTimeDigitized`` (tag 36868): when it was stored as digital data;
3. TIFF/EXIF ``DateTime`` (tag 306 in the first image directory): when the file was
   last created or changed. For an orthomosaic this is usually when it was assembled,
   not when the field was flown: a caller should let the user override it
   (``labeler add --date``).

The value format is ``"YYYY:MM:DD HH:MM:SS"`` (TIFF Revision 6.0, Adobe 1992, tag 306;
Exif 2.32, CIPA DC-008-2019, tags 36867/36868); unknown parts may be blank, and then
the tag is ignored. Where the EXIF offset tags (``OffsetTimeOriginal`` 36881,
``OffsetTimeDigitized`` 36882, ``OffsetTime`` 36880, e.g. ``"+02:00"``) are present,
the result carries that time zone; otherwise it is naive (the camera's local time).

Pillow reads the tags of JPEG, PNG (``eXIf`` chunk) and TIFF files without decoding any
pixel data; a damaged tag block is read as far as Pillow can (a date it cannot read is
absent), a file Pillow cannot open at all is an error.
"""

from __future__ import annotations

import os
import re
import threading
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

from PIL import Image, UnidentifiedImageError

from labeler.errors import InputError
from labeler.imagery.read import sniff_format

__all__ = ["CaptureTime", "parse_exif_datetime", "read_capture_time"]

_EXIF_IFD = 0x8769
_DATETIME = 306
#: (name, date-time tag, offset tag, in the EXIF sub-directory?)
_TAGS = (
    ("DateTimeOriginal", 36867, 36881, True),
    ("DateTimeDigitized", 36868, 36882, True),
    ("DateTime", _DATETIME, 36880, False),
)
_PATTERN = re.compile(r"^\s*(\d{4})[:\-](\d{2})[:\-](\d{2})[ T](\d{2}):(\d{2}):(\d{2})")
_OFFSET = re.compile(r"^\s*([+-])(\d{2}):(\d{2})\s*$")


@dataclass(frozen=True)
class CaptureTime:
    """A capture time and the tag it came from.

    Attributes
    ----------
    when : datetime
        Naive (camera local time) unless an EXIF offset tag gave the time zone.
    tag : str
        ``"DateTimeOriginal"``, ``"DateTimeDigitized"`` or ``"DateTime"``.
    """

    when: datetime
    tag: str


def parse_exif_datetime(
    text: str | bytes | None, offset: str | bytes | None = None
) -> datetime | None:
    """A TIFF/EXIF date-time string as a datetime; None when blank or not a valid time.

    Parameters
    ----------
    text : str or bytes
        ``"YYYY:MM:DD HH:MM:SS"`` (dashes in the date and a ``T`` separator are accepted
        too, as some writers use them). Trailing NUL bytes are ignored.
    offset : str or bytes, optional
        An EXIF offset such as ``"+02:00"``; gives the result a time zone.

    Returns
    -------
    datetime or None
    """
    if text is None:
        return None
    if isinstance(text, bytes):
        text = text.decode("ascii", errors="replace")
    m = _PATTERN.match(text.rstrip("\x00"))
    if m is None:
        return None
    try:
        when = datetime(*(int(g) for g in m.groups()))
    except ValueError:  # month 13, day 0, ...
        return None
    if offset is not None:
        if isinstance(offset, bytes):
            offset = offset.decode("ascii", errors="replace")
        o = _OFFSET.match(offset.rstrip("\x00"))
        if o is not None:
            sign = -1 if o.group(1) == "-" else 1
            delta = timedelta(hours=int(o.group(2)), minutes=int(o.group(3)))
            if delta < timedelta(hours=24):
                when = when.replace(tzinfo=timezone(sign * delta))
    return when


_SIZE_LIMIT_LOCK = threading.Lock()


@contextmanager
def _no_size_limit() -> Iterator[None]:
    """Open images of any size while reading their tags (no pixel is decoded here).

    Pillow refuses to open an image above twice ``Image.MAX_IMAGE_PIXELS`` (a
    decompression-bomb guard), although only its tags are read: an orthomosaic of
    20000 x 20000 pixels would be refused. The size is checked where pixels are decoded
    (:mod:`labeler.imagery.read`, ``tiles.max_image_px``).
    """
    with _SIZE_LIMIT_LOCK:
        saved = Image.MAX_IMAGE_PIXELS
        Image.MAX_IMAGE_PIXELS = None
        try:
            yield
        finally:
            Image.MAX_IMAGE_PIXELS = saved


def read_capture_time(path: str | os.PathLike[str]) -> CaptureTime | None:
    """The capture time an image's tags give, or None when they give none.

    Parameters
    ----------
    path : path
        A JPEG, PNG or TIFF/GeoTIFF file.

    Returns
    -------
    CaptureTime or None

    Raises
    ------
    InputError
        For a missing, empty, unsupported or unreadable file (naming it).
    """
    p = Path(path)
    sniff_format(p)  # names the file when it is missing, empty or not an image
    try:
        with warnings.catch_warnings(), _no_size_limit():
            # Pillow warns about damaged tag blocks and reads what it can; a damaged
            # date is then absent (None) rather than an error
            warnings.simplefilter("ignore", UserWarning)
            with Image.open(p) as im:
                exif = im.getexif()
                sub = exif.get_ifd(_EXIF_IFD)
    except (OSError, UnidentifiedImageError, SyntaxError, ValueError) as exc:
        raise InputError(f"{p}: cannot read the image's tags ({exc})") from None
    for name, tag, offset_tag, in_sub in _TAGS:
        where = sub if in_sub else exif
        offset = sub.get(offset_tag)
        when = parse_exif_datetime(where.get(tag), offset)
        if when is not None:
            return CaptureTime(when, name)
    return None
