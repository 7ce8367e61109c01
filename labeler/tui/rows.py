"""What the queue screen shows: cell texts of a queue row, the row filters, the caption.

Plain Python over :class:`labeler.workflow.QueueRow` and :class:`labeler.workflow.TileView`
(no textual here), so the screens stay thin and these rules are tested on their own.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from labeler.classes import ClassSchema
from labeler.states import STATES
from labeler.workflow.annotating import QueueRow
from labeler.workflow.views import TileView

__all__ = [
    "QUEUE_COLUMNS",
    "NOBODY",
    "MIN_CLASS_SHARE",
    "RowFilter",
    "keep_row",
    "filter_rows",
    "format_shares",
    "format_number",
    "format_who",
    "queue_cells",
    "DISAGREE",
    "ranking_notes",
    "DROP_ORDER",
    "fit_columns",
    "preview_caption",
]

#: Column headings of the queue table, in order.
QUEUE_COLUMNS = (
    "rank",
    "tile",
    "image",
    "state",
    "who",
    "predicted",
    "agreement",
    "ranked by",
    "reason",
)

#: Columns left out first when the table is too narrow; tile, state and reason always stay.
DROP_ORDER = ("agreement", "predicted", "image", "who", "ranked by", "rank")
#: Columns of a table cell beyond its text (one space each side).
CELL_PADDING = 2


def fit_columns(
    rows: Sequence[Sequence[str]], *, width: int, columns: Sequence[str] = QUEUE_COLUMNS
) -> tuple[int, ...]:
    """Which columns fit ``width`` terminal columns, dropping the least needed first.

    A column needs its longest text (heading or cell) plus :data:`CELL_PADDING`. While
    the total is wider than ``width``, the next column of :data:`DROP_ORDER` is left out;
    the rest keep their order. Tile, state and reason always stay (the reason, last, is
    cut at the edge when even they do not fit).

    Parameters
    ----------
    rows : sequence of sequence of str
        The cell texts of every row, in ``columns`` order.
    width : int
        Terminal columns the table may use; 0 or less keeps every column (not laid
        out yet).
    columns : sequence of str
        The headings.

    Returns
    -------
    tuple of int
        Positions of the columns kept, ascending.
    """
    keep = list(range(len(columns)))
    if width <= 0:
        return tuple(keep)
    need = [len(h) for h in columns]
    for r in rows:
        for k, text in enumerate(r):
            need[k] = max(need[k], len(text))
    for name in DROP_ORDER:
        if sum(need[k] + CELL_PADDING for k in keep) <= width:
            break
        if name in columns:
            keep.remove(list(columns).index(name))
    return tuple(keep)


#: Annotator filter value for tiles nobody holds or has saved.
NOBODY = "(nobody yet)"

#: Smallest predicted share of a class for the class filter to count the tile.
MIN_CLASS_SHARE = 0.01


@dataclass(frozen=True)
class RowFilter:
    """Which queue rows to show; ``None`` in a field means "do not filter on this".

    Attributes
    ----------
    state : str or None
        Keep rows in this tile state (one of :data:`labeler.states.STATES`).
    class_name : str or None
        Keep rows whose proposal predicts at least ``min_share`` of this class.
        Rows without a proposal are dropped by this filter.
    annotator : str or None
        Keep rows held or saved by this annotator; :data:`NOBODY` keeps rows that no
        one holds or has saved.
    min_share : float
        Threshold of the class filter, 0..1.
    """

    state: str | None = None
    class_name: str | None = None
    annotator: str | None = None
    min_share: float = MIN_CLASS_SHARE

    def __post_init__(self) -> None:
        if self.state is not None and self.state not in STATES:
            raise ValueError(
                f"state: expected one of {', '.join(STATES)} or None, got {self.state!r}"
            )
        if not 0.0 <= self.min_share <= 1.0:
            raise ValueError(f"min_share: expected a share in 0..1, got {self.min_share}")


def _class_share(row: QueueRow, class_name: str, schema: ClassSchema) -> float | None:
    if row.class_fractions is None:
        return None
    position = schema.names.index(class_name)
    if position >= len(row.class_fractions):
        return None
    return float(row.class_fractions[position])


def keep_row(row: QueueRow, flt: RowFilter, *, schema: ClassSchema) -> bool:
    """True if ``row`` passes every set field of ``flt``.

    Parameters
    ----------
    row : QueueRow
        One tile of the queue.
    flt : RowFilter
        The filters set on the screen (``None`` fields are not applied).
    schema : ClassSchema
        The project's classes (for the class filter).

    Returns
    -------
    bool

    Raises
    ------
    KeyError
        If ``flt.class_name`` is not a class of ``schema`` (the message lists them).
    """
    if flt.state is not None and row.state != flt.state:
        return False
    if flt.class_name is not None:
        schema.by_name(flt.class_name)  # raises naming the known classes
        share = _class_share(row, flt.class_name, schema)
        if share is None or share < flt.min_share:
            return False
    if flt.annotator is not None:
        people = set(row.saved_by) | ({row.held_by} if row.held_by else set())
        if flt.annotator == NOBODY:
            return not people
        return flt.annotator in people
    return True


def filter_rows(
    rows: Iterable[QueueRow], flt: RowFilter, *, schema: ClassSchema
) -> list[QueueRow]:
    """The rows that pass ``flt``, in their given (queue) order.

    Parameters
    ----------
    rows : iterable of QueueRow
        The queue.
    flt : RowFilter
        The filters set on the screen.
    schema : ClassSchema
        The project's classes.

    Returns
    -------
    list of QueueRow
        The rows :func:`keep_row` keeps.

    Raises
    ------
    KeyError
        If ``flt.class_name`` is not a class of ``schema``.
    """
    return [r for r in rows if keep_row(r, flt, schema=schema)]


def format_shares(
    fractions: Sequence[float] | None,
    *,
    schema: ClassSchema,
    skip_background: bool = True,
    top: int = 3,
) -> str:
    """Compact predicted class shares, largest first: ``"crop 41% weed 7%"``.

    Parameters
    ----------
    fractions : sequence of float or None
        Share of each class in schema index order (the proposal's class fractions).
        ``None`` (no proposal) gives ``"-"``.
    schema : ClassSchema
    skip_background : bool
        Leave out index 0 (soil): what is left of 100 % is soil.
    top : int
        At most this many classes; shares that round to 0 % are left out.

    Returns
    -------
    str
        ``"-"`` without fractions, ``"none"`` when no listed class reaches 0.5 %.
    """
    if fractions is None:
        return "-"
    if len(fractions) != len(schema):
        raise ValueError(
            f"fractions: expected {len(schema)} shares (one per class of {schema!r}), "
            f"got {len(fractions)}"
        )
    pairs = [
        (float(f), c.name)
        for f, c in zip(fractions, schema.classes, strict=True)
        if not (skip_background and c.index == 0)
    ]
    pairs.sort(key=lambda p: -p[0])
    parts = [f"{name} {round(100 * f):d}%" for f, name in pairs[:top] if round(100 * f) > 0]
    return " ".join(parts) if parts else "none"


def format_number(value: float | None, digits: int = 3) -> str:
    """``value`` with ``digits`` decimals; ``None`` and NaN give ``"-"``.

    Parameters
    ----------
    value : float or None
        The figure.
    digits : int
        Decimals shown.

    Returns
    -------
    str
    """
    if value is None or math.isnan(float(value)):
        return "-"
    return f"{float(value):.{digits}f}"


def format_who(row: QueueRow) -> str:
    """Who holds the tile and who saved it: ``"ana (open) bo"``; ``""`` for no one.

    Parameters
    ----------
    row : QueueRow
        One tile of the queue.

    Returns
    -------
    str
        The holder first (``"(open)"``, ``"(open, saved)"`` when they saved it too), then
        the others who saved it.
    """
    parts = []
    if row.held_by:
        parts.append(f"{row.held_by} (open)")
    parts += [name for name in row.saved_by if name != row.held_by]
    if row.held_by and row.held_by in row.saved_by:
        parts[0] = f"{row.held_by} (open, saved)"
    return " ".join(parts)


#: The picker's reason for a contested tile (contested tiles come first in the queue).
DISAGREE = "annotators disagree"


def _falls(scores: Sequence[float]) -> bool:
    """True if ``scores`` never rise from one to the next (NaN counts as a rise)."""
    return all(b <= a for a, b in zip(scores[:-1], scores[1:], strict=True))


def ranking_notes(rows: Iterable[QueueRow]) -> dict[int, str]:
    """What each picked tile's rank follows: the "ranked by" cell of the queue.

    The picker's queue has three parts, in this order: contested tiles (reason
    :data:`DISAGREE`, ranked by their disagreement ``1 - agreement``), the batch, and the
    other candidates. A part whose scores fall (or stay equal) from rank to rank is ranked
    by its score, and the cell is that score. A part whose scores rise somewhere was
    ranked by the order of picking -- a spread batch picks each tile unlike the tiles
    picked before it, weighing its score by that distance -- and each cell starts with
    the tile's place in that order: ``"pick 2 · 25.480"``. Contested tiles read
    ``"disagree 0.420"``. So no cell claims an order its figures do not follow.

    Parameters
    ----------
    rows : iterable of QueueRow
        The whole queue (not a filtered part of it: the parts are judged on every rank).

    Returns
    -------
    dict of int to str
        Tile id -> cell text, for the tiles with a rank and a score.
    """
    ranked = sorted((r for r in rows if r.rank is not None and r.score is not None),
                    key=lambda r: r.rank)
    parts: dict[str, list[QueueRow]] = {"contested": [], "batch": [], "rest": []}
    for r in ranked:
        part = "contested" if r.reason == DISAGREE else ("batch" if r.in_batch else "rest")
        parts[part].append(r)
    notes: dict[int, str] = {}
    for part, members in parts.items():
        by_score = _falls([float(r.score) for r in members])
        for place, r in enumerate(members, start=1):
            figure = format_number(r.score)
            if part == "contested":
                notes[r.tile_id] = f"disagree {figure}"
            elif by_score:
                notes[r.tile_id] = figure
            else:
                notes[r.tile_id] = f"pick {place} \u00b7 {figure}"
    return notes


def queue_cells(
    row: QueueRow, *, schema: ClassSchema, ranked_by: str | None = None
) -> tuple[str, ...]:
    """The texts of one table row, in :data:`QUEUE_COLUMNS` order.

    The rank is counted from 1 (``"-"``: not picked yet); the agreement column is empty
    for tiles with one annotator, ``"overlap"`` for an overlap tile still waiting for its
    second mask. The tile's position in its image is in the preview caption.

    Parameters
    ----------
    row : QueueRow
        One tile of the queue.
    schema : ClassSchema
        The project's classes (for the predicted class shares).
    ranked_by : str, optional
        The "ranked by" cell (:func:`ranking_notes` over the whole queue); default: the
        picker's score alone.

    Returns
    -------
    tuple of str
        Rank, tile, image, state, who, class shares, agreement, ranked by, reason.
    """
    agreement = format_number(row.agreement) if row.overlap else ""
    if row.overlap and row.agreement is None:
        agreement = "overlap"
    return (
        "-" if row.rank is None else str(row.rank + 1),
        str(row.tile_id),
        row.image,
        row.state,
        format_who(row),
        format_shares(row.class_fractions, schema=schema),
        agreement,
        format_number(row.score) if ranked_by is None else ranked_by,
        row.reason or "",
    )


def preview_caption(view: TileView) -> str:
    """The caption of the tile preview: the tile, where it lies and which mask is shown.

    Parameters
    ----------
    view : TileView
        What :func:`labeler.workflow.tile_view` returned.

    Returns
    -------
    str
        E.g. ``"tile 7 · plot-a r0 c224 · proposal of head-2"``.
    """
    if view.shows == "saved":
        what = f"saved by {view.saved_by} (v{view.saved_version}, {view.saved_state})"
    elif view.shows == "proposal":
        what = f"proposal of {view.model or 'a model'}"
    else:
        what = "no proposal yet"
    return f"tile {view.tile_id} · {view.image} r{view.row} c{view.col} · {what}"
