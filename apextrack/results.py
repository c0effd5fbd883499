"""A results folder: writing every table of an analysis and reading them back.

A results folder holds ``detections.csv``, ``tracks.csv``, ``primordia.csv``,
``divergence.csv``, ``centres.csv`` (and ``parastichies.csv`` and others when produced),
``summary.json``, ``run.json`` and ``topview.tif`` (the top view of every frame, at µm scale).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from .errors import ResultsError
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
