"""Where a build's side work runs: on a second thread, or in turn when the build has one core.

A lone build on a machine of two or more cores overlaps work that needs the mesh alone (surface
distances, the pools' points, the segment labels) and the writing of the mesh files with its
main line; numpy's array work, the k-d queries and the kernel's copies release the GIL. A build
given one core of its own (a ``fibers cohort`` worker: one thread each, as many as cores) gains
nothing from a second thread and loses to the switching between them, so there the same jobs
run one after the other, in the order submitted. Either way the results are the same bytes.
"""

from __future__ import annotations

from concurrent.futures import Future, ThreadPoolExecutor

_one_core = False


def use_one_core(flag: bool = True) -> None:
    """From now on, run side work in turn on the calling thread (True) or on a second thread."""
    global _one_core
    _one_core = bool(flag)


def side_thread(name: str):
    """An executor for side work: ``with side_thread("x") as side: future = side.submit(f, ...)``."""
    return _InTurn() if _one_core else ThreadPoolExecutor(max_workers=1, thread_name_prefix=name)


class _InTurn:
    """The executor interface, running each job at once on the calling thread."""

    def submit(self, fn, /, *args, **kwargs) -> Future:
        future = Future()
        try:
            future.set_result(fn(*args, **kwargs))
        except Exception as err:  # handed back by result(), as a thread's would be; Ctrl-C goes on up
            future.set_exception(err)
        return future

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False
