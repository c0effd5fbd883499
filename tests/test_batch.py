"""Batches on dask: per-stack results identical to one-by-one analyses, failures reported while
the rest complete, experiment table and report, the command line."""

from __future__ import annotations

import json
import os

import pandas as pd
import pytest

from apextrack.batch import (EXPERIMENT_COLUMNS, find_stacks, read_experiment, run_batch, stack_names)
from apextrack.errors import InputError

TABLES = ["detections", "tracks", "primordia", "divergence", "centres", "parastichies"]
SETTINGS = {"bootstrap_n": 100, "seed": 5}


@pytest.fixture(scope="module")
def client():
    """One local cluster of 2 worker processes for the whole module (starting one is slow),
    started as ``apextrack batch`` starts its own."""
    from apextrack.batch import make_client

    c, cluster = make_client(n_workers=2)
    yield c
    c.close()
    cluster.close()


def test_local_cluster_workers_start_warm_and_without_the_trim_setting(client):
    """The workers of the cluster the batch starts: without dask's MALLOC_TRIM_THRESHOLD_ (it
    turns off the C library's growing threshold for mapped blocks, and every frame-sized array
    is then zero-filled afresh), without the sampling profiler, and with the analysis's and the
    plotting library's modules loaded."""
    def state():
        import sys

        import dask

        return (os.environ.get("MALLOC_TRIM_THRESHOLD_"), dask.config.get("distributed.worker.profile.enabled"),
                "matplotlib.figure" in sys.modules, "scipy.optimize" in sys.modules)

    assert set(client.run(state).values()) == {(None, False, True, True)}


def test_local_cluster_workers_close_without_a_heartbeat_traceback(client):
    """A worker whose heartbeat crosses the closing of the local cluster logged an error with a
    traceback (a known race of dask.distributed): the workers leave that one report out, and
    only that one."""
    import logging

    from apextrack.batch import _HeartbeatAtClose

    def kept(msg):
        return all(f.filter(logging.LogRecord("distributed.worker", logging.ERROR, __file__, 1, msg, None, None))
                   for f in logging.getLogger("distributed.worker").filters)

    def installed():
        return sum(isinstance(f, _HeartbeatAtClose) for f in logging.getLogger("distributed.worker").filters)

    assert set(client.run(installed).values()) == {1}
    assert not any(client.run(kept, "Failed to communicate with scheduler during heartbeat.").values())
    assert all(client.run(kept, "Compute Failed").values())


@pytest.fixture(scope="module")
def stacks(tmp_path_factory):
    """Three small synthetic stacks (different plants) and one truncated stack."""
    from apextrack.model import make_synthetic_stack, write_synthetic

    d = tmp_path_factory.mktemp("plants")
    for i, div in enumerate((137.5, 137.5, 99.5)):
        synth = make_synthetic_stack(n_frames=5, shape_zyx=(5, 64, 64), pixel_size_um=1.0, apex_radius_um=14,
                                     divergence_deg=div, seed=10 + i)
        write_synthetic(synth, d / f"bed_{i + 1}.tif")
    good = (d / "bed_1.tif").read_bytes()
    (d / "bed_0_damaged.tif").write_bytes(good[: len(good) // 2])   # cut in the middle of the data
    return d


@pytest.fixture(scope="module")
def batch_run(client, stacks, tmp_path_factory):
    out = tmp_path_factory.mktemp("batch") / "experiment"
    res = run_batch(stacks, out, SETTINGS, client=client, progress=False)
    return res


def _close(a, b, rtol=1e-6) -> bool:
    """Nested JSON values equal, floats to a relative tolerance."""
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_close(a[k], b[k], rtol) for k in a)
    if isinstance(a, list):
        return isinstance(b, list) and len(a) == len(b) and all(_close(x, y, rtol) for x, y in zip(a, b))
    if isinstance(a, float) and isinstance(b, (int, float)) and not isinstance(b, bool):
        return b == pytest.approx(a, rel=rtol, abs=1e-12)
    return a == b


def test_find_stacks_and_names(tmp_path):
    import numpy as np
    import tifffile

    (tmp_path / "plant10.tif").write_bytes(b"")
    (tmp_path / "plant2.tif").write_bytes(b"")
    (tmp_path / "plant2_truth.csv").write_text("x\n")
    (tmp_path / ".hidden.tif").write_bytes(b"")
    (tmp_path / "timelapse").mkdir()
    tifffile.imwrite(tmp_path / "timelapse" / "t001.tif", np.zeros((4, 4), np.uint8))
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "readme.txt").write_text("-")
    (tmp_path / "apex.zarr").mkdir()
    found = find_stacks(tmp_path)
    assert [p.name for p in found] == ["apex.zarr", "plant2.tif", "plant10.tif", "timelapse"]
    assert [p.name for p in find_stacks(str(tmp_path / "plant*.tif"))] == ["plant2.tif", "plant10.tif"]
    assert stack_names([tmp_path / "a.ome.tif", tmp_path / "b.zarr", tmp_path / "x" / "a.tif"]) == ["a", "b", "a_2"]
    with pytest.raises(InputError, match="no stacks found"):
        find_stacks(str(tmp_path / "*.nd2"))
    with pytest.raises(InputError, match="not found"):
        find_stacks(tmp_path / "missing")


