"""Cell texts of the queue table and the row filters, on hand-made rows."""

import numpy as np
import pytest

from labeler.classes import DEFAULT_SCHEMA
from labeler.tui.rows import (
    NOBODY,
    QUEUE_COLUMNS,
    RowFilter,
    filter_rows,
    format_number,
    format_shares,
    format_who,
    keep_row,
    preview_caption,
    queue_cells,
    ranking_notes,
)
from labeler.workflow.annotating import QueueRow
from labeler.workflow.views import TileView


def _row(tile_id, *, state="proposed", fractions=(0.52, 0.41, 0.07, 0.0), held_by=None,
         saved_by=(), overlap=False, agreement=None, rank=0, score=0.5, reason="uncertain",
         in_batch=True):
    return QueueRow(
        rank=rank, tile_id=tile_id, image="north-strip", row=0, col=224, score=score,
        reason=reason, class_fractions=fractions, state=state, held_by=held_by,
        saved_by=tuple(saved_by), overlap=overlap, agreement=agreement, in_batch=in_batch,
    )


def test_format_shares_largest_first_without_soil():
    assert format_shares((0.52, 0.41, 0.07, 0.0), schema=DEFAULT_SCHEMA) == "crop 41% weed 7%"
    assert format_shares((0.1, 0.2, 0.3, 0.4), schema=DEFAULT_SCHEMA) == (
        "symptom 40% weed 30% crop 20%"
    )
    assert format_shares((0.1, 0.2, 0.3, 0.4), schema=DEFAULT_SCHEMA, top=1) == "symptom 40%"
    assert format_shares((0.9, 0.1, 0.0, 0.0), schema=DEFAULT_SCHEMA,
                         skip_background=False) == "soil 90% crop 10%"


def test_format_shares_edge_cases():
    assert format_shares(None, schema=DEFAULT_SCHEMA) == "-"
    assert format_shares((0.996, 0.004, 0.0, 0.0), schema=DEFAULT_SCHEMA) == "none"
    with pytest.raises(ValueError, match="fractions: expected 4 shares .* got 3"):
        format_shares((0.5, 0.5, 0.0), schema=DEFAULT_SCHEMA)


def test_format_number_and_who():
    assert format_number(0.123456) == "0.123"
    assert format_number(None) == "-" and format_number(float("nan")) == "-"
    assert format_who(_row(1)) == ""
    assert format_who(_row(1, held_by="ana")) == "ana (open)"
    assert format_who(_row(1, saved_by=("bo", "cy"))) == "bo cy"
    assert format_who(_row(1, held_by="ana", saved_by=("ana", "bo"))) == "ana (open, saved) bo"


def test_queue_cells_exact():
    cells = queue_cells(_row(7, rank=2, score=1.5), schema=DEFAULT_SCHEMA)
    assert len(cells) == len(QUEUE_COLUMNS)
    assert cells == ("3", "7", "north-strip", "proposed", "", "crop 41% weed 7%", "", "1.500",
                     "uncertain")
    without_proposal = queue_cells(_row(8, rank=None, score=None, reason=None, overlap=True),
                           schema=DEFAULT_SCHEMA)
    assert without_proposal[0] == "-" and without_proposal[7] == "-" and without_proposal[8] == ""
    assert without_proposal[QUEUE_COLUMNS.index("agreement")] == "overlap"
    agreed = queue_cells(_row(9, overlap=True, agreement=0.4321), schema=DEFAULT_SCHEMA)
    assert agreed[QUEUE_COLUMNS.index("agreement")] == "0.432"


def test_filters():
    rows = [
        _row(1, state="proposed"),
        _row(2, state="accepted", saved_by=("ana",)),
        _row(3, state="parked", fractions=(0.995, 0.005, 0.0, 0.0)),
        _row(4, state="held", held_by="bo", fractions=None),
        _row(5, state="amended", saved_by=("bo",), fractions=(0.5, 0.0, 0.5, 0.0)),
    ]
    schema = DEFAULT_SCHEMA
    ids = lambda flt: [r.tile_id for r in filter_rows(rows, flt, schema=schema)]  # noqa: E731
    assert ids(RowFilter()) == [1, 2, 3, 4, 5]
    assert ids(RowFilter(state="accepted")) == [2]
    assert ids(RowFilter(state="unseen")) == []
    # class filter: at least 1 % predicted; rows without a proposal drop out
    assert ids(RowFilter(class_name="crop")) == [1, 2]
    assert ids(RowFilter(class_name="crop", min_share=0.005)) == [1, 2, 3]
    assert ids(RowFilter(class_name="weed")) == [1, 2, 5]
    assert ids(RowFilter(annotator="bo")) == [4, 5]
    assert ids(RowFilter(annotator=NOBODY)) == [1, 3]
    assert ids(RowFilter(state="amended", annotator="bo", class_name="weed")) == [5]
    assert ids(RowFilter(state="amended", annotator="ana")) == []


def test_filter_errors():
    with pytest.raises(ValueError, match="state: expected one of unseen, proposed"):
        RowFilter(state="finished")
    with pytest.raises(ValueError, match="min_share: expected a share in 0..1, got 2"):
        RowFilter(min_share=2)
    with pytest.raises(KeyError, match="class 'grass' is not in the schema"):
        keep_row(_row(1), RowFilter(class_name="grass"), schema=DEFAULT_SCHEMA)


