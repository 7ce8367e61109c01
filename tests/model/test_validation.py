"""Validation of head training and the early-stopping rule."""

import math

import numpy as np
import pytest
import torch

from labeler.model.head import HeadConfig, ProposalHead, features_to_tensors
from labeler.model.validation import VALIDATION_BATCH, early_stopping, iou_from, validate

# -- the stopping rule on hand-made loss sequences ----------------------------------------------
# Rule: an epoch is better only with a strictly lower loss; stop once `patience` epochs in a
# row were not better (Goodfellow, Bengio & Courville 2016, Deep Learning, algorithm 7.1,
# from memory). Every expected value below is worked by hand from that rule.
LOSSES = [1.0, 0.8, 0.9, 0.85, 0.7, 0.75, 0.76, 0.77]


@pytest.mark.parametrize(
    ("epochs", "patience", "want"),
    [
        (1, 2, (1, False)),  # one epoch: it is the best
        (2, 2, (2, False)),  # 0.8 < 1.0
        (3, 2, (2, False)),  # 0.9 is worse: one stale epoch
        (4, 2, (2, True)),  # 0.85 is worse than 0.8 too: two stale epochs, stop
        (4, 3, (2, False)),  # a patience of 3 runs on ...
        (5, 3, (5, False)),  # ... and 0.7 improves
        (7, 3, (5, False)),  # 0.75 and 0.76: two stale epochs
        (8, 3, (5, True)),  # 0.77: the third, stop with epoch 5 kept
    ],
)
def test_early_stopping_on_a_hand_made_sequence(epochs, patience, want):
    assert early_stopping(LOSSES[:epochs], patience=patience) == want


def test_patience_one_stops_at_the_first_epoch_that_does_not_improve():
    # the earliest prefix that says "stop" is the stopping epoch: 3 (0.9 after 0.8)
    stops = [e for e in range(1, 9) if early_stopping(LOSSES[:e], patience=1)[1]]
    assert stops[0] == 3


def test_equal_losses_do_not_improve():
    assert early_stopping([0.5, 0.5], patience=2) == (1, False)
    assert early_stopping([0.5, 0.5, 0.5], patience=2) == (1, True)


def test_nan_losses_never_improve():
    assert early_stopping([], patience=1) == (0, False)
    assert early_stopping([math.nan, math.nan], patience=3) == (0, False)
    assert early_stopping([math.nan, 0.4, math.nan], patience=2) == (2, False)
    assert early_stopping([math.nan, 0.4, math.nan, math.nan], patience=2) == (2, True)


def test_early_stopping_rejects_a_patience_below_one():
    with pytest.raises(ValueError, match="patience: expected at least 1 epoch, got 0"):
        early_stopping([1.0], patience=0)


# -- validate and iou_from ----------------------------------------------------------------------
def test_iou_from_a_hand_made_confusion_matrix():
    # IoU_k = cm[k, k] / (row k + column k - cm[k, k]) (Long et al. 2015), worked by hand:
    # class 0: 2 / (3 + 3 - 2) = 0.5; class 1: 4 / (5 + 5 - 4) = 2 / 3
    np.testing.assert_allclose(iou_from(np.array([[2, 1], [1, 4]])), [0.5, 2 / 3], atol=1e-12)
    # class 1 never in the truth (row of zeros): NaN, not 0
    got = iou_from(np.array([[3, 1], [0, 0]]))
    assert got[0] == pytest.approx(0.75, abs=1e-12) and math.isnan(got[1])
    assert iou_from(None).shape == (0,)


def test_validate_equals_a_slow_per_pixel_reference():
    rng = np.random.default_rng(0)
    n = VALIDATION_BATCH + 1  # two batches: the sums must combine exactly
    feats = [
        tuple(
            rng.standard_normal((c, 32 // s, 32 // s)).astype(np.float16)
            for c, s in zip((24, 40, 112, 320), (4, 8, 16, 32), strict=True)
        )
        for _ in range(n)
    ]
    masks = [rng.integers(0, 3, (32, 32)).astype(np.uint8) for _ in range(n)]
    for m in masks:
        m[rng.random((32, 32)) < 0.3] = 255  # unlabelled pixels count for nothing
    cfg = HeadConfig(class_indices=(0, 1, 2), width=8)
    torch.manual_seed(0)
    head = ProposalHead(cfg).train()
    weight = torch.tensor([0.5, 1.0, 2.0])
    loss, cm = validate(head, feats, masks, {(32, 32): list(range(n))}, weight, cfg)
    assert not head.training
    num = den = 0.0
    want_cm = np.zeros((3, 3), np.int64)
    with torch.no_grad():
        for f, m in zip(feats, masks, strict=True):  # one tile at a time
            logp = torch.log_softmax(head(features_to_tensors([f]), size=(32, 32))[0], dim=0)
            pred = logp.argmax(dim=0).numpy()
            for r in range(32):
                for c in range(32):
                    y = int(m[r, c])
                    if y == 255:
                        continue
                    num += float(weight[y]) * -float(logp[y, r, c])
                    den += float(weight[y])
                    want_cm[y, pred[r, c]] += 1
    assert loss == pytest.approx(num / den, rel=1e-5)
    np.testing.assert_array_equal(cm, want_cm)


def test_validate_without_validation_tiles():
    head = ProposalHead(HeadConfig(class_indices=(0, 1), width=8))
    loss, cm = validate(head, [], [], {}, torch.ones(2), head.config)
    assert math.isnan(loss) and cm is None
