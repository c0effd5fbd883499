"""Hand corrections of an analysis: edit operations on the tables, re-measurement, an edit log
and undo.

A person reviewing an analysis (in the napari viewer, or in a script) corrects what the
automatic stages got wrong:

- delete a false detection, add a missed one;
- merge two tracks that are one primordium, split a track that holds two;
- set the birth rank of a primordium by hand, or mark two primordia co-initiated;
- move the apex centre.

Each operation is a pure function on DataFrames (``delete_detections``, ``add_detection``,
``merge_tracks``, ``split_track``, ``set_birth_rank``, ``set_co_initiated``, ``move_centre``).
:class:`Correction` strings them together: it holds the tables of one results folder, applies an
edit, re-runs every measurement after linking with :func:`apextrack.pipeline.measure_tracks` and
:func:`apextrack.pipeline.make_summary` (exactly what :func:`apextrack.pipeline.analyse` runs),
logs the edit (what, when) for the run record, undoes the last edit, and saves the corrected
tables next to the original ones.

Hand-set birth ranks are kept as *rank edits* (track id → rank, pairs marked co-initiated): after
every edit the automatic birth order is re-estimated from the tracks and the rank edits are
applied on top of it, so that a later track edit does not silently drop a rank set by hand.

The tables a :class:`Correction` holds are always exactly what its :meth:`Correction.save`
writes and :func:`apextrack.results.load_results` reads back (they pass through the project's
CSV codec after every edit).

Examples
--------
>>> from apextrack.edits import Correction
>>> c = Correction.from_folder("results")                      # doctest: +SKIP
>>> c.delete_detections([17])                                  # doctest: +SKIP
>>> c.split_track(track_id=3, frame=6)                         # doctest: +SKIP
>>> c.summary["divergence_mean_deg"]                           # doctest: +SKIP
>>> c.save()                                                   # results/corrected/  # doctest: +SKIP
"""

from __future__ import annotations

import copy
import json
import math
import tempfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from .errors import AnalysisError, OutputError, ResultsError
from .settings import Settings, from_dict
from .tables import read_table, to_json_text, write_json, write_table

#: Name of the folder (inside a results folder) that receives corrected tables by default.
CORRECTED_DIRNAME = "corrected"
#: Tables re-computed after every edit (in the order they are written).
EDITED_TABLES = ["detections", "tracks", "primordia", "divergence", "centres", "parastichies"]
#: Tables that no edit changes and that are carried over unchanged when present.
CARRIED_TABLES = ["registration"]
#: Columns of the detections table (the tracks table adds ``track_id``, ``r_um``, ``theta_deg``).
TRACK_ONLY_COLUMNS = ["track_id", "r_um", "theta_deg"]
#: Every kind of edit, as written in the log.
EDIT_ACTIONS = ("delete_detections", "add_detection", "merge_tracks", "split_track",
                "set_birth_rank", "set_co_initiated", "move_centre", "replace_tables", "undo")


class EditError(AnalysisError):
    """An edit cannot be applied to the tables as they are (e.g. merging overlapping tracks)."""


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


