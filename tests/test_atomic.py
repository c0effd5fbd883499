"""Nothing is ever half written: atomic files, atomic results folders, interrupted runs.

A run is interrupted by making one of its stages raise (an internal error, Ctrl-C) or by
killing the process outright; afterwards the previous results folder must be byte for byte
what it was, and no partial folder or temporary file may be left where the user looks. The
behaviour checked is the project's own contract (write to a temporary name, then rename;
POSIX ``rename`` replaces atomically — common practice, no source).
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pandas as pd
import pytest

import apextrack.pipeline as pipeline
from apextrack.cli import main
from apextrack.errors import OutputError
from apextrack.pipeline import analyse
from apextrack.tables import atomic_write_text, read_table, write_json, write_table
from bad_inputs import cases  # the corpus of bad inputs (tests/bad_inputs/cases.py)




def snapshot(folder: Path) -> dict[str, str]:
    """Relative path → SHA-256 of every file under ``folder``."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def leftovers(parent: Path) -> list[str]:
    """Hidden staging folders and temporary files left beside or inside results."""
    return sorted(str(p.relative_to(parent)) for p in parent.rglob("*")
                  if ".partial-" in p.name or ".old-" in p.name or p.name.endswith(".part"))


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    return cases.make_good_inputs(tmp_path_factory.mktemp("atomic"))


@pytest.fixture
def previous(good, tmp_path):
    """A complete results folder from an earlier run, and its fingerprint."""
    import shutil

    out = tmp_path / "plant1"
    shutil.copytree(good[1], out)
    return out, snapshot(out)


# ----------------------------------------------------------------------------------------------
# single files
# ----------------------------------------------------------------------------------------------
def test_failed_write_keeps_the_old_file_and_no_temporary(tmp_path, monkeypatch):
    p = tmp_path / "summary.json"
    write_json({"n_primordia": 5}, p)
    before = p.read_bytes()

    def crash(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError):
        write_json({"n_primordia": 6}, p)
    monkeypatch.undo()
    assert p.read_bytes() == before
    assert sorted(q.name for q in tmp_path.iterdir()) == ["summary.json"]


