"""The same input and settings give byte-identical results.

Every CSV table, ``summary.json`` and the top-view TIFF must be identical byte for byte across
runs, across processes (with different hash seeds) and across 1 or 2 dask workers.
``run.json`` is the exception by design: it records start/finish times and stage timings, so
only its settings and input checksums are compared. The seed of the bootstrap is a setting:
changing it must change the confidence intervals (so the test can tell a seeded generator
from a fixed result).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from apextrack.pipeline import analyse
from bad_inputs import cases  # the corpus of bad inputs (tests/bad_inputs/cases.py)



#: Files that must not differ between two runs of the same input and settings.
COMPARED = ("*.csv", "summary.json", "topview.tif")


def fingerprint(folder: Path) -> dict[str, str]:
    files = sorted({p for pattern in COMPARED for p in folder.glob(pattern)})
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


@pytest.fixture(scope="module")
def stack_and_first_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("determinism")
    stack, results, _ = cases.make_good_inputs(folder)
    return stack, results


def test_two_runs_are_byte_identical(stack_and_first_run, tmp_path):
    stack, first = stack_and_first_run
    analyse(stack, out=tmp_path / "again", progress=False, write_report=False)
    a, b = fingerprint(first), fingerprint(tmp_path / "again")
    assert {"detections.csv", "tracks.csv", "primordia.csv", "divergence.csv", "summary.json"} <= set(a)
    assert a == b
    # run.json: same settings and input checksums; times may differ
    ra = json.loads((first / "run.json").read_text())
    rb = json.loads((tmp_path / "again" / "run.json").read_text())
    assert ra["settings"] == rb["settings"] and ra["input_sha256"] == rb["input_sha256"]
    assert "timings_s" in ra and "started" in ra


def test_another_process_and_hash_seed_gives_the_same_bytes(stack_and_first_run, tmp_path):
    stack, first = stack_and_first_run
    out = tmp_path / "other_process"
    code = (f"from apextrack.pipeline import analyse; "
            f"analyse({str(stack)!r}, out={str(out)!r}, progress=False, write_report=False)")
    env = dict(os.environ, PYTHONHASHSEED="12345")
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert fingerprint(out) == fingerprint(first)


def test_the_seed_is_used_and_repeatable(stack_and_first_run, tmp_path):
    stack, first = stack_and_first_run
    s0 = json.loads((first / "summary.json").read_text())
    assert s0["divergence_ci_deg"] is not None, "the test stack must give a bootstrap interval"
    r7a = analyse(stack, out=tmp_path / "seed7a", progress=False, write_report=False, settings={"seed": 7})
    analyse(stack, out=tmp_path / "seed7b", progress=False, write_report=False, settings={"seed": 7})
    assert fingerprint(tmp_path / "seed7a") == fingerprint(tmp_path / "seed7b")
    assert r7a.summary["divergence_ci_deg"] != s0["divergence_ci_deg"]
    # the point estimates do not depend on the seed
    assert r7a.summary["divergence_mean_deg"] == s0["divergence_mean_deg"]
    assert r7a.summary["plastochron_h"] == s0["plastochron_h"]


def test_one_and_two_dask_workers_give_the_same_bytes(stack_and_first_run, tmp_path):
    batch = pytest.importorskip("apextrack.batch")
    import shutil

    stack, first = stack_and_first_run
    plants = tmp_path / "plants"
    plants.mkdir()
    # two stacks so that two workers really run in parallel: the same stack and a copy
    shutil.copy(stack, plants / "plant_a.tif")
    shutil.copy(stack, plants / "plant_b.tif")
    prints = {}
    from distributed import Client, LocalCluster

    for n in (1, 2):
        # worker threads rather than processes: each process would spend seconds importing the
        # scientific stack; another process is covered by the test above
        with LocalCluster(n_workers=n, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster, \
                Client(cluster) as client:
            res = batch.run_batch(plants, tmp_path / f"workers{n}", client=client, progress=False, report=False)
        assert res.n_failed == 0, res.experiment[["stack", "error"]].to_dict("records")
        prints[n] = {name: fingerprint(tmp_path / f"workers{n}" / name) for name in ("plant_a", "plant_b")}
    assert prints[1] == prints[2]
    # and the same as a plain analysis (no dask), except the stack name inside summary.json
    single = fingerprint(first)
    for name in ("plant_a", "plant_b"):
        csvs = {k: v for k, v in prints[1][name].items() if k.endswith((".csv", ".tif"))}
        assert csvs == {k: v for k, v in single.items() if k.endswith((".csv", ".tif"))}


def test_one_and_two_threads_give_the_same_bytes(stack_and_first_run, tmp_path):
    # frames measured in a thread pool are put together in frame order: same tables
    stack, first = stack_and_first_run
    for n in (1, 2):
        analyse(stack, out=tmp_path / f"threads{n}", progress=False, write_report=False,
                settings={"threads": n, "frame_processes": False})
        assert json.loads((tmp_path / f"threads{n}" / "run.json").read_text())["frames_measured_in"] == f"{n} thread(s)"
    assert fingerprint(tmp_path / "threads1") == fingerprint(tmp_path / "threads2") == fingerprint(first)


def test_frames_and_figures_made_in_worker_processes_give_the_same_bytes(stack_and_first_run, tmp_path):
    # a fresh program (one thread, so it may fork) measures the frames in two worker processes
    # that open the stack themselves; the tables are those of one thread
    if not sys.platform.startswith("linux"):
        pytest.skip("frames are measured in processes on Linux only")
    stack, first = stack_and_first_run
    out = tmp_path / "processes"
    code = (f"from apextrack.pipeline import analyse; "
            f"analyse({str(stack)!r}, out={str(out)!r}, progress=False, "
            f"settings={{'threads': 2, 'frame_processes': True}})")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert json.loads((out / "run.json").read_text())["frames_measured_in"] == "2 processes"
    analyse(stack, out=tmp_path / "one", progress=False, settings={"threads": 1, "frame_processes": False})
    assert fingerprint(out) == fingerprint(tmp_path / "one") == fingerprint(first)
    # the report's figures, drawn by the worker processes, are those drawn in one process
    figures = sorted(p.name for p in (tmp_path / "one" / "figures").iterdir())
    assert len(figures) == 12 and figures == sorted(p.name for p in (out / "figures").iterdir())
    for name in figures:
        assert (out / "figures" / name).read_bytes() == (tmp_path / "one" / "figures" / name).read_bytes(), name


def test_a_frame_failing_in_a_worker_process_is_reported_as_in_the_analysis(stack_and_first_run):
    # the error raised in the worker reaches the caller whole (type, file, message); the pool
    # is started in a fresh program, which has one thread
    if not sys.platform.startswith("linux"):
        pytest.skip("frames are measured in processes on Linux only")
    stack, _ = stack_and_first_run
    code = f"""
