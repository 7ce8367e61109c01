import os

import pytest

from labeler.model import cpuload
from labeler.model.cpuload import CpuTimes, busy_between, busy_cores, parse_cpu_line

# The example "cpu" line of the proc(5) manual page, section /proc/stat.
PROC5_LINE = "cpu  10132153 290696 3084719 46828483 16683 0 25195 0 175628 0"


def test_parse_cpu_line_of_the_manual_example():
    times = parse_cpu_line(PROC5_LINE)
    # busy = user + system + irq + softirq + steal = 10132153 + 3084719 + 0 + 25195 + 0
    assert times == CpuTimes(busy=13242067, nice=290696)


def test_parse_cpu_line_of_an_old_kernel_counts_missing_columns_as_zero():
    # kernels before 2.6.11 give user, nice, system, idle only (proc(5))
    assert parse_cpu_line("cpu 5 6 7 8") == CpuTimes(busy=12, nice=6)


@pytest.mark.parametrize("line", ["cpu0 1 2 3 4", "intr 1 2 3 4", "cpu 1 2", ""])
def test_parse_cpu_line_rejects_other_lines(line):
    with pytest.raises(ValueError, match=r"line: expected the 'cpu' line of /proc/stat"):
        parse_cpu_line(line)


def test_parse_cpu_line_rejects_non_numbers():
    with pytest.raises(ValueError, match=r"line: expected whole numbers after 'cpu'"):
        parse_cpu_line("cpu 1 2 x 4")


def test_busy_between_subtracts_own_time():
    # worked by hand: 100 ticks/s, 0.5 s apart; 80 busy + 40 nice jiffies = 1.2
    # CPU-seconds, of which this process used 0.7: others kept 0.5 CPU-seconds busy in
    # 0.5 s = 1 core.
    got = busy_between(
        CpuTimes(1000, 50),
        CpuTimes(1080, 90),
        own_seconds=0.7,
        wall_seconds=0.5,
        clock_ticks=100,
    )
    assert got == pytest.approx(1.0, abs=1e-12)


def test_busy_between_is_never_negative():
    # own CPU time read a little later than the kernel's counters can exceed them
    got = busy_between(
        CpuTimes(0, 0),
        CpuTimes(10, 0),
        own_seconds=0.2,
        wall_seconds=0.1,
        clock_ticks=100,
    )
    assert got == 0.0


def test_busy_between_rejects_a_zero_interval():
    with pytest.raises(ValueError, match=r"wall_seconds, clock_ticks: expected positive"):
        busy_between(
            CpuTimes(0, 0),
            CpuTimes(1, 0),
            own_seconds=0.0,
            wall_seconds=0.0,
            clock_ticks=100,
        )


def test_busy_cores_reads_a_counters_file(tmp_path, monkeypatch):
    stat = tmp_path / "stat"
    lines = iter(["cpu 100 0 0 900 0 0 0 0\n", "cpu 100 0 0 950 0 0 0 0\n"])

    real_read = cpuload._read

    def read(path):
        stat.write_text(next(lines))
        return real_read(path)

    monkeypatch.setattr(cpuload, "_read", read)
    # no busy jiffies between the readings: nobody else is busy
    assert busy_cores(seconds=0.01, stat=stat) == 0.0


def test_busy_cores_without_counters_is_none(tmp_path):
    assert busy_cores(seconds=0.0, stat=tmp_path / "absent") is None


@pytest.mark.skipif(not os.path.exists("/proc/stat"), reason="no /proc/stat on this system")
def test_busy_cores_on_this_machine_is_within_its_cores():
    got = busy_cores(seconds=0.05)
    assert got is not None and 0.0 <= got <= os.cpu_count() + 0.5
