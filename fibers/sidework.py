"""Where a build's side work runs: on a second thread, or in turn when the build has one core.

A lone build on a machine of two or more cores overlaps work that needs the mesh alone (surface
distances, the pools' points, the segment labels) and the writing of the mesh files with its
main line; numpy's array work, the k-d queries and the kernel's copies release the GIL. A build
given one core of its own (a ``fibers cohort`` worker: one thread each, as many as cores) gains
nothing from a second thread and loses to the switching between them, so there the same jobs
run on the calling thread, each when its result is needed. Either way the results are the same bytes.
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
    """The executor interface on the calling thread: each job runs when its result is first
    asked for (so its time counts in the stage that needs it, as a thread's wait would), and
    any job not asked for runs when the block ends, in the order submitted."""

    def __init__(self):
        self._jobs = []

    def submit(self, fn, /, *args, **kwargs) -> "_Deferred":
        job = _Deferred(fn, args, kwargs)
        self._jobs.append(job)
        return job

    def __enter__(self):
        return self

    def __exit__(self, kind, *rest):
        if kind is None:  # after an error the rest is not wanted, as a cancelled build's
            for job in self._jobs:
                job.run()
        return False


class _Deferred(Future):
    """A future whose job runs on the first ``result()`` (or ``exception()``) call."""

    def __init__(self, fn, args, kwargs):
        super().__init__()
        self._job = (fn, args, kwargs)

    def run(self) -> None:
        if self._job is None:
            return
        fn, args, kwargs = self._job
        self._job = None
        try:
            self.set_result(fn(*args, **kwargs))
        except Exception as err:  # handed back by result(), as a thread's would be; Ctrl-C goes on up
            self.set_exception(err)

    def result(self, timeout=None):
        self.run()
        return super().result(timeout)

    def exception(self, timeout=None):
        self.run()
        return super().exception(timeout)
