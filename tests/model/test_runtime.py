import pytest
import torch

from labeler.model.runtime import available_cores, configure_threads, inference


def test_configure_threads_zero_means_all_cores():
    before = torch.get_num_threads()
    try:
        assert configure_threads(0) == available_cores()
        assert configure_threads(1) == 1
        assert torch.get_num_threads() == 1
    finally:
        torch.set_num_threads(before)


def test_configure_threads_rejects_negative():
    with pytest.raises(ValueError, match=r"threads: expected 0 \(all cores\).*got -1"):
        configure_threads(-1)


def test_inference_context_disables_grad():
    w = torch.ones(2, requires_grad=True)
    with inference():
        y = w * 2
    assert not y.requires_grad
    assert torch.is_inference(y)
