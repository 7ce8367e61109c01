import pytest
import torch

from labeler.model.dropout import LEVELS, ElementDropout, drop_threshold


def test_threshold_is_the_rounded_share_of_15_bit_values():
    # worked by hand: 0.2 * 32768 = 6553.6 -> 6554; 0.5 * 32768 = 16384
    assert drop_threshold(0.2) == 6554
    assert drop_threshold(0.5) == 16384
    assert drop_threshold(0.0) == 0


@pytest.mark.parametrize("p", [-0.1, 1.0, 1.5])
def test_threshold_rejects_probabilities_outside_0_1(p):
    with pytest.raises(ValueError, match=r"p: expected a dropout probability in \[0, 1\)"):
        drop_threshold(p)


def test_eval_mode_and_zero_p_are_the_identity():
    x = torch.randn(2, 3, 4, 4)
    d = ElementDropout(0.3).eval()
    assert d(x) is x
    assert ElementDropout(0.0).train()(x) is x


def test_kept_elements_are_scaled_and_the_rest_zero():
    torch.manual_seed(0)
    x = torch.full((4, 8, 16, 16), 2.0)
    y = ElementDropout(0.25).train()(x)
    scale = LEVELS / (LEVELS - drop_threshold(0.25))  # 4/3 exactly: 32768 / 24576
    values = torch.unique(y).tolist()
    assert len(values) == 2
    assert values[0] == 0.0 and values[1] == pytest.approx(2.0 * scale, rel=1e-6)


def test_drop_share_matches_p_within_binomial_noise():
    # 2**20 elements, p = 0.2: the dropped share has sd sqrt(p (1 - p) / n) = 3.9e-4;
    # 5 sd (common practice, no source)
    torch.manual_seed(1)
    y = ElementDropout(0.2).train()(torch.ones(1 << 20))
    share = float((y == 0).double().mean())
    assert abs(share - 6554 / 32768) < 5 * (0.2 * 0.8 / (1 << 20)) ** 0.5


def test_expected_output_equals_the_input():
    torch.manual_seed(2)
    y = ElementDropout(0.5).train()(torch.ones(1 << 20))
    assert float(y.double().mean()) == pytest.approx(1.0, abs=5 * (1 / (1 << 20)) ** 0.5)


def test_gradient_flows_through_the_kept_elements_only():
    torch.manual_seed(3)
    x = torch.ones(64, requires_grad=True)
    y = ElementDropout(0.5).train()(x)
    y.sum().backward()
    torch.testing.assert_close(x.grad, y.detach(), rtol=0, atol=0)  # x = 1: grad = mask * 2


def test_seeded_runs_repeat():
    x = torch.ones(1000)
    torch.manual_seed(4)
    a = ElementDropout(0.2).train()(x)
    torch.manual_seed(4)
    b = ElementDropout(0.2).train()(x)
    assert torch.equal(a, b)