def test_batch_gives_the_same_tables_as_one_by_one(batch_run, stacks, tmp_path):
    from apextrack.pipeline import analyse

    res = batch_run
    ok = res.experiment[res.experiment["status"] == "ok"]
    assert ok["stack"].tolist() == ["bed_1", "bed_2", "bed_3"]
    for name in ok["stack"]:
        alone = tmp_path / name
        single = analyse(stacks / f"{name}.tif", out=alone, progress=False, write_report=False, **SETTINGS)
        batch_dir = res.out / name
        # dask workers run BLAS/OpenMP single-threaded (distributed sets OMP_NUM_THREADS=1), this
        # process may not: sums are then rounded in another order, so floats agree to ~1e-9, not
        # bit for bit; everything else (rows, ids, ranks, flags, text) is identical
        for table in TABLES:
            a, b = alone / f"{table}.csv", batch_dir / f"{table}.csv"
            assert a.exists() == b.exists(), (name, table)
            if a.exists():
                pd.testing.assert_frame_equal(pd.read_csv(a), pd.read_csv(b), check_exact=False, rtol=1e-6,
                                              obj=f"{name}/{table}")
        s_alone = json.loads((alone / "summary.json").read_text(encoding="utf-8"))
        s_batch = json.loads((batch_dir / "summary.json").read_text(encoding="utf-8"))
        assert s_alone.keys() == s_batch.keys()
        assert json.dumps(s_alone, sort_keys=True) == json.dumps(s_batch, sort_keys=True) or \
            _close(s_alone, s_batch), name
        assert (batch_dir / "report.html").exists() and (batch_dir / "topview.tif").exists()
        # the experiment row carries the stack's summary figures
        row = ok[ok["stack"] == name].iloc[0]
        assert row["n_primordia"] == single.summary["n_primordia"]
        for key in ("divergence_mean_deg", "plastochron_h", "plastochron_ratio"):
            v = single.summary.get(key)
            assert (pd.isna(row[key]) if v is None else row[key] == pytest.approx(v, rel=1e-6)), key


def test_corrupt_stack_is_reported_and_the_others_complete(batch_run):
    df = batch_run.experiment
    assert df["stack"].tolist() == ["bed_0_damaged", "bed_1", "bed_2", "bed_3"]   # input order
    bad = df[df["stack"] == "bed_0_damaged"].iloc[0]
    assert bad["status"] == "failed"
    assert "bed_0_damaged.tif" in bad["error"] and "truncated" in bad["error"] and "\n" not in bad["error"]
    assert batch_run.failed == ["bed_0_damaged"]
    assert not (batch_run.out / "bed_0_damaged").exists()
    assert (df.loc[df["stack"] != "bed_0_damaged", "status"] == "ok").all()


def test_long_stacks_split_into_frame_tasks_give_the_same_tables(batch_run, client, stacks, tmp_path):
    # blocks of 2 frames measured by tasks of their own, put together by the stack's task:
    # the same tables, byte for byte, as one task per stack (both in single-threaded workers)
    from distributed import get_task_stream

    with get_task_stream(client) as stream:
        res = run_batch(str(stacks / "bed_[13]*.tif"), tmp_path / "blocks", {**SETTINGS, "frames_per_task": 2},
                        client=client, progress=False, report=False)
    assert res.experiment["status"].tolist() == ["ok", "ok"]
    keys = sorted(str(t["key"]) for t in stream.data)
    # 3 blocks per stack (frames 0–1, 2–3, 4) and one task per stack that puts them together
    assert sum(k.startswith("apextrack-frames-") for k in keys) == 6, keys
    assert sum(k.startswith("apextrack-stack-") for k in keys) == 2, keys
    for name in ("bed_1", "bed_3"):
        for table in TABLES + ["registration"]:
            a, b = batch_run.out / name / f"{table}.csv", res.out / name / f"{table}.csv"
            assert a.exists() == b.exists(), (name, table)
            if a.exists():
                assert a.read_bytes() == b.read_bytes(), (name, table)
        assert (res.out / name / "topview.tif").read_bytes() == (batch_run.out / name / "topview.tif").read_bytes()


def test_experiment_table_and_report(batch_run):
    back = read_experiment(batch_run.out)
    assert list(back.columns) == EXPERIMENT_COLUMNS
    pd.testing.assert_frame_equal(back, batch_run.experiment, check_exact=False, rtol=1e-12)
    text = (batch_run.out / "experiment_report.html").read_text(encoding="utf-8")
    for name in ("bed_1", "bed_2", "bed_3"):
        assert f'href="{name}/report.html"' in text
    assert "truncated" in text
    assert text.count("data:image/png;base64,") == 3


def test_command_line_batch_on_an_existing_scheduler(client, stacks, tmp_path, capsys):
    from apextrack.cli import main

    out = tmp_path / "cli"
    code = main(["batch", str(stacks / "bed_[03]*.tif"), "--out", str(out), "--scheduler", client.scheduler.address])
    captured = capsys.readouterr()
    assert code == 3                                     # one stack failed
    assert "dashboard" in captured.err
    assert "bed_0_damaged: failed:" in captured.err      # one line for the failed stack
    assert "1 of 2 stack(s) analysed" in captured.out
    df = pd.read_csv(out / "experiment.csv")
    assert df["stack"].tolist() == ["bed_0_damaged", "bed_3"] and df["status"].tolist() == ["failed", "ok"]
    # without --overwrite an existing results folder is an error for that stack only
    code = main(["batch", str(stacks / "bed_3.tif"), "--out", str(out), "--scheduler", client.scheduler.address,
                 "--quiet"])
    assert code == 3
    assert "--overwrite" in pd.read_csv(out / "experiment.csv")["error"].iloc[0]


def test_bad_scheduler_address_is_a_clear_error(stacks, tmp_path, capsys):
    from apextrack.cli import main

    code = main(["batch", str(stacks), "--out", str(tmp_path / "x"), "--scheduler", "tcp://127.0.0.1:1"])
    assert code == 2
    assert "cannot connect to the dask scheduler" in capsys.readouterr().err


if __name__ == "__main__":  # worker processes are spawned: guard the entry point
    raise SystemExit(pytest.main([os.path.abspath(__file__), "-q"]))