# ----------------------------------------------------------------------------------------------
# pure table operations
# ----------------------------------------------------------------------------------------------
def delete_detections(tracks: pd.DataFrame, detections: pd.DataFrame,
                      detection_ids: Iterable[int]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Remove detections (by ``detection_id``) from the tracks and detections tables.

    Returns
    -------
    tracks, detections : DataFrame
        New tables without those rows; row order is kept.

    Examples
    --------
    >>> import pandas as pd
    >>> det = pd.DataFrame({"detection_id": [0, 1], "frame": [0, 1], "x_um": [1.0, 2.0]})
    >>> tr = det.assign(track_id=[0, 0])
    >>> tr, det = delete_detections(tr, det, [1])
    >>> tr["detection_id"].tolist(), det["detection_id"].tolist()
    ([0], [0])
    """
    ids = sorted({int(i) for i in detection_ids})
    if not ids:
        raise EditError("no detection selected", hint="select the detection(s) to delete")
    known = set(detections["detection_id"].astype(np.int64).tolist())
    missing = [i for i in ids if i not in known]
    if missing:
        raise EditError(f"no detection with id {', '.join(map(str, missing))}",
                        hint="the detection may have been deleted already")
    keep_t = ~tracks["detection_id"].isin(ids)
    keep_d = ~detections["detection_id"].isin(ids)
    return tracks[keep_t].reset_index(drop=True), detections[keep_d].reset_index(drop=True)


def add_detection(tracks: pd.DataFrame, detections: pd.DataFrame, frame: int, x_um: float, y_um: float,
                  time_h: float, radius_um: float | None = None, track_id: int | None = None,
                  pixel_size_um: float | None = None) -> tuple[pd.DataFrame, pd.DataFrame, int, int]:
    """Add a detection placed by hand.

    The new detection gets the next free ``detection_id`` and, unless ``track_id`` is given,
    a new track of its own. Image measures (intensity, SNR, background) are left empty (NaN):
    they were not measured. ``radius_um`` defaults to the median radius of all detections.

    Returns
    -------
    tracks, detections : DataFrame
    detection_id, track_id : int
        Identifiers of the new row.
    """
    frame = int(frame)
    x_um, y_um, time_h = float(x_um), float(y_um), float(time_h)
    if not (math.isfinite(x_um) and math.isfinite(y_um) and math.isfinite(time_h)):
        raise EditError("the new detection's position is not a finite number", hint="place it on the image")
    if track_id is not None:
        track_id = int(track_id)
        rows = tracks[tracks["track_id"] == track_id]
        if rows.empty:
            raise EditError(f"no track with id {track_id}", hint="choose an existing track or a new one")
        if (rows["frame"] == frame).any():
            raise EditError(f"track {track_id} already has a detection in frame {frame}",
                            hint="delete that detection first or add to a new track")
    det_id = int(detections["detection_id"].max()) + 1 if len(detections) else 0
    det_id = max(det_id, int(tracks["detection_id"].max()) + 1 if len(tracks) else 0)
    new_track = int(tracks["track_id"].max()) + 1 if len(tracks) else 0
    tid = new_track if track_id is None else track_id
    if radius_um is None:
        radius_um = float(np.nanmedian(detections["radius_um"])) if len(detections) else float("nan")
    values: dict[str, Any] = {"detection_id": det_id, "frame": frame, "time_h": time_h,
                              "x_um": x_um, "y_um": y_um, "radius_um": float(radius_um)}
    if pixel_size_um:
        values["x_px"] = x_um / pixel_size_um
        values["y_px"] = y_um / pixel_size_um

    def row_for(df: pd.DataFrame, extra: dict) -> pd.DataFrame:
        v = dict(values)
        v.update(extra)
        row = {}
        for col in df.columns:
            s = df[col]
            if col in v:
                row[col] = v[col]
            elif pd.api.types.is_bool_dtype(s):
                row[col] = False
            elif pd.api.types.is_integer_dtype(s):
                row[col] = -1
            elif pd.api.types.is_float_dtype(s):
                row[col] = float("nan")
            else:
                row[col] = None
        return pd.DataFrame([row], columns=df.columns)

    det = pd.concat([detections, row_for(detections, {})], ignore_index=True)
    tr = pd.concat([tracks, row_for(tracks, {"track_id": tid, "r_um": float("nan"),
                                             "theta_deg": float("nan")})], ignore_index=True)
    tr = tr.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    return tr, det, det_id, tid


def merge_tracks(tracks: pd.DataFrame, track_a: int, track_b: int) -> tuple[pd.DataFrame, int]:
    """Merge two tracks into one (the smaller id is kept).

    Raises :class:`EditError` when both tracks hold a detection in the same frame.

    Returns
    -------
    tracks : DataFrame
    kept : int
        The id of the merged track.
    """
    a, b = int(track_a), int(track_b)
    if a == b:
        raise EditError(f"both selections belong to track {a}", hint="select detections of two different tracks")
    ids = set(tracks["track_id"].tolist())
    for t in (a, b):
        if t not in ids:
            raise EditError(f"no track with id {t}", hint="select detections of existing tracks")
    keep, drop = min(a, b), max(a, b)
    fa = set(tracks.loc[tracks["track_id"] == keep, "frame"].tolist())
    fb = set(tracks.loc[tracks["track_id"] == drop, "frame"].tolist())
    both = sorted(fa & fb)
    if both:
        raise EditError(f"tracks {keep} and {drop} both have a detection in frame(s) "
                        f"{', '.join(map(str, both))}", hint="delete the extra detection(s) first")
    out = tracks.copy()
    out.loc[out["track_id"] == drop, "track_id"] = keep
    out = out.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    return out, keep


def split_track(tracks: pd.DataFrame, track_id: int, frame: int) -> tuple[pd.DataFrame, int]:
    """Split a track at ``frame``: its detections from ``frame`` on form a new track.

    Returns
    -------
    tracks : DataFrame
    new_id : int
        Id of the new track (the next free id).
    """
    tid, frame = int(track_id), int(frame)
    rows = tracks["track_id"] == tid
    if not rows.any():
        raise EditError(f"no track with id {tid}", hint="select a detection of the track to split")
    later = rows & (tracks["frame"] >= frame)
    if not later.any() or later.sum() == rows.sum():
        frames = sorted(tracks.loc[rows, "frame"].tolist())
        raise EditError(f"track {tid} cannot be split at frame {frame} (it spans frames {frames[0]}–{frames[-1]})",
                        hint="go to a frame after the track's first frame and within it")
    new_id = int(tracks["track_id"].max()) + 1
    out = tracks.copy()
    out.loc[later, "track_id"] = new_id
    out = out.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    return out, new_id


def move_centre(centres: pd.DataFrame, frame: int, x_um: float, y_um: float,
                all_frames: bool = False) -> pd.DataFrame:
    """Move the apex centre of ``frame`` to ``(x_um, y_um)``.

    With ``all_frames`` every frame's centre is shifted by the same offset (the drift of the
    centre between frames is kept). The ``method`` column of the moved rows becomes ``"user"``.
    """
    frame = int(frame)
    sel = centres["frame"] == frame
    if not sel.any():
        raise EditError(f"no apex centre for frame {frame}", hint="go to a frame of the record")
    x_um, y_um = float(x_um), float(y_um)
    if not (math.isfinite(x_um) and math.isfinite(y_um)):
        raise EditError("the new centre is not a finite position", hint="place it on the image")
    out = centres.copy()
    if all_frames:
        dx = x_um - float(out.loc[sel, "x_um"].iloc[0])
        dy = y_um - float(out.loc[sel, "y_um"].iloc[0])
        out["x_um"] = out["x_um"] + dx
        out["y_um"] = out["y_um"] + dy
        out.loc[sel, "x_um"] = x_um  # exactly where it was put
        out.loc[sel, "y_um"] = y_um
        moved = pd.Series(True, index=out.index)
    else:
        out.loc[sel, "x_um"] = x_um
        out.loc[sel, "y_um"] = y_um
        moved = sel
    if "method" in out.columns:
        out["method"] = out["method"].astype(object)
        out.loc[moved, "method"] = "user"
    return out


def set_birth_rank(primordia: pd.DataFrame, track_id: int, rank: int) -> pd.DataFrame:
    """Give the primordium of ``track_id`` birth rank ``rank``; the others keep their order and
    are renumbered 1, 2, … around it."""
    tid, rank = int(track_id), int(rank)
    prim = primordia.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    hit = prim.index[prim["track_id"] == tid]
    if len(hit) == 0:
        raise EditError(f"track {tid} is not a primordium", hint="select a primordium")
    if not 1 <= rank <= len(prim):
        raise EditError(f"birth rank {rank} is out of range (1–{len(prim)})", hint="give a rank within the record")
    row = prim.loc[[hit[0]]]
    rest = prim.drop(index=hit[0])
    out = pd.concat([rest.iloc[: rank - 1], row, rest.iloc[rank - 1:]], ignore_index=True)
    out["birth_rank"] = np.arange(1, len(out) + 1, dtype=np.int64)
    return out


def set_co_initiated(primordia: pd.DataFrame, track_a: int, track_b: int, value: bool = True) -> pd.DataFrame:
    """Mark (or unmark) two primordia as co-initiated.

    When marking, the second is moved next to the first in the birth order (right after it)
    when they are not already successive.
    """
    a, b = int(track_a), int(track_b)
    if a == b:
        raise EditError("a primordium cannot be co-initiated with itself", hint="select two primordia")
    prim = primordia.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    for t in (a, b):
        if not (prim["track_id"] == t).any():
            raise EditError(f"track {t} is not a primordium", hint="select two primordia")
    if value:
        ra = int(prim.loc[prim["track_id"] == a, "birth_rank"].iloc[0])
        rb = int(prim.loc[prim["track_id"] == b, "birth_rank"].iloc[0])
        if abs(ra - rb) != 1:
            first, second = (a, b) if ra < rb else (b, a)
            r_first = min(ra, rb)
            prim = set_birth_rank(prim, second, r_first + 1 if r_first + 1 <= len(prim) else r_first)
    prim = prim.copy()
    prim.loc[prim["track_id"].isin([a, b]), "co_initiated"] = bool(value)
    prim["co_initiated"] = prim["co_initiated"].astype(bool)
    return prim


def apply_rank_edits(primordia: pd.DataFrame, rank_edits: Iterable[dict]) -> tuple[pd.DataFrame, list[str]]:
    """Apply hand-set birth ranks and co-initiation marks, in order, to a primordia table.

    Edits naming a track that is no longer a primordium are skipped; the returned notes say so.
    """
    out = primordia
    notes: list[str] = []
    for e in rank_edits:
        try:
            if e["action"] == "set_birth_rank":
                out = set_birth_rank(out, e["track_id"], min(int(e["rank"]), len(out)))
            elif e["action"] == "set_co_initiated":
                out = set_co_initiated(out, e["track_a"], e["track_b"], bool(e.get("value", True)))
        except EditError as exc:
            notes.append(f"hand-set birth order skipped ({exc.what})")
    return out.reset_index(drop=True), notes


# ----------------------------------------------------------------------------------------------
# re-measurement
# ----------------------------------------------------------------------------------------------
def summary_context(summary: dict) -> dict:
    """The stack's scale as :func:`~apextrack.pipeline.make_summary` wants it, from a summary."""
    return {k: summary.get(k) for k in ("stack", "n_frames", "pixel_size_um", "z_step_um", "interval_h")}


