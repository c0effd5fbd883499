"""A results folder: writing every table of an analysis and reading them back.

A results folder holds ``detections.csv``, ``tracks.csv``, ``primordia.csv``,
``divergence.csv``, ``centres.csv`` (and ``parastichies.csv`` and others when produced),
``summary.json``, ``run.json`` and ``topview.tif`` (the top view of every frame, at µm scale).
"""

from __future__ import annotations

import os
import platform
import shutil
import time
from pathlib import Path

import pandas as pd

from .errors import OutputError, ResultsError
from .tables import TABLE_FILES, read_json, read_table, write_json, write_table

#: Tables every results folder must hold.
REQUIRED_TABLES = ["detections", "tracks", "primordia", "divergence"]
#: Optional tables read when present.
OPTIONAL_TABLES = ["centres", "parastichies", "registration", "permutations"]


def write_result_tables(tables: dict[str, pd.DataFrame], summary: dict, folder: str | Path) -> None:
    """Write tables (``<name>.csv``) and ``summary.json`` into ``folder``, file by file atomically."""
    folder = Path(folder)
    for name, df in tables.items():
        write_table(df, folder / f"{name}.csv", name if name in TABLE_FILES else None)
    write_json(summary, folder / "summary.json")


def load_results(folder: str | Path) -> dict:
    """Read a results folder back.

    Returns a dict with the tables by name, ``summary`` and ``run`` (dicts), ``topview``
    (path or None) and ``folder``. A missing table or a table whose columns were changed raises
    :class:`~apextrack.errors.ResultsError` naming the file.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise ResultsError("is not a results folder", folder, "give the folder written by 'apextrack analyse'")
    out: dict = {"folder": folder}
    for name in REQUIRED_TABLES:
        out[name] = read_table(folder / f"{name}.csv", name)
    for name in OPTIONAL_TABLES:
        p = folder / f"{name}.csv"
        if p.exists():
            out[name] = read_table(p, name if name in TABLE_FILES else None)
            if name not in TABLE_FILES:
                out[name] = pd.read_csv(p)
    out["summary"] = read_json(folder / "summary.json")
    if not isinstance(out["summary"], dict):
        raise ResultsError("summary is not a JSON object", folder / "summary.json", "re-run the analysis")
    run = folder / "run.json"
    out["run"] = read_json(run) if run.exists() else {}
    tv = folder / "topview.tif"
    out["topview"] = tv if tv.exists() else None
    return out


def check_output_dir(out: Path, overwrite: bool) -> None:
    """Refuse an existing non-empty folder unless ``overwrite``; check the parent is writable."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError("exists and is not a folder", out, "give a folder path for the results")
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise OutputError("results folder exists and is not empty", out, "use --overwrite or another --out")
    parent = out.parent if not out.exists() else out
    probe = parent
    while not probe.exists():
        probe = probe.parent
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputError("folder is not writable", probe, "choose another output folder")


class StagedFolder:
    """A hidden sibling folder that receives every output and replaces ``out`` when complete."""

    def __init__(self, out: Path):
        self.out = Path(out)
        self.out.parent.mkdir(parents=True, exist_ok=True)
        host = platform.node().replace("-", "_") or "host"
        self._sweep(host)
        self.path = self.out.parent / f".{self.out.name}.partial-{host}-{os.getpid()}-{time.time_ns()}"
        try:
            self.path.mkdir()
        except OSError as exc:
            raise OutputError(f"cannot create the results folder ({exc.strerror})", self.out.parent,
                              "choose another output folder") from None

    def _sweep(self, host: str) -> None:
        """Remove staging folders left by killed runs (this host, process no longer running)."""
        for left in self.out.parent.glob(f".{self.out.name}.partial-{host}-*"):
            pid = left.name.rsplit("-", 2)[-2]
            if not pid.isdigit() or int(pid) == os.getpid():
                continue
            try:
                os.kill(int(pid), 0)
            except ProcessLookupError:
                shutil.rmtree(left, ignore_errors=True)
            except (OSError, ValueError):
                pass

    def commit(self) -> None:
        old = None
        if self.out.exists():
            if self.out.is_dir() and not any(self.out.iterdir()):
                self.out.rmdir()
            else:
                old = self.out.parent / f".{self.out.name}.old-{os.getpid()}-{time.time_ns()}"
                os.replace(self.out, old)
        os.replace(self.path, self.out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)

    def abort(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)
