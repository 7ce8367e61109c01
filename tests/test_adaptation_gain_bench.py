"""The adaptation-gain benchmark's bookkeeping: labelled draws, summaries, the plot.

Exact answers by hand; the sample standard deviation is checked against the statistics
module of the Python standard library (an outside reference implementation).
"""

from __future__ import annotations

import statistics

import numpy as np
import pytest

from benchmarks.adaptation_gain import STARTS, feature_spread, label_rows, main, plot, summarise


def test_label_rows_share_least_and_seed():
    assert len(label_rows(80, 0.05, 0)) == 4
    assert len(label_rows(80, 0.10, 0)) == 8
    assert len(label_rows(80, 0.25, 0)) == 20
    assert len(label_rows(40, 0.01, 0)) == 3  # at least three tiles
    assert len(label_rows(2, 0.5, 0)) == 2  # never more than the pool
    a, b = label_rows(80, 0.1, 1), label_rows(80, 0.1, 1)
    np.testing.assert_array_equal(a, b)
    assert len(set(a.tolist())) == 8 and (np.diff(a) > 0).all()
    assert not np.array_equal(label_rows(80, 0.1, 2), a)


def test_summarise_means_and_sample_sd():
    mean, sd = summarise({"imagenet_frozen": {"0.1": [0.5, 0.7, 0.6]}, "random": {"0.1": [0.2]}})
    assert mean == {"imagenet_frozen": {"0.1": 0.6}, "random": {"0.1": 0.2}}
    assert sd["imagenet_frozen"]["0.1"] == round(statistics.stdev([0.5, 0.7, 0.6]), 4) == 0.1
    assert sd["random"]["0.1"] is None  # one seed: no spread


def test_plot_writes_a_png(tmp_path):
    res = {
        "dataset": "demo",
        "miou": {"imagenet_frozen": {"0.05": 0.6, "0.25": 0.7}},
        "miou_sd": {"imagenet_frozen": {"0.05": None, "0.25": 0.01}},
        "adapt_budget_minutes": 2.0,
    }
    path = plot([res], tmp_path / "gain.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_unknown_start_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--starts", "imagenet_frozen,moco"])
    assert info.value.code == 2
    assert "--starts: unknown ['moco']" in capsys.readouterr().err
    assert STARTS[0] == "random" and "adapted_finetuned" in STARTS


def test_feature_spread_is_zero_for_a_collapsed_encoder():
    # pooled deepest features (1, 0) and (0, 3): unit vectors (1, 0) and (0, 1); the
    # population std across the two tiles is 0.5 in each channel (worked by hand)
    spread_out = [
        (np.zeros((4, 2, 2)), np.array([[[1.0, 1.0]], [[0.0, 0.0]]])),
        (np.zeros((4, 2, 2)), np.array([[[0.0, 0.0]], [[3.0, 3.0]]])),
    ]
    assert feature_spread(spread_out) == 0.5
    # every tile mapped to the same direction (a collapse), whatever the length
    collapsed = [(np.array([[[2.0]], [[2.0]]]),), (np.array([[[5.0]], [[5.0]]]),)]
    assert feature_spread(collapsed) == 0.0