import pickle, sys
from apextrack.frame_pool import FramePool, can_fork
from apextrack.pipeline import open_stack
from apextrack.settings import Settings
from apextrack.imaging import stage_context
s = Settings(threads=2)
assert can_fork()
st = open_stack({str(stack)!r}, s)
ctx, _ = stage_context(st, s)
with FramePool({str(stack)!r}, s, 2) as pool:
    ok = pool.submit(1, ctx).result()
    assert ok.t == 1 and len(ok.blobs)
    try:
        pool.submit(st.n_frames + 5, ctx).result()
    except Exception as exc:
        print(type(exc).__name__, "|", exc)
"""
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    name, _, message = proc.stdout.strip().partition(" | ")
    with pytest.raises(Exception) as local:
        from apextrack.pipeline import open_stack
        from apextrack.settings import Settings

        open_stack(stack, Settings()).frame(open_stack(stack, Settings()).n_frames + 5)
    assert name == type(local.value).__name__ and message == str(local.value)


def test_frames_measured_in_any_order_give_the_same_tables(stack_and_first_run):
    # each frame's measurement depends only on the frame and the stack's context, so frames
    # measured backwards (as dask tasks may finish) give the same image-stage tables
    import pandas as pd

    from apextrack.imaging import image_stage, measure_frame, stage_context
    from apextrack.settings import Settings
    from apextrack.stack import read_stack

    stack_path, _ = stack_and_first_run
    s = Settings(threads=1)
    with read_stack(stack_path) as st:
        det_a, cen_a = image_stage(st, s, progress=False)
        ctx, _done = stage_context(st, s)
        backwards = {t: measure_frame(st, t, s, ctx) for t in reversed(range(st.n_frames))}
        det_b, cen_b = image_stage(st, s, progress=False, measures=(backwards[t] for t in range(st.n_frames)))
    pd.testing.assert_frame_equal(det_a, det_b)
    pd.testing.assert_frame_equal(cen_a, cen_b)
