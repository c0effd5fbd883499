"""Worker processes (apextrack.frame_pool): results, errors, large messages, a dying worker.

Each check runs in a fresh program (one thread, so that it may fork), as an analysis does.
"""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="worker processes on Linux only")


def _run(body: str, stack: str) -> str:
    code = textwrap.dedent("""
        import os, signal
        import numpy as np
        from apextrack.errors import AnalysisError
        from apextrack.frame_pool import FramePool, can_fork
        from apextrack.settings import Settings

        def twice(x):
            return 2 * x

        def fail(text):
            raise ValueError(text)

        def echo(a):
            return a + 1

        def die():
            os.kill(os.getpid(), signal.SIGKILL)

        assert can_fork()
        STACK = {stack!r}
    """).format(stack=stack) + textwrap.dedent(body)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


@pytest.fixture(scope="module")
def stack():
    from apextrack.pipeline import demo_stack_path

    return str(demo_stack_path())


def test_results_and_errors_come_back(stack):
    out = _run("""
        with FramePool(STACK, Settings(), 2) as pool:
            jobs = [pool.call(twice, k) for k in range(7)]
            print([j.result() for j in reversed(jobs)])
            try:
                pool.call(fail, "bad value").result()
            except ValueError as exc:
                print("ValueError", exc)
            print(pool.call(twice, 5).result())   # the pool goes on after an error
    """, stack)
    assert out.splitlines() == ["[12, 10, 8, 6, 4, 2, 0]", "ValueError bad value", "10"]


def test_large_messages_both_ways_do_not_block(stack):
    # arguments and results far larger than a pipe's buffer, more jobs than workers, waited for
    # out of order: the pool hands large jobs only to idle workers and reads while it waits
    out = _run("""
        with FramePool(STACK, Settings(), 2) as pool:
            jobs = [pool.call(echo, np.full(400_000, float(k))) for k in range(6)]
            print(sum(float(j.result()[0]) for j in jobs[::-1]))
    """, stack)
    assert out.strip() == str(float(sum(k + 1 for k in range(6))))


def test_a_worker_that_dies_is_an_error_not_a_wait(stack):
    # a worker stopped by the system (here SIGKILL, as the out-of-memory killer does) while
    # another holds a large result: a one-line analysis error naming the file, at once
    out = _run("""
        import time
        with FramePool(STACK, Settings(), 2) as pool:
            big = pool.call(echo, np.zeros(2_000_000))
            dead = pool.call(die)
            t0 = time.perf_counter()
            try:
                dead.result()
                print("no error")
            except AnalysisError as exc:
                print("AnalysisError|" + str(exc) + "|" + str(time.perf_counter() - t0 < 10))
    """, stack)
    kind, message, quick = out.strip().split("|")
    assert kind == "AnalysisError" and quick == "True"
    assert message.startswith(stack) and "stopped by signal 9" in message


def test_frames_measured_in_workers_equal_those_measured_here(stack):
    out = _run("""
        import pandas as pd
        from apextrack.imaging import measure_frame, stage_context
        from apextrack.pipeline import open_stack
        s = Settings()
        st = open_stack(STACK, s)
        ctx, _ = stage_context(st, s)
        frames = list(range(ctx.first + 1, st.n_frames))
        with FramePool(STACK, s, 2) as pool:
            jobs = [pool.submit(t, ctx) for t in frames]
            there = [j.result() for j in jobs]
        for t, m in zip(frames, there):
            here = measure_frame(st, t, s, ctx)
            assert m.t == t and np.array_equal(m.view, here.view)
            pd.testing.assert_frame_equal(m.blobs, here.blobs)
            assert (m.dome is None) == (here.dome is None)
        print(len(frames))
    """, stack)
    assert int(out) >= 5


def test_workers_end_when_the_analysing_process_dies(stack):
    # a crash of the analysing process (no clean-up at all) must not leave workers behind
    # holding its output pipes: they see their pipe close (or their parent change) and end
    import os
    import time

    code = textwrap.dedent(f"""
        import os
        from apextrack.frame_pool import FramePool
        from apextrack.settings import Settings
        pool = FramePool({stack!r}, Settings(), 2)
        print(" ".join(str(p.pid) for p in pool._procs), flush=True)
        os._exit(3)
    """)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 3, proc.stderr
    pids = [int(p) for p in proc.stdout.split()]
    assert len(pids) == 2

    def alive(pid):
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False
        with open(f"/proc/{pid}/stat") as fh:  # a zombie awaiting its reaper has ended
            return fh.read().split(")")[-1].split()[0] != "Z"

    deadline = time.time() + 10
    while any(alive(p) for p in pids) and time.time() < deadline:
        time.sleep(0.1)
    assert not any(alive(p) for p in pids)
