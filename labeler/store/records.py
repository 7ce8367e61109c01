"""Plain records the store returns (no SQL objects leave the store)."""

from __future__ import annotations

import io
from dataclasses import dataclass, field
from datetime import datetime

import numpy as np

from labeler.errors import DamagedRecordError
from labeler.imagery.tiling import Window
from labeler.imagery.write import png_decode

__all__ = [
    "ImageRecord",
    "TileRecord",
    "AnnotationRecord",
    "TileWork",
    "SaveOutcome",
    "DraftRecord",
    "ModelVersionRecord",
    "ProposalRecord",
    "PickItem",
    "EventRecord",
    "decode_mask",
    "npy_bytes",
    "npy_decode",
]


def decode_mask(data: bytes, *, shape: tuple[int, int], what: str) -> np.ndarray:
    """Decode a stored PNG mask and check it against the tile's ``shape``.

    Parameters
    ----------
    data : bytes
        PNG bytes as stored.
    shape : (int, int)
        The tile's ``(H, W)``.
    what : str
        What the mask is, for the message (e.g. ``"annotation 12 of tile 3"``).

    Returns
    -------
    ndarray, shape (H, W), uint8

    Raises
    ------
    DamagedRecordError
        Naming ``what`` (e.g. "annotation v2 of tile 3": the tile and the saved version)
        when the bytes are not a PNG or the mask's shape is not the tile's; it is a
        ``ValueError`` too.
    """
    fix = (
        "the database row is damaged: restore labeler.db from a backup, or save the tile "
        "again (the other versions are not affected)"
    )
    try:
        mask = png_decode(data)
    except Exception as exc:  # noqa: BLE001 - any decoder failure is one clear error
        raise DamagedRecordError(
            f"{what}: stored mask is not a readable PNG ({exc}); {fix}"
        ) from None
    if mask.ndim != 2 or mask.shape != tuple(shape):
        raise DamagedRecordError(
            f"{what}: stored mask has shape {mask.shape}, but the tile is {tuple(shape)}; "
            f"the row is damaged or belongs to another tile; {fix}"
        )
    return mask


def npy_bytes(array: np.ndarray) -> bytes:
    """Serialise an array as ``.npy`` bytes (no pickle).

    Parameters
    ----------
    array : ndarray
        Any numeric array.

    Returns
    -------
    bytes
        The ``.npy`` file content (C order).
    """
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(array), allow_pickle=False)
    return buf.getvalue()


def npy_decode(data: bytes | None, *, what: str = "stored array") -> np.ndarray | None:
    """Inverse of :func:`npy_bytes`.

    Parameters
    ----------
    data : bytes or None
        ``.npy`` file content.
    what : str
        How an error names the value (e.g. "embedding of proposal 4 of tile 2").

    Returns
    -------
    ndarray or None
        The array; None stays None.

    Raises
    ------
    DamagedRecordError
        Naming ``what`` when the bytes are not a ``.npy`` array.
    """
    if data is None:
        return None
    try:
        return np.load(io.BytesIO(data), allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise DamagedRecordError(
            f"{what}: stored array is not readable ({exc}); the database row is damaged: "
            "restore labeler.db from a backup, or run 'labeler propose' again after a retrain"
        ) from None


@dataclass(frozen=True)
class ImageRecord:
    """An image of the project (its pixels stay in the file at ``path``)."""

    id: int
    name: str
    path: str
    sha256: str
    width: int
    height: int
    bands: int
    dtype: str
    crs: str | None
    transform: tuple[float, ...] | None  # affine a, b, c, d, e, f (pixel corners)
    georef_source: str | None
    added_at: datetime
    #: bytes of the file as added (None: added before sizes were kept)
    size: int | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)


@dataclass(frozen=True)
class TileRecord:
    """A tile: a window of an image, its life-cycle state and its holder."""

    id: int
    image_id: int
    row: int
    col: int
    height: int
    width: int
    state: str
    overlap: bool
    held_by: str | None
    updated_at: datetime

    @property
    def window(self) -> Window:
        return Window(self.row, self.col, self.height, self.width)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)


@dataclass(frozen=True)
class AnnotationRecord:
    """One saved version of a tile's mask (full mask or weak label), never changed."""

    id: int
    tile_id: int
    version: int
    parent_version: int | None
    annotator: str
    kind: str
    state: str
    height: int
    width: int
    seconds: float
    actions: int
    source: str
    proposal_id: int | None
    created_at: datetime
    mask_png: bytes = field(repr=False)

    def mask(self) -> np.ndarray:
        """The saved mask, decoded and checked against the tile's shape.

        Returns
        -------
        ndarray, shape (H, W), uint8
            Class indices; 255 where a weak label leaves pixels unlabelled.
        """
        return decode_mask(
            self.mask_png,
            shape=(self.height, self.width),
            what=f"annotation v{self.version} of tile {self.tile_id}",
        )


