"""analyzers/parallel.py: two calls side by side only when asked and when two CPUs are free."""

import threading

import pytest

from latchwatch.analyzers import parallel


def _where():
    return threading.current_thread().name


@pytest.mark.parametrize(("large", "cpus", "threaded"), [(True, 2, True), (True, 1, False), (False, 4, False)])
def test_side_by_side_runs_in_two_threads_only_when_large_with_two_cpus(monkeypatch, large, cpus, threaded):
    monkeypatch.setattr(parallel, "usable_cpus", lambda: cpus)
    first, second = parallel.side_by_side(_where, _where, large=large, name="probe")
    assert (first.startswith("probe") and second.startswith("probe")) is threaded
    assert (first == second == threading.current_thread().name) is not threaded


def test_a_failure_in_either_is_raised_in_the_caller(monkeypatch):
    monkeypatch.setattr(parallel, "usable_cpus", lambda: 2)

    def broken():
        raise ValueError("second side")

    with pytest.raises(ValueError, match="second side"):
        parallel.side_by_side(_where, broken, large=True)


def test_usable_cpus_is_at_least_one():
    assert parallel.usable_cpus() >= 1
