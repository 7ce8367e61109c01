"""The annotation-effort benchmark's own arithmetic: picked counts, run summaries, the
README table and the plot (hand-made runs; common practice, no source)."""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from PIL import Image

from benchmarks.annotation_effort import markdown_table, picked_counts, plot, summarise_runs


def test_picked_counts_round_and_rise():
    assert picked_counts(80, (0.05, 0.10, 0.20), least=3) == [4, 8, 16]


def test_picked_counts_exact_small_pool():
    # 20 tiles: 1 -> least 3; 2 -> must rise above 3 -> 4; 4 -> 4 is not above 4 -> 5
    assert picked_counts(20, (0.05, 0.10, 0.20), least=3) == [3, 4, 5]


@pytest.mark.parametrize(
    ("shares", "n", "match"),
    [((0.2, 0.1), 80, r"shares: expected increasing shares in \(0, 1\]"),
     ((0.0, 0.1), 80, r"shares: expected increasing shares"),
     ((0.5, 1.0), 3, r"shares: 1.0 of 3 pool tiles needs 4 tiles; use a larger pool")],
)
def test_picked_counts_errors(shares, n, match):
    with pytest.raises(ValueError, match=match):
        picked_counts(n, shares, least=3)


def _run(*ious):
    return SimpleNamespace(ious=tuple(ious))


def test_summarise_runs_counts_actions_to_090_with_the_cap():
    runs = [_run(0.95), _run(0.2, 0.5, 0.91), _run(*([0.1] * 25))]
    s = summarise_runs(runs)
    # 0 actions, 2 actions, never: 20 (the cap)
    assert s == {"mean": round((0 + 2 + 20) / 3, 2), "capped": 1, "tiles": 3, "accepted": 1,
                 "iou_start": round((0.95 + 0.2 + 0.1) / 3, 3),
                 "iou_at_cap": round((0.95 + 0.91 + 0.1) / 3, 3),
                 # to 0.85: 0 actions, 2 actions (0.5 < 0.85 <= 0.91), never: 20
                 "noc85_mean": round((0 + 2 + 20) / 3, 2), "noc85_capped": 1}
    with_bounds = summarise_runs(runs, bounds=[1.0, 0.8, 0.3])
    assert with_bounds == {**s, "iou_20_regions_fixed": round(2.1 / 3, 3)}


def _line(name):
    def s(mean, capped=0):
        return {"mean": mean, "capped": capped, "tiles": 4, "accepted": 0, "iou_at_cap": 0.9}

    return {"dataset": name, "noc90_empty": s(12.5, 1), "noc90_cold": s(8),
            "noc90_after": {"0.05": s(5), "0.10": s(3.25)},
            "noc90_after_guided": {"0.05": s(4), "0.10": s(2.5)},
            "accepted_share_after": {"0.05": 0.0, "0.10": 0.25},
            "guided_mode": "key", "tiles_measured": 4}


def test_markdown_table_has_a_row_per_start_and_a_column_per_dataset():
    text = markdown_table([_line("demo"), _line("peanut")])
    rows = text.splitlines()
    assert rows[0] == "| starting mask | demo | peanut |"
    assert rows[2] == "| empty | 12.5 (1/4 at 20; IoU 0.90) | 12.5 (1/4 at 20; IoU 0.90) |"
    assert "| after retraining on 10% | 3.25 (0/4 at 20; IoU 0.90) | 3.25 (0/4 at 20; IoU 0.90) |" in rows
    assert "| after 10%, with on-tile learning | 2.5 (0/4 at 20; IoU 0.90) | 2.5 (0/4 at 20; IoU 0.90) |" in rows
    assert "| after 10%: accepted unchanged | 25% | 25% |" in rows
    assert len(rows) == 2 + 2 + 3 * 2


def test_plot_writes_a_png(tmp_path):
    path = tmp_path / "effort.png"
    plot([_line("demo"), _line("peanut")], path)
    with Image.open(path) as im:
        assert im.format == "PNG" and im.size == (1200, 750)  # 6 x 7.5 in per dataset at 100 dpi


def test_start_class_ious_average_each_class_over_the_tiles_that_hold_it():
    import numpy as np

    from benchmarks.annotation_effort import start_class_ious

    a = np.array([[0, 0, 1, 1]], np.uint8)  # soil and crop
    b = np.array([[0, 2, 2, 255]], np.uint8)  # soil and weed; 255 never counts
    start_a = np.array([[0, 1, 1, 1]], np.uint8)  # soil 1/2, crop 2/3
    start_b = np.array([[0, 0, 2, 1]], np.uint8)  # soil 1/2, weed 1/2
    got = start_class_ious([a, b], [start_a, start_b], n_classes=3)
    # hand count: soil (1/2 + 1/2) / 2; crop 2/3 (tile a only); weed 1/2 (tile b only)
    assert got == {"0": 0.5, "1": round(2 / 3, 3), "2": 0.5}
    # None is an empty start (all soil): crop IoU 0, soil 2/4
    assert start_class_ious([a], [None], n_classes=3) == {"0": 0.5, "1": 0.0}
