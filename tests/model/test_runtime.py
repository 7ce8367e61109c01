import pytest
import torch

from labeler.model import runtime
from labeler.model.runtime import available_cores, configure_threads, free_cores, inference


def test_configure_threads_zero_means_the_free_cores(monkeypatch):
    before = torch.get_num_threads()
    try:
        monkeypatch.setattr(runtime, "available_cores", lambda: 4)
        monkeypatch.setattr(runtime, "_busy_now", lambda: None)  # no kernel counters
        monkeypatch.setattr(runtime.os, "getloadavg", lambda: (2.7, 1.0, 1.0))
        assert configure_threads(0) == 2  # 4 cores, 2 busy by the load average
        assert configure_threads(1) == 1
        assert torch.get_num_threads() == 1
    finally:
        torch.set_num_threads(before)


@pytest.mark.parametrize(
    ("load", "want"),
    [
        # worked by hand for 4 cores: a core is busy per whole unit of load
        (0.0, 4),
        (0.99, 4),
        (1.0, 3),
        (3.5, 1),
        (9.0, 1),  # never fewer than one thread
        (float("nan"), 4),  # no information: every core
    ],
)
def test_free_cores_subtracts_whole_units_of_load(monkeypatch, load, want):
    monkeypatch.setattr(runtime, "available_cores", lambda: 4)
    assert free_cores(load=load) == want


def test_free_cores_without_a_load_average_is_every_core(monkeypatch):
    def no_load():
        raise OSError("no load average here")

    monkeypatch.setattr(runtime, "_busy_now", lambda: None)
    monkeypatch.setattr(runtime.os, "getloadavg", no_load)
    assert free_cores() == available_cores()


@pytest.mark.parametrize(
    ("busy", "want"),
    [
        # worked by hand for 4 cores: a measured core counts from half a core up
        (0.0, 4),
        (0.49, 4),
        (0.5, 3),
        (1.6, 2),
        (7.0, 1),  # never fewer than one thread
    ],
)
def test_free_cores_rounds_the_measured_busy_cores(monkeypatch, busy, want):
    monkeypatch.setattr(runtime, "available_cores", lambda: 4)
    monkeypatch.setattr(runtime, "_busy_now", lambda: busy)

    def no_load():  # the load average must not be asked when a reading exists
        raise AssertionError("load average read although the counters answered")

    monkeypatch.setattr(runtime.os, "getloadavg", no_load)
    assert free_cores() == want


def test_busy_reading_is_reused_within_its_lifetime(monkeypatch):
    readings = iter([1.0, 0.0])
    clock = iter([100.0, 100.0, 105.0, 111.0, 111.0])
    monkeypatch.setattr(runtime.cpuload, "busy_cores", lambda: next(readings))
    monkeypatch.setattr(runtime.time, "perf_counter", lambda: next(clock))
    monkeypatch.setattr(runtime, "_BUSY", [])
    assert runtime._busy_now() == 1.0  # read at t = 100
    assert runtime._busy_now() == 1.0  # t = 105: within BUSY_READING_SECONDS (10 s)
    assert runtime._busy_now() == 0.0  # t = 111: read again


def test_configure_threads_rejects_negative():
    with pytest.raises(ValueError, match=r"threads: expected 0 \(the free cores\).*got -1"):
        configure_threads(-1)


def test_inference_context_disables_grad():
    w = torch.ones(2, requires_grad=True)
    with inference():
        y = w * 2
    assert not y.requires_grad
    assert torch.is_inference(y)

