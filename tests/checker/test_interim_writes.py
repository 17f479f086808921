"""The interim results.json is rewritten at a bounded share of the run's time."""
from __future__ import annotations

from reconaudit.checker.runner import InterimWrites


class FakeClock:
    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def test_first_series_is_written_then_writes_wait_for_the_interval():
    clock = FakeClock()
    writes = InterimWrites(min_interval_s=5.0, cost_factor=20.0, clock=clock)
    assert writes.due()
    writes.write(lambda: None)
    clock.now = 4.9
    assert not writes.due()
    clock.now = 5.0
    assert writes.due()


def test_a_slow_rewrite_spaces_the_next_ones_by_its_cost():
    clock = FakeClock()
    writes = InterimWrites(min_interval_s=5.0, cost_factor=20.0, clock=clock)

    def slow_write() -> None:  # a results.json of thousands of series: 2 s to write
        clock.now += 2.0

    writes.write(slow_write)
    clock.now += 39.0
    assert not writes.due()
    clock.now += 1.0
    assert writes.due()


def test_thousands_of_quick_series_cost_few_rewrites():
    clock = FakeClock()
    writes = InterimWrites(min_interval_s=5.0, cost_factor=20.0, clock=clock)
    n_writes = 0

    def write() -> None:
        nonlocal n_writes
        n_writes += 1
        clock.now += 0.001 * n_writes  # the document grows with every rewrite

    for _ in range(5000):  # one series finishing every 0.1 s
        clock.now += 0.1
        if writes.due():
            writes.write(write)
    assert 1 < n_writes <= 5000 * 0.1 / 5.0 + 1
    spent = sum(0.001 * k for k in range(1, n_writes + 1))
    assert spent <= 0.06 * clock.now
