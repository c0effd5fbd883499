"""napari writer: the corrected tables of an analysis, as the project's CSV tables.

The writer is offered for apextrack's point layers (detections, primordia, apex centre). It
writes into the chosen folder every table of the analysis (same schema as ``analyse``), the
summary and the run record with the edit log; it never replaces a folder that already holds
tables.
"""

from __future__ import annotations

from pathlib import Path

from ..edits import TRACK_ONLY_COLUMNS, Correction
from ..errors import OutputError
from .layers import META_KEY
from ._reader import register, session_for


def _result_of(layer_data) -> tuple[str | None, dict]:
    roles = {}
    folder = None
    for data, attrs, _type in layer_data:
        meta = (attrs.get("metadata") or {}).get(META_KEY) or {}
        if meta.get("result"):
            folder = folder or meta["result"]
            roles[meta.get("role")] = (data, attrs)
    return folder, roles


def write_corrections(path: str, layer_data: list[tuple]) -> list[str]:
    """npe2 writer hook: save the corrected tables of the analysis the layers belong to."""
    folder, roles = _result_of(layer_data)
    if folder is None:
        raise OutputError("these layers do not belong to an apextrack analysis", path,
                          "open a results folder with the apextrack reader first")
    corr = session_for(folder)
    if corr is None:  # no review session: take the tables from the layers' features
        corr = register(Correction.from_folder(folder))
        tracks = roles.get("detections", (None, {}))[1].get("features")
        centres = roles.get("centre", (None, {}))[1].get("features")
        if tracks is not None and len(tracks) and all(c in tracks.columns for c in ("track_id", "detection_id")):
            tracks = tracks.drop(columns=[c for c in TRACK_ONLY_COLUMNS if c not in ("track_id",)
                                          and c in tracks.columns])
            corr.replace_tables(tracks=tracks, centres=centres, what="tables taken from the napari layers")
    out = corr.save(Path(path))
    return [str(out)]
