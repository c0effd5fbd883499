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

Each worker has a pipe of its own to the analysing process, which waits on the pipes and on
the workers' exits together: a worker that dies (e.g. stopped by the system for want of
memory) is reported as an error at once, never waited for.

Forking is safe only from a program with a single thread, so a pool is started only then (on
Linux, where forking is cheap and copies the loaded modules), before the analysis starts threads
of its own; elsewhere frames are measured in threads (:func:`apextrack.imaging.measure_frames`).
"""

from __future__ import annotations

import io
import os
import pickle
import sys
import threading
from collections import deque
from pathlib import Path
from typing import Any, Self

from .errors import AnalysisError
from .settings import Settings

#: the worker's own stack and settings (set in each worker by :func:`_worker_main`)
_WORKER: dict = {}
#: jobs handed to one worker at a time: the next one waits in its pipe while it works
_PER_WORKER = 2


def can_fork() -> bool:
    """True where frames may be measured in forked processes: Linux, the main thread of a
    program with no other thread, not itself a daemonic worker process (which may not have
    children)."""
    import multiprocessing as mp

    return (sys.platform.startswith("linux") and threading.current_thread() is threading.main_thread()
            and threading.active_count() == 1 and not mp.current_process().daemon)


def _worker_main(conn, inherited, path: str, settings: Settings) -> None:
    """A worker: open the stack anew, then run the jobs that come down the pipe until told to
    stop (``None``), the pipe closes or the analysing process is gone. Ctrl-C is left to the
    analysing process."""
    import signal

    from .pipeline import open_stack

    parent = os.getppid()
    # the analysing process's ends of the pipes, copied by the fork: closed here, so that a pipe
    # reads as closed as soon as the analysing process ends
    for c in inherited:
        c.close()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _WORKER["stack"] = open_stack(path, settings, quiet=True)  # the analysis reports the warnings
    _WORKER["settings"] = settings
    while True:
        try:
            # a look every second whether the analysing process still runs (its end of the
            # pipe may live on in a process it started)
            while not conn.poll(1.0):
                if os.getppid() != parent:
                    return
            raw = conn.recv_bytes()
        except (EOFError, OSError):
            return
        # a job is its id, then (fn, args), pickled one after the other; None means stop
        buf = io.BytesIO(raw)
        job = pickle.load(buf)
        if job is None:
            return
        fn, args = pickle.load(buf)
        try:
            out = (job, True, fn(*args))
        except BaseException as exc:  # noqa: BLE001  - handed back to the analysing process
            out = (job, False, exc)
        try:
            conn.send(out)
        except Exception as exc:  # noqa: BLE001  - e.g. a result that cannot be pickled
            conn.send((job, False, RuntimeError(f"a worker could not send its result back: {exc}")))


def _measure_in_worker(t: int, ctx):
    from .imaging import _measure

    return _measure(_WORKER["stack"], t, _WORKER["settings"], ctx)


class Job:
    """A job handed to a :class:`FramePool`; :meth:`result` waits for it."""

    def __init__(self, pool: FramePool, job_id: int):
        self._pool, self.id = pool, job_id

    def result(self) -> Any:
        """The job's return value (its exception re-raised here)."""
        return self._pool._wait(self.id)

    def cancel(self) -> None:
        """Drop the job if no worker has started it."""
        self._pool._cancel(self.id)


