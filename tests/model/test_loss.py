"""The training loss: partial cross-entropy and inverse square-root class weights."""

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from labeler.model.loss import class_weights, partial_cross_entropy


def test_class_weights_follow_the_formula():
    counts = np.array([840, 120, 40, 0])
    f = counts[:3] / 1000
    # inverse sqrt frequency scaled to mean weight 1 per labelled pixel (common practice, no source)
    want = f**-0.5 / np.sqrt(f).sum()
    got = class_weights(counts)
    np.testing.assert_allclose(got[:3], want, rtol=1e-12)
    assert got[3] == 1.0
    assert float((f * got[:3]).sum()) == pytest.approx(1.0, abs=1e-12)
    # a rare class: 1e4 / (1 + 1e-4) before clipping to 10; the common one stays ~1
    np.testing.assert_allclose(class_weights(np.array([10**8, 1])), [1 / (1 + 1e-4), 10.0])
    np.testing.assert_array_equal(class_weights(np.zeros(3)), np.ones(3))


def test_partial_cross_entropy_ignores_unlabelled_pixels():
    rng = np.random.default_rng(0)
    logits = torch.from_numpy(rng.normal(size=(1, 3, 2, 3)))
    target = torch.tensor([[[0, 255, 2], [1, 255, 255]]])
    w = torch.tensor([1.0, 2.0, 0.5], dtype=torch.float64)
    # slow reference: sum_i w[y_i] * -log softmax(x_i)[y_i] / sum_i w[y_i] over labelled i
    num = den = 0.0
    for r in range(2):
        for c in range(3):
            y = int(target[0, r, c])
            if y == 255:
                continue
            logp = F.log_softmax(logits[0, :, r, c], dim=0)[y]
            num += float(w[y] * -logp)
            den += float(w[y])
    assert float(partial_cross_entropy(logits, target, w)) == pytest.approx(num / den, rel=1e-12)
    assert partial_cross_entropy(logits, torch.full_like(target, 255), w) is None


@pytest.mark.parametrize("shape", [(8, 12), (7, 10)])
def test_cell_cross_entropy_against_a_slow_loop(shape):
    from labeler.model.loss import cell_cross_entropy

    rng = np.random.default_rng(1)
    h, w = shape
    h4, w4 = -(-h // 4), -(-w // 4)
    logits = torch.from_numpy(rng.normal(size=(2, 3, h4, w4)))
    target = torch.from_numpy(rng.integers(0, 3, (2, h, w)))
    target[rng.random((2, h, w)) < 0.3] = 255
    wt = torch.tensor([0.5, 1.0, 3.0], dtype=torch.float64)
    # slow reference: every labelled pixel scored with the logits of its 4 x 4 cell
    num = den = 0.0
    for n in range(2):
        for r in range(h):
            for c in range(w):
                y = int(target[n, r, c])
                if y == 255:
                    continue
                logp = F.log_softmax(logits[n, :, r // 4, c // 4], dim=0)[y]
                num += float(wt[y] * -logp)
                den += float(wt[y])
    got = cell_cross_entropy(logits, target, wt)
    assert float(got) == pytest.approx(num / den, rel=1e-12)
    # equal to the pixel loss of the logits repeated over their cells (nearest upsampling)
    near = logits.repeat_interleave(4, dim=2).repeat_interleave(4, dim=3)[:, :, :h, :w]
    assert float(got) == pytest.approx(float(partial_cross_entropy(near, target, wt)), rel=1e-12)
    assert cell_cross_entropy(logits, torch.full_like(target, 255), wt) is None


def test_cell_cross_entropy_refuses_another_grid():
    from labeler.model.loss import cell_cross_entropy

    with pytest.raises(
        ValueError, match=r"logits: expected a grid of ceil\(8 / 4\) x ceil\(8 / 4\) cells"
    ):
        cell_cross_entropy(
            torch.zeros(1, 2, 3, 2), torch.zeros(1, 8, 8, dtype=torch.long), torch.ones(2)
        )