def test_preview_caption_says_which_mask_is_shown():
    rgb = np.zeros((2, 2, 3), np.uint8)
    place = dict(tile_id=7, image="north-strip", row=0, col=224, rgb=rgb)
    saved = TileView(**place, mask=np.zeros((2, 2), np.uint8), shows="saved", saved_by="ines",
                     saved_version=3, saved_state="amended")
    assert preview_caption(saved) == "tile 7 · north-strip r0 c224 · saved by ines (v3, amended)"
    proposal = TileView(**place, mask=np.zeros((2, 2), np.uint8), shows="proposal",
                        model="head-2")
    assert preview_caption(proposal).endswith("· proposal of head-2")
    nameless = TileView(**place, mask=np.zeros((2, 2), np.uint8), shows="proposal")
    assert preview_caption(nameless).endswith("· proposal of a model")
    assert preview_caption(TileView(**place, mask=None, shows="nothing")).endswith(
        "· no proposal yet"
    )


def test_fit_columns_drops_the_least_needed_first():
    from labeler.tui.rows import CELL_PADDING, DROP_ORDER, fit_columns

    row = ("12", "345", "brackenlow-north", "contested", "ana bo", "crop 40% weed 3%",
           "0.412", "17.07", "unlike labelled tiles")
    # by hand: needs are max(heading, cell) + 2 = 6, 6, 18, 11, 8, 18, 11, 11, 23 = 112
    # ("ranked by" is wider than its cell here)
    assert fit_columns([row], width=112) == tuple(range(9))
    assert fit_columns([row], width=111) == (0, 1, 2, 3, 4, 5, 7, 8)  # agreement goes
    assert fit_columns([row], width=100) == (0, 1, 2, 3, 4, 7, 8)  # then predicted (101)
    assert fit_columns([row], width=0) == tuple(range(9))  # not laid out yet
    # the narrowest: tile, state and reason stay whatever the width
    assert fit_columns([row], width=10) == (1, 3, 8)
    assert DROP_ORDER[0] == "agreement" and CELL_PADDING == 2


def test_ranking_notes_say_what_each_part_of_the_queue_is_ranked_by():
    # hand-made queue of the three parts the picker writes: two contested tiles (score
    # 1 - agreement, falling), a spread batch whose scores rise at rank 4 (17.07 then
    # 25.48, as a weighted spread pick can order them), and candidates after the batch by
    # score; a tile outside the pick has no note
    rows = [
        _row(11, rank=0, score=0.7, reason="annotators disagree"),
        _row(12, rank=1, score=0.45, reason="annotators disagree"),
        _row(13, rank=2, score=17.07, reason="rare class"),
        _row(14, rank=3, score=25.48, reason="unlike labelled tiles"),
        _row(15, rank=4, score=9.5, in_batch=False),
        _row(16, rank=5, score=9.5, in_batch=False),
        _row(17, rank=None, score=None, reason=None, in_batch=False),
    ]
    notes = ranking_notes(reversed(rows))  # the order given does not matter: ranks do
    assert notes == {
        11: "disagree 0.700",
        12: "disagree 0.450",
        13: "pick 1 \u00b7 17.070",
        14: "pick 2 \u00b7 25.480",
        15: "9.500",
        16: "9.500",  # ties fall "or stay equal": still ranked by score
    }
    cells = queue_cells(rows[3], schema=DEFAULT_SCHEMA, ranked_by=notes[14])
    assert cells[QUEUE_COLUMNS.index("ranked by")] == "pick 2 \u00b7 25.480"
    assert queue_cells(rows[6], schema=DEFAULT_SCHEMA)[QUEUE_COLUMNS.index("ranked by")] == "-"


def test_ranking_notes_of_a_batch_ranked_by_its_score_are_the_scores():
    rows = [_row(i, rank=i, score=s) for i, s in enumerate((0.91, 0.9, 0.9, 0.2))]
    assert ranking_notes(rows) == {0: "0.910", 1: "0.900", 2: "0.900", 3: "0.200"}


def test_ranking_notes_never_show_plain_scores_that_rise_with_rank():
    # property over many random queues: within each part, the plain-number cells fall
    rng = np.random.default_rng(3)
    for _ in range(200):
        n = int(rng.integers(1, 9))
        scores = rng.choice([0.1, 0.5, 2.0, 7.5], size=n)
        batch = rng.random(n) < 0.5
        rows = [_row(i, rank=i, score=float(s), in_batch=bool(b))
                for i, (s, b) in enumerate(zip(scores, batch, strict=True))]
        notes = ranking_notes(rows)
        for part in (True, False):
            texts = [notes[r.tile_id] for r in rows if r.in_batch == part]
            if texts and not texts[0].startswith("pick"):
                values = [float(t) for t in texts]
                assert values == sorted(values, reverse=True)
            else:
                assert [t.split(" ")[1] for t in texts] == [str(k) for k in
                                                            range(1, len(texts) + 1)]