class FramePool:
    """``n`` forked processes measuring frames of the stack file at ``path``.

    The processes are forked here, at once, so the caller must create the pool before it starts
    any thread (see :func:`can_fork`). Use :meth:`submit` for frames, :meth:`call` for other
    work and :meth:`close` (or a ``with`` block) at the end. A thread of the pool reads the
    workers' results as soon as they are sent (a worker does not wait for the caller to ask)
    and hands queued jobs to workers as they free up; it also watches for workers that die.
    Another thread writes the jobs into the pipes, so that neither the caller nor the reading
    thread ever waits for a busy worker to take a large job in.

    Examples
    --------
    >>> if can_fork():                                            # doctest: +SKIP
    ...     with FramePool("stack.tif", Settings(), 2) as pool:
    ...         measures = list(measure_frames(stack, s, ctx, pool=pool))
    """

    def __init__(self, path: str | Path, settings: Settings, n: int):
        import multiprocessing as mp

        fork = mp.get_context("fork")
        self.size = int(n)
        self.path = str(path)
        self._procs, self._conns = [], []
        self._busy: list[list[int]] = []          # per worker: jobs sent, in order
        self._queue: deque = deque()              # (job id, message bytes) not yet sent
        self._done: dict[int, tuple[bool, Any]] = {}
        self._next = 0
        self._error: BaseException | None = None  # a worker died: every wait raises this
        self._closing = False
        self._cond = threading.Condition()
        self._reader = self._writer = None
        self._outbox: deque = deque()             # (worker, message) for the writing thread
        self._wake = os.pipe()                    # a byte here wakes the reader (new job, close)
        try:
            for i in range(self.size):
                here, there = fork.Pipe(duplex=True)
                p = fork.Process(target=_worker_main, args=(there, [*self._conns, here], self.path, settings),
                                 daemon=True, name=f"apextrack-worker-{i}")
                p.start()
                there.close()
                self._procs.append(p)
                self._conns.append(here)
                self._busy.append([])
            # started after the forks: the workers copy no thread of the pool
            self._reader = threading.Thread(target=self._guarded, args=(self._read,),
                                            name="apextrack-worker-results", daemon=True)
            self._reader.start()
            self._writer = threading.Thread(target=self._guarded, args=(self._write,),
                                            name="apextrack-worker-jobs", daemon=True)
            self._writer.start()
        except BaseException:
            self.close()
            raise

    # -- jobs ----------------------------------------------------------------------------------
    def submit(self, t: int, ctx) -> Job:
        """Measure frame ``t`` with context ``ctx`` in a worker; a job giving its FrameMeasure."""
        return self.call(_measure_in_worker, int(t), ctx)

    def call(self, fn, *args) -> Job:
        """Run ``fn(*args)`` in a worker (``fn`` a module-level function)."""
        data = pickle.dumps((fn, args), protocol=pickle.HIGHEST_PROTOCOL)
        with self._cond:
            if self._error is not None:
                raise self._error
            if self._closing or not self._procs:
                raise RuntimeError("the worker processes have been stopped")
            job = self._next
            self._next += 1
            self._queue.append((job, data))
            self._dispatch()
        return Job(self, job)

    def load_report(self) -> None:
        """Have the workers import the plotting library now (returns at once)."""
        from .report import warm_up

        for _ in range(self.size):
            self.call(warm_up)

    def _dispatch(self) -> None:
        """Hand queued jobs to the least busy workers, up to :data:`_PER_WORKER` each (the
        caller holds the lock); the writing thread sends them."""
        sent = False
        while self._queue and self._error is None:
            load = [len(b) for b in self._busy]
            i = min(range(self.size), key=lambda k: (load[k], k))
            if load[i] >= _PER_WORKER:
                break
            job, data = self._queue.popleft()
            self._busy[i].append(job)
            # the job's id goes in front of the pickled (fn, args)
            self._outbox.append((i, pickle.dumps(job) + data))
            sent = True
        if sent:
            self._cond.notify_all()
            os.write(self._wake[1], b"x")

    def _write(self) -> None:
        """The pool's thread writing jobs into the workers' pipes (a write waits while the worker
        is busy and its pipe full)."""
        while True:
            with self._cond:
                while not self._outbox and not self._closing and self._error is None:
                    self._cond.wait()
                if self._closing or self._error is not None:
                    return
                i, data = self._outbox.popleft()
                conn = self._conns[i]
            try:
                conn.send_bytes(data)
            except OSError:  # the worker is gone
                with self._cond:
                    self._fail(i)
                return

    def _cancel(self, job: int) -> None:
        with self._cond:
            self._queue = deque((j, d) for j, d in self._queue if j != job)

    def _wait(self, job: int) -> Any:
        with self._cond:
            while job not in self._done:
                if self._error is not None:
                    raise self._error
                if not any(job in b for b in self._busy) and all(j != job for j, _ in self._queue):
                    raise RuntimeError(f"job {job} was cancelled or never submitted")
                self._cond.wait()
            ok, value = self._done.pop(job)
        if not ok:
            raise value
        return value

    def _read(self) -> None:
        """The pool's thread: read results as they come, hand out queued jobs, watch for
        workers that die with jobs in hand."""
        from multiprocessing.connection import wait

        while True:
            with self._cond:
                if self._closing or self._error is not None:
                    return
                busy = [i for i in range(self.size) if self._busy[i]]
                conns = {self._conns[i]: i for i in busy}
                sentinels = {self._procs[i].sentinel: i for i in busy}
            ready = wait([*conns, *sentinels, self._wake[0]])
            if self._wake[0] in ready:
                os.read(self._wake[0], 4096)
            for obj in ready:
                if obj in conns:
                    i = conns[obj]
                    try:
                        got, ok, value = obj.recv()
                    except (EOFError, OSError, pickle.UnpicklingError):
                        with self._cond:
                            self._fail(i)
                        return
                    with self._cond:
                        self._busy[i].remove(got)
                        self._done[got] = (ok, value)
                        self._dispatch()
                        self._cond.notify_all()
                elif obj in sentinels and not any(c in ready for c, k in conns.items() if k == sentinels[obj]):
                    with self._cond:
                        self._fail(sentinels[obj])
                    return

    def _guarded(self, loop) -> None:
        """Run one of the pool's threads; should it fail, every wait raises instead of hanging."""
        try:
            loop()
        except BaseException as exc:  # noqa: BLE001  - handed to the waiting caller
            with self._cond:
                if self._error is None and not self._closing:
                    self._error = RuntimeError(f"the worker pool's {loop.__name__[1:]} thread failed: {exc!r}")
                self._cond.notify_all()

    def _fail(self, i: int) -> None:
        """Worker ``i`` ended with jobs in hand (the caller holds the lock): every wait raises."""
        if self._closing or self._error is not None:
            return
        p = self._procs[i]
        p.join(timeout=1.0)
        code = p.exitcode
        how = f"was stopped by signal {-code}" if code is not None and code < 0 else f"ended (exit code {code})"
        hint = "the system may have run out of memory: set frame_processes = false or fewer threads"
        self._error = AnalysisError(f"a worker process of the analysis {how}", self.path, hint)
        self._cond.notify_all()

    # -- end -----------------------------------------------------------------------------------
    def close(self) -> None:
        """Stop the workers: told to stop when they are idle, stopped at once when they still
        hold jobs (whose results nobody will read)."""
        with self._cond:
            if self._closing:
                return
            self._closing = True
            hold = any(self._busy) or self._error is not None
            self._queue.clear()
            self._cond.notify_all()
        os.write(self._wake[1], b"x")
        if hold:
            for p in self._procs:
                p.terminate()   # also ends a write waiting for a busy worker
        for thread in (self._reader, self._writer):
            if thread is not None:
                thread.join()
        for conn in self._conns:
            try:
                conn.send(None)
            except (OSError, ValueError):
                pass
        for p in self._procs:
            p.join(timeout=2.0)
            if p.is_alive():
                p.terminate()
                p.join(timeout=2.0)
        for conn in self._conns:
            conn.close()
        for fd in self._wake:
            os.close(fd)
        self._procs, self._conns, self._busy = [], [], []

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