@dataclass(frozen=True)
class TileWork:
    """What is saved on a tile, as one annotator's next save sees it (no mask bytes).

    Attributes
    ----------
    tile : TileRecord
        The tile (its state, overlap flag and holder).
    head : int or None
        The version that annotator's next save must name as its parent (None when
        their lineage has no saved version yet).
    head_by, head_kind : str or None
        Annotator and kind (``"full"`` or ``"scribble"``) of that version.
    full_by : str or None
        Annotator of the tile's newest full mask (the one an export uses).
    weak_by : str or None
        Annotator of the tile's newest weak label.
    """

    tile: TileRecord
    head: int | None
    head_by: str | None
    head_kind: str | None
    full_by: str | None
    weak_by: str | None


@dataclass(frozen=True)
class SaveOutcome:
    """What became of one save of a batch that skips tiles changed in the meantime.

    Attributes
    ----------
    tile_id : int
        The tile.
    version : int or None
        The version saved; None when nothing was saved for this tile.
    problem : str or None
        Why nothing was saved (another save since the named parent version, or a state
        the life cycle does not leave for this save); None when saved.
    """

    tile_id: int
    version: int | None
    problem: str | None = None


@dataclass(frozen=True)
class DraftRecord:
    """An annotator's unsaved edit of a tile, decoded."""

    tile_id: int
    annotator: str
    parent_version: int | None
    seconds: float
    actions: int
    saved_at: datetime
    mask: np.ndarray = field(repr=False)
    weak_label: np.ndarray | None = field(repr=False)


@dataclass(frozen=True)
class ModelVersionRecord:
    """A trained head or a cold-start rule that made proposals."""

    id: int
    kind: str
    name: str
    encoder_version: str | None
    checkpoint: str | None
    n_train_tiles: int
    val_iou: dict[str, float | None] | None
    miou: float | None
    details: dict | None
    created_at: datetime
    #: 1, 2, 3 ... among the versions of its kind, given by the database
    number: int | None = None
    #: SHA-256 of the weights kept in the database (None: none kept, e.g. a rule, or a
    #: version of schema version 2 whose file is still to be read in)
    weights_sha256: str | None = None


@dataclass(frozen=True)
class ProposalRecord:
    """A model's proposed mask of a tile, with its uncertainty figures."""

    id: int
    tile_id: int
    model_version_id: int
    height: int
    width: int
    mean_entropy: float | None
    mean_margin: float | None
    mean_bald: float | None
    mean_least_confidence: float | None
    class_fractions: list[float] | None
    created_at: datetime
    mask_png: bytes = field(repr=False)
    uncertainty_npy: bytes | None = field(repr=False, default=None)
    embedding_npy: bytes | None = field(repr=False, default=None)

    def mask(self) -> np.ndarray:
        """The proposed mask, decoded and checked against the tile's shape.

        Returns
        -------
        ndarray, shape (H, W), uint8
        """
        return decode_mask(
            self.mask_png,
            shape=(self.height, self.width),
            what=f"proposal {self.id} of tile {self.tile_id}",
        )

    def uncertainty(self) -> np.ndarray | None:
        """The proposal's downsampled uncertainty maps.

        Returns
        -------
        ndarray, shape (3, h, w), float16, or None
            Entropy, margin and BALD per cell; None when the proposal has none (cold
            start) or was read without them.
        """
        return npy_decode(
            self.uncertainty_npy, what=f"uncertainty of proposal {self.id} of tile {self.tile_id}"
        )

    def embedding(self) -> np.ndarray | None:
        """The pooled encoder embedding the picker uses.

        Returns
        -------
        ndarray, shape (D,), float32, or None
            None when the proposal was stored without one.
        """
        return npy_decode(
            self.embedding_npy, what=f"embedding of proposal {self.id} of tile {self.tile_id}"
        )


@dataclass(frozen=True)
class PickItem:
    """One tile's place in a queue order written by the picker."""

    tile_id: int
    rank: int
    score: float
    reason: str
    in_batch: bool


@dataclass(frozen=True)
class EventRecord:
    """One row of the append-only event log."""

    id: int
    at: datetime
    kind: str
    tile_id: int | None
    annotator: str | None
    detail: dict | None