def remeasure(tracks: pd.DataFrame, detections: pd.DataFrame, centres: pd.DataFrame, settings: Settings,
              context: dict, rank_edits: Iterable[dict] = ()) -> tuple[dict[str, pd.DataFrame], dict, list[str]]:
    """Every measurement after linking, from (edited) tracks, detections and centres.

    The same library calls as :func:`apextrack.pipeline.analyse` after linking: birth order
    (re-estimated, then ``rank_edits`` applied), phyllotaxis, summary.

    Returns
    -------
    tables : dict of DataFrame
        detections, tracks, primordia, divergence, centres (and parastichies when produced).
    summary : dict
    notes : list of str
        Rank edits that could no longer be applied.
    """
    from .birth import order_primordia
    from .link import add_polar
    from .pipeline import make_summary, measure_tracks

    rank_edits = list(rank_edits)
    primordia, notes = None, []
    if rank_edits:
        auto, _ = order_primordia(add_polar(tracks, centres), settings.co_initiation_h, settings.min_track_frames)
        primordia, notes = apply_rank_edits(auto, rank_edits)
    measured = measure_tracks(tracks, centres, settings, primordia=primordia)
    summary = make_summary(measured, detections, settings, context)
    tables = {"detections": detections, "tracks": measured.tracks, "primordia": measured.primordia,
              "divergence": measured.phyllotaxis.divergence, "centres": centres}
    par = getattr(measured.phyllotaxis, "parastichies", None)
    if par is not None and not par.empty:
        tables["parastichies"] = par
    return tables, summary, notes