def test_interrupted_table_write_leaves_the_old_table(tmp_path, monkeypatch):
    df = pd.DataFrame({"from_rank": [1, 2], "to_rank": [2, 3], "angle_deg": [137.5, 140.0], "interval_h": [6.0, 6.5]})
    p = write_table(df, tmp_path / "divergence.csv", "divergence")
    before = p.read_bytes()
    real_fdopen = os.fdopen

    class HalfFile:
        """Writes half of the text, then the process is interrupted."""

        def __init__(self, fh):
            self.fh = fh

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            self.fh.close()

        def write(self, text):
            self.fh.write(text[: len(text) // 2])
            raise KeyboardInterrupt

    monkeypatch.setattr(os, "fdopen", lambda *a, **k: HalfFile(real_fdopen(*a, **k)))
    with pytest.raises(KeyboardInterrupt):
        write_table(df.assign(angle_deg=[0.0, 0.0]), p, "divergence")
    monkeypatch.undo()
    assert p.read_bytes() == before
    assert read_table(p, "divergence")["angle_deg"].tolist() == [137.5, 140.0]
    assert leftovers(tmp_path) == []


def test_atomic_write_into_a_missing_place_is_an_output_error(tmp_path):
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("x")
    with pytest.raises(OutputError) as info:
        atomic_write_text(blocker / "table.csv", "a\n")
    assert str(blocker) in info.value.one_line()


# ----------------------------------------------------------------------------------------------
# results folders
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("stage", ["image_stage", "measure_tracks", "write_results", "write_json"])
def test_crash_mid_run_keeps_previous_results(stage, good, previous, monkeypatch):
    out, before = previous
    real = getattr(pipeline, stage)
    calls = {"n": 0}

    def crash(*a, **k):
        calls["n"] += 1
        if stage == "write_results":
            real(*a, **k)  # every table written into the staging folder, then the crash
        raise RuntimeError(f"simulated crash in {stage}")

    monkeypatch.setattr(pipeline, stage, crash)
    with pytest.raises(RuntimeError, match="simulated crash"):
        analyse(good[0], out=out, overwrite=True, progress=False, write_report=False)
    assert calls["n"] == 1
    assert snapshot(out) == before
    assert leftovers(out.parent) == []


def test_crash_in_a_fresh_folder_leaves_nothing(good, tmp_path, monkeypatch):
    def crash(*a, **k):
        raise RuntimeError("simulated crash")

    monkeypatch.setattr(pipeline, "measure_tracks", crash)
    out = tmp_path / "new_plant"
    with pytest.raises(RuntimeError):
        analyse(good[0], out=out, progress=False, write_report=False)
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []


def test_ctrl_c_through_the_cli(good, previous, monkeypatch, capsys):
    out, before = previous

    def interrupt(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "measure_tracks", interrupt)
    code = main(["analyse", str(good[0]), "--out", str(out), "--overwrite", "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 130
    assert err == ["apextrack: interrupted; no results were written"]
    assert snapshot(out) == before
    assert leftovers(out.parent) == []


def test_overwrite_replaces_only_once_the_new_results_are_complete(good, previous, monkeypatch):
    out, before = previous
    seen = {}
    real_write = pipeline.write_results

    def watch(result, folder):
        # while the new tables are being written, the old folder is still whole and untouched
        seen["during"] = snapshot(out)
        real_write(result, folder)

    monkeypatch.setattr(pipeline, "write_results", watch)
    (out / "my_notes.txt").write_text("hand-written notes in the old folder\n")
    before = snapshot(out)
    res = analyse(good[0], out=out, overwrite=True, progress=False, write_report=False,
                  interval_h=4.0)
    assert seen["during"] == before
    after = snapshot(out)
    assert "my_notes.txt" not in after  # replaced as a whole, not merged
    assert set(pipeline.RESULT_FILES) <= set(after)
    assert res.summary["interval_h"] == 4.0
    assert leftovers(out.parent) == []


def test_killed_run_keeps_previous_results_and_the_next_run_cleans_up(good, previous):
    # the process dies with no chance to clean up (os._exit mid-run, as for a kill -9 or a
    # power cut): the old results stay whole, the half-done work is only in a hidden folder,
    # and the next run removes that folder
    out, before = previous
    script = textwrap.dedent(f"""
        import os
        import apextrack.pipeline as pipeline

        real = pipeline.write_results

        def die(result, folder):
            real(result, folder)
            os._exit(9)

        pipeline.write_results = die
        pipeline.analyse({str(good[0])!r}, out={str(out)!r}, overwrite=True, progress=False, write_report=False)
    """)
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 9, proc.stderr
    assert snapshot(out) == before
    stale = [p for p in out.parent.iterdir() if ".partial-" in p.name]
    assert len(stale) == 1 and stale[0].name.startswith(".plant1.partial-")
    analyse(good[0], out=out, overwrite=True, progress=False, write_report=False)
    assert leftovers(out.parent) == []
    assert set(pipeline.RESULT_FILES) <= set(snapshot(out))


def test_staging_folder_of_a_live_process_is_left_alone(good, previous):
    # another analysis writing the same results folder right now (a live process id)
    out, _ = previous
    host = __import__("platform").node().replace("-", "_") or "host"
    busy = out.parent / f".{out.name}.partial-{host}-{os.getppid()}-1"
    busy.mkdir()
    analyse(good[0], out=out, overwrite=True, progress=False, write_report=False)
    assert busy.exists()


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root may write anywhere")
def test_read_only_parent_is_refused_before_any_work(good, tmp_path, capsys):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        code = main(["analyse", str(good[0]), "--out", str(ro / "plant1"), "--quiet"])
    finally:
        ro.chmod(0o755)
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "not writable" in err[0] and str(ro) in err[0]


def test_table_text_reads_back_cell_for_cell_with_the_csv_module():
    """The tables' CSV text, checked by Python's csv module (the reference reader) and by
    pandas: text with commas, quotes, line breaks and a carriage return comes back cell for
    cell; floats are exact (repr), NaN is an empty cell, booleans are true/false."""
    import csv
    import io

    import numpy as np

    from apextrack.tables import to_csv_text

    df = pd.DataFrame({
        "name": ["plain", "a,b", 'say "hi"', "two\nlines", "cr\rcell", None],
        "x": [0.1, 1e-300, float("nan"), float("inf"), -2.5, 1 / 3],
        "x32": np.array([0.1, 2.0, np.nan, 3.5, -1.0, 0.0], np.float32),
        "n": np.arange(6, dtype=np.int64) - 2,
        "flag": [True, False, True, False, True, False],
        "count": pd.array([1, None, 3, 4, 5, 6], dtype="Int64"),
    })
    rows = list(csv.reader(io.StringIO(to_csv_text(df), newline="")))
    assert rows[0] == list(df.columns)
    assert [r[0] for r in rows[1:]] == ["plain", "a,b", 'say "hi"', "two\nlines", "cr\rcell", ""]
    assert [r[1] for r in rows[1:]] == [repr(0.1), repr(1e-300), "", "inf", "-2.5", repr(1 / 3)]
    assert [r[2] for r in rows[1:]] == [repr(float(np.float32(0.1))), "2.0", "", "3.5", "-1.0", "0.0"]
    assert [r[3] for r in rows[1:]] == ["-2", "-1", "0", "1", "2", "3"]
    assert [r[4] for r in rows[1:]] == ["true", "false"] * 3
    assert [r[5] for r in rows[1:]] == ["1", "", "3", "4", "5", "6"]
    # a table without rows is its header alone
    assert to_csv_text(df.iloc[0:0]) == ",".join(df.columns) + "\n"
