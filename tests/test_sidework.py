"""Side work of a build: on a second thread, or in turn on the calling thread (cohort workers)."""

from __future__ import annotations

import threading

import pytest

from fibers import sidework


@pytest.fixture
def one_core():
    sidework.use_one_core()
    yield
    sidework.use_one_core(False)


def _where():
    return threading.current_thread().name


def test_second_thread_by_default():
    with sidework.side_thread("fibers-test") as side:
        assert side.submit(_where).result().startswith("fibers-test")


def test_in_turn_on_one_core(one_core):
    order = []
    with sidework.side_thread("fibers-test") as side:
        jobs = [side.submit(order.append, k) for k in range(3)]
        broken = side.submit(int, "not a number")
        assert side.submit(_where).result() == threading.current_thread().name
    assert order == [0, 1, 2] and all(j.done() for j in jobs)  # the ones not asked for ran at the end
    with pytest.raises(ValueError):  # a job's error comes back from result(), as from a thread
        broken.result()


def test_in_turn_runs_when_asked(one_core):
    # a job's time falls in the stage that asks for its result (the build's stage timings)
    order = []
    with sidework.side_thread("fibers-test") as side:
        first = side.submit(order.append, "first")
        second = side.submit(order.append, "second")
        order.append("main")
        second.result()
        assert order == ["main", "second"] and not first.done()
    assert order == ["main", "second", "first"]


def test_in_turn_drops_the_rest_after_an_error(one_core):
    order = []
    with pytest.raises(KeyError):
        with sidework.side_thread("fibers-test") as side:
            side.submit(order.append, 1)
            raise KeyError("stop")
    assert order == []