def through_csv(tables: dict[str, pd.DataFrame], summary: dict | None = None
                ) -> tuple[dict[str, pd.DataFrame], dict | None]:
    """The tables (and summary) exactly as writing them and reading them back gives them."""
    with tempfile.TemporaryDirectory(prefix="apextrack-edit-") as tmp:
        out = {}
        for name, df in tables.items():
            p = Path(tmp) / f"{name}.csv"
            schema = name if name in ("detections", "tracks", "primordia", "divergence") else None
            write_table(df, p, schema)
            out[name] = read_table(p, schema) if schema else _read_plain(p)
    if summary is not None:
        summary = json.loads(to_json_text(summary))
    return out, summary


def _read_plain(path: Path) -> pd.DataFrame:
    # as apextrack.results.load_results reads optional tables
    from .tables import TABLE_FILES

    name = path.stem
    df = read_table(path, name if name in TABLE_FILES else None)
    return pd.read_csv(path) if name not in TABLE_FILES else df


# ----------------------------------------------------------------------------------------------
# a correction session
# ----------------------------------------------------------------------------------------------
@dataclass
class _Snapshot:
    tables: dict[str, pd.DataFrame]
    summary: dict
    rank_edits: list[dict]


@dataclass
class Correction:
    """The tables of one analysis under correction, with the edit log and undo.

    Build one with :meth:`from_folder` (a results folder, or a ``corrected/`` folder saved
    earlier, whose edit log and hand-set ranks are restored) or :meth:`from_loaded`.

    Attributes
    ----------
    tables : dict of DataFrame
        detections, tracks, primordia, divergence, centres (parastichies when produced).
    summary : dict
        As ``summary.json``; re-computed after each edit.
    run : dict
        The run record of the analysis.
    settings : Settings
    log : list of dict
        One entry per edit: ``action``, ``when`` (UTC, ISO 8601) and its arguments/results.
    rank_edits : list of dict
        Hand-set birth ranks / co-initiation marks, re-applied after every edit.
    source : Path or None
        The folder the tables were read from.
    """

    tables: dict[str, pd.DataFrame]
    summary: dict
    run: dict
    settings: Settings
    source: Path | None = None
    log: list[dict] = field(default_factory=list)
    rank_edits: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    carried: dict[str, pd.DataFrame] = field(default_factory=dict)
    saved_to: Path | None = None
    _history: list[_Snapshot] = field(default_factory=list, repr=False)

    # -- construction -----------------------------------------------------------------------------
    @classmethod
    def from_loaded(cls, loaded: dict) -> "Correction":
        """From the dict :func:`apextrack.results.load_results` returns."""
        summary = dict(loaded["summary"])
        run = dict(loaded.get("run") or {})
        raw_settings = run.get("settings") or summary.get("settings") or {}
        settings = from_dict(raw_settings, source=str(loaded.get("folder", "")))
        tables = {name: loaded[name] for name in EDITED_TABLES if name in loaded}
        if "centres" not in tables:
            raise ResultsError("results folder has no centres.csv (the apex centre of each frame)",
                               loaded.get("folder"), "re-run the analysis with this apextrack version")
        carried = {name: loaded[name] for name in CARRIED_TABLES if name in loaded}
        tables.update(carried)
        corr = run.get("corrections") or {}
        return cls(tables=tables, summary=summary, run=run, settings=settings,
                   source=Path(loaded["folder"]) if loaded.get("folder") else None,
                   log=copy.deepcopy(corr.get("edits", [])), rank_edits=copy.deepcopy(corr.get("rank_edits", [])),
                   carried=carried)

    @classmethod
    def from_folder(cls, folder: str | Path) -> "Correction":
        """Read a results folder (or a corrected folder saved by :meth:`save`)."""
        from .results import load_results

        return cls.from_loaded(load_results(folder))

    # -- accessors --------------------------------------------------------------------------------
    @property
    def detections(self) -> pd.DataFrame:
        return self.tables["detections"]

    @property
    def tracks(self) -> pd.DataFrame:
        return self.tables["tracks"]

    @property
    def primordia(self) -> pd.DataFrame:
        return self.tables["primordia"]

    @property
    def divergence(self) -> pd.DataFrame:
        return self.tables["divergence"]

    @property
    def centres(self) -> pd.DataFrame:
        return self.tables["centres"]

    @property
    def pixel_size_um(self) -> float:
        return float(self.summary.get("pixel_size_um") or 1.0)

    @property
    def interval_h(self) -> float:
        return float(self.summary.get("interval_h") or 1.0)

    @property
    def context(self) -> dict:
        return summary_context(self.summary)

    @property
    def can_undo(self) -> bool:
        return bool(self._history)

    def frame_time_h(self, frame: int) -> float:
        """Time of a frame (from the centres table, else frame × interval)."""
        c = self.centres
        hit = c.loc[c["frame"] == int(frame), "time_h"]
        return float(hit.iloc[0]) if len(hit) else float(frame) * self.interval_h

    def track_of(self, detection_id: int) -> int:
        """Track id of a detection."""
        hit = self.tracks.loc[self.tracks["detection_id"] == int(detection_id), "track_id"]
        if hit.empty:
            raise EditError(f"no detection with id {detection_id}", hint="select a detection")
        return int(hit.iloc[0])

    # -- edits ------------------------------------------------------------------------------------
    def _apply(self, entry: dict, tracks: pd.DataFrame, detections: pd.DataFrame, centres: pd.DataFrame,
               rank_edits: list[dict]) -> dict:
        base = [c for c in tracks.columns if c not in ("r_um", "theta_deg")]
        tables, summary, notes = remeasure(tracks[base], detections, centres, self.settings, self.context, rank_edits)
        for name, df in self.carried.items():
            tables[name] = df
        tables, summary = through_csv(tables, summary)
        self._history.append(_Snapshot(self.tables, self.summary, copy.deepcopy(self.rank_edits)))
        self.tables, self.summary, self.rank_edits, self.notes = tables, summary, rank_edits, notes
        entry = {"action": entry.pop("action"), "when": _now(), **entry}
        self.log.append(entry)
        return entry

    def delete_detections(self, detection_ids: Iterable[int]) -> dict:
        """Delete detections (false positives). Returns the log entry."""
        ids = sorted({int(i) for i in detection_ids})
        tracks, det = delete_detections(self.tracks, self.detections, ids)
        if tracks.empty:
            raise EditError("cannot delete every detection", hint="keep at least one detection")
        return self._apply({"action": "delete_detections", "detection_ids": ids}, tracks, det, self.centres,
                           self.rank_edits)

    def add_detection(self, frame: int, x_um: float, y_um: float, radius_um: float | None = None,
                      track_id: int | None = None) -> dict:
        """Add a missed detection at ``(x_um, y_um)`` in ``frame`` (a new track unless ``track_id``)."""
        tracks, det, did, tid = add_detection(self.tracks, self.detections, frame, x_um, y_um,
                                              self.frame_time_h(frame), radius_um, track_id, self.pixel_size_um)
        return self._apply({"action": "add_detection", "frame": int(frame), "x_um": float(x_um),
                            "y_um": float(y_um), "detection_id": did, "track_id": tid},
                           tracks, det, self.centres, self.rank_edits)

    def merge_tracks(self, track_a: int, track_b: int) -> dict:
        """Merge two tracks (the smaller id is kept)."""
        tracks, kept = merge_tracks(self.tracks, track_a, track_b)
        return self._apply({"action": "merge_tracks", "track_a": int(track_a), "track_b": int(track_b),
                            "kept": kept}, tracks, self.detections, self.centres, self.rank_edits)

    def split_track(self, track_id: int, frame: int) -> dict:
        """Split a track at ``frame`` (that frame and later go to a new track)."""
        tracks, new_id = split_track(self.tracks, track_id, frame)
        return self._apply({"action": "split_track", "track_id": int(track_id), "frame": int(frame),
                            "new_track_id": new_id}, tracks, self.detections, self.centres, self.rank_edits)

    def set_birth_rank(self, track_id: int, rank: int) -> dict:
        """Set the birth rank of the primordium of ``track_id`` by hand."""
        set_birth_rank(self.primordia, track_id, rank)  # raises on a bad request
        e = {"action": "set_birth_rank", "track_id": int(track_id), "rank": int(rank)}
        return self._apply(dict(e), self.tracks, self.detections, self.centres, self.rank_edits + [e])

    def set_co_initiated(self, track_a: int, track_b: int, value: bool = True) -> dict:
        """Mark (``value=True``) or unmark two primordia as co-initiated."""
        set_co_initiated(self.primordia, track_a, track_b, value)
        e = {"action": "set_co_initiated", "track_a": int(track_a), "track_b": int(track_b), "value": bool(value)}
        return self._apply(dict(e), self.tracks, self.detections, self.centres, self.rank_edits + [e])

    def move_centre(self, frame: int, x_um: float, y_um: float, all_frames: bool = False) -> dict:
        """Move the apex centre of ``frame`` (or shift every frame's centre by the same offset)."""
        centres = move_centre(self.centres, frame, x_um, y_um, all_frames)
        return self._apply({"action": "move_centre", "frame": int(frame), "x_um": float(x_um), "y_um": float(y_um),
                            "all_frames": bool(all_frames)}, self.tracks, self.detections, centres, self.rank_edits)

    def undo(self) -> dict:
        """Undo the last edit (the log keeps both the edit and an ``undo`` entry)."""
        if not self._history:
            raise EditError("nothing to undo", hint="no edit has been made in this session")
        snap = self._history.pop()
        self.tables, self.summary, self.rank_edits = snap.tables, snap.summary, snap.rank_edits
        undone = next((e for e in reversed(self.log) if e.get("action") != "undo" and not e.get("undone")), None)
        if undone is not None:
            undone["undone"] = True
        entry = {"action": "undo", "when": _now(), "undid": None if undone is None else undone["action"]}
        self.log.append(entry)
        return entry

    # -- output -----------------------------------------------------------------------------------
    def run_record(self) -> dict:
        """The run record with the corrections: the edit log, the hand-set ranks, the source."""
        run = copy.deepcopy(self.run)
        corr = dict(run.get("corrections") or {})
        corr.update({"edits": copy.deepcopy(self.log), "rank_edits": copy.deepcopy(self.rank_edits),
                     "n_edits": sum(1 for e in self.log if e["action"] != "undo" and not e.get("undone"))})
        if "source" not in corr and self.source is not None:
            corr["source"] = str(self.source)
        if self.source is not None and "topview" not in corr:
            tv = self.source / "topview.tif"
            if tv.exists():
                corr["topview"] = str(tv)
        run["corrections"] = corr
        return run

    def default_folder(self) -> Path:
        """``<results>/corrected`` (or the folder itself when it is already a corrected folder)."""
        if self.source is None:
            raise OutputError("these tables were not read from a folder", hint="give the folder to save into")
        if "corrections" in self.run and self.source.name == CORRECTED_DIRNAME:
            return self.source
        return self.source / CORRECTED_DIRNAME

    def save(self, folder: str | Path | None = None, overwrite: bool = False) -> Path:
        """Write the corrected tables, ``summary.json`` and ``run.json`` (with the edit log).

        The default folder is ``corrected/`` inside the original results folder; the original
        tables are never touched. An existing folder holding tables is replaced only with
        ``overwrite=True``.
        """
        from .results import write_result_tables

        folder = Path(folder) if folder is not None else self.default_folder()
        if self.source is not None and folder.resolve() == self.source.resolve() and "corrections" not in self.run:
            if not overwrite:
                raise OutputError("this is the original results folder", folder,
                                  "save into another folder, or pass overwrite=True to replace the original tables")
        if folder.exists() and not folder.is_dir():
            raise OutputError("exists and is not a folder", folder, "give a folder to save into")
        own = self.saved_to is not None and folder.resolve() == Path(self.saved_to).resolve()
        if folder.exists() and any(folder.glob("*.csv")) and not (overwrite or own):
            raise OutputError("folder already holds tables", folder,
                              "choose overwrite to replace them, or another folder")
        tables = dict(self.tables)
        tables.update(self.carried)
        if folder.exists():  # drop tables this state no longer has (e.g. parastichies)
            for name in EDITED_TABLES:
                p = folder / f"{name}.csv"
                if name not in tables and p.exists():
                    p.unlink()
        write_result_tables(tables, self.summary, folder)
        write_json(self.run_record(), folder / "run.json")
        self.saved_to = folder
        return folder

    def replace_tables(self, tracks: pd.DataFrame | None = None, centres: pd.DataFrame | None = None,
                       what: str = "tables replaced") -> dict:
        """Take tracks (and detections, which are the tracks without the track columns) and/or
        centres edited elsewhere (e.g. directly in napari layers), re-measure and log it."""
        tr = self.tracks if tracks is None else tracks.reset_index(drop=True)
        det = self.detections if tracks is None else (
            tr[[c for c in self.detections.columns if c in tr.columns]]
            .sort_values("detection_id", kind="stable").reset_index(drop=True))
        cen = self.centres if centres is None else centres.reset_index(drop=True)
        return self._apply({"action": "replace_tables", "what": what}, tr, det, cen, self.rank_edits)
