"""Worker processes that measure the frames of one stack file (and draw its report).

Measuring a frame (:func:`apextrack.imaging.measure_frame`) is numpy work interleaved with a
good deal of Python; in threads the frames wait for each other on the interpreter lock. Forked
worker processes measure them side by side instead: each opens the stack file itself (its own
file handles and memory map), measures the frames it is given with the shared
:class:`~apextrack.imaging.StageContext` and sends the :class:`~apextrack.imaging.FrameMeasure`
back. The measurements are the same as in the analysing process, so the tables do not depend on
where frames were measured. Once the frames are measured, the same workers load the plotting
library while the analysing process links the tracks, and then draw the report's figures side
by side (:meth:`FramePool.call`).

Forking is safe only from a program with a single thread, so a pool is started only then (on
Linux, where forking is cheap and copies the loaded modules), before the analysis starts threads
of its own; elsewhere frames are measured in threads (:func:`apextrack.imaging.measure_frames`).
"""

from __future__ import annotations

import sys
import threading
from concurrent.futures import Future
from pathlib import Path
from typing import Self

from .settings import Settings

#: the worker's own stack and settings (set in each worker by :func:`_start_worker`)
_WORKER: dict = {}


def can_fork() -> bool:
    """True where frames may be measured in forked processes: Linux, the main thread of a
    program with no other thread, not itself a daemonic worker process (which may not have
    children)."""
    import multiprocessing as mp

    return (sys.platform.startswith("linux") and threading.current_thread() is threading.main_thread()
            and threading.active_count() == 1 and not mp.current_process().daemon)


def _start_worker(path: str, settings: Settings) -> None:
    """In each worker: open the stack anew; Ctrl-C is left to the analysing process."""
    import signal
    import warnings

    from .pipeline import open_stack

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the analysing process has reported them
        _WORKER["stack"] = open_stack(path, settings)
    _WORKER["settings"] = settings


def _ready() -> None:
    """A task that does nothing (submitted to start the workers)."""


def _load_report() -> None:
    """Import the report's plotting library (in a worker, while the analysis links tracks)."""
    import matplotlib.backends.backend_agg
    import matplotlib.backends.backend_svg  # noqa: F401

    from . import report  # noqa: F401


def _measure_in_worker(t: int, ctx):
    from .imaging import _measure

    return _measure(_WORKER["stack"], t, _WORKER["settings"], ctx)


class FramePool:
    """``n`` forked processes measuring frames of the stack file at ``path``.

    The processes are forked here, at once, so the caller must create the pool before it starts
    any thread (see :func:`can_fork`). Use :meth:`submit` for frames and :meth:`close` (or a
    ``with`` block) at the end.

    Examples
    --------
    >>> if can_fork():                                            # doctest: +SKIP
    ...     with FramePool("stack.tif", Settings(), 2) as pool:
    ...         measures = list(measure_frames(stack, s, ctx, pool=pool))
    """

    def __init__(self, path: str | Path, settings: Settings, n: int):
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        self.size = int(n)
        self._ex = ProcessPoolExecutor(max_workers=self.size, mp_context=mp.get_context("fork"),
                                       initializer=_start_worker, initargs=(str(path), settings))
        # the first task forks every worker now (later forks would copy the caller's threads)
        self._ex.submit(_ready).result()

    def submit(self, t: int, ctx) -> Future:
        """Measure frame ``t`` with context ``ctx`` in a worker; a future of its FrameMeasure."""
        return self._ex.submit(_measure_in_worker, int(t), ctx)

    def call(self, fn, *args) -> Future:
        """Run ``fn(*args)`` in a worker (``fn`` a module-level function); a future of its result."""
        return self._ex.submit(fn, *args)

    def load_report(self) -> None:
        """Have the workers import the plotting library now (returns at once)."""
        for _ in range(self.size):
            self._ex.submit(_load_report)

    def close(self) -> None:
        """Stop the workers (frames not yet started are cancelled)."""
        self._ex.shutdown(wait=True, cancel_futures=True)

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
