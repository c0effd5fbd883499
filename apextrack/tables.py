"""The table schema, CSV reading and writing with units, and atomic file output.

Units live in column names (``time_h``, ``x_um``, ``theta_deg`` ...). Every table written here
can be read back by :func:`read_table` to the same values: floats are written with 17
significant digits (``repr`` precision, so they round-trip exactly), rows in a stable order.
Every file is written to a temporary name in the destination folder and renamed into place, so
an interrupted run never leaves half a table.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import OutputError, ResultsError


@dataclass(frozen=True)
class Column:
    """One column of a table: its name, dtype kind, unit and meaning."""

    name: str
    kind: str  # "int", "float", "bool", "str"
    unit: str
    meaning: str
    required: bool = True


def _c(name, kind, unit, meaning, required=True):
    return Column(name, kind, unit, meaning, required)


#: Columns of each table. Required columns must be present when a table is read back;
#: optional columns are written when a stage produces them.
SCHEMA: dict[str, list[Column]] = {
    "detections": [
        _c("frame", "int", "", "timepoint index, from 0"),
        _c("time_h", "float", "h", "time of the frame since the first frame"),
        _c("x_um", "float", "µm", "blob centre, image column axis (x grows to the right)"),
        _c("y_um", "float", "µm", "blob centre, image row axis (y grows downward)"),
        _c("z_um", "float", "µm", "blob centre height (3D stacks only)", required=False),
        _c("radius_um", "float", "µm", "blob radius (√2·σ of the best Laplacian-of-Gaussian scale)"),
        _c("intensity", "float", "a.u.", "peak intensity above local background"),
        _c("snr", "float", "", "signal-to-noise ratio: peak above background / background noise SD"),
        _c("background", "float", "a.u.", "local background level", required=False),
        _c("integrated_intensity", "float", "a.u.", "summed intensity above background within the radius", required=False),
        _c("detection_id", "int", "", "row identifier of the detection", required=False),
    ],
    "tracks": [
        _c("track_id", "int", "", "track identifier (one per primordium)"),
        _c("r_um", "float", "µm", "distance from the apex centre"),
        _c("theta_deg", "float", "deg", "azimuth about the apex centre, counter-clockwise on the displayed image, [0, 360)"),
        _c("track_n_frames", "int", "", "number of detections in this track", required=False),
        _c("track_gaps", "int", "frames", "frames missed inside this track (bridged by the linking memory)", required=False),
        _c("track_mean_snr", "float", "", "mean signal-to-noise ratio of the track's detections", required=False),
        _c("track_motion_residual_um", "float", "µm", "RMS distance of the track's detections from where the fitted motion predicts them", required=False),
        _c("track_flags", "str", "", "quality marks separated by ';': short, split (cut at a jump), poor_fit", required=False),
    ],
    "primordia": [
        _c("birth_rank", "int", "", "order of birth, 1 = first born in the record"),
        _c("track_id", "int", "", "track of this primordium"),
        _c("emergence_time_h", "float", "h", "estimated time of emergence"),
        _c("emergence_frame", "int", "", "first frame in which the primordium is detected"),
        _c("x_um", "float", "µm", "position at emergence (first detection), image column axis"),
        _c("y_um", "float", "µm", "position at emergence (first detection), image row axis"),
        _c("r_um", "float", "µm", "distance from the apex centre at emergence"),
        _c("theta_deg", "float", "deg", "azimuth at emergence, counter-clockwise, [0, 360)"),
        _c("co_initiated", "bool", "", "true when the birth order with a neighbour cannot be told apart"),
        _c("emergence_time_sd_h", "float", "h", "uncertainty (1 SD) of the emergence time", required=False),
        _c("rank_confidence", "float", "", "probability that the rank is right given the timing uncertainty", required=False),
        _c("co_initiated_with", "str", "", "birth ranks of the primordia it is co-initiated with, separated by ';'", required=False),
        _c("emergence_time_size_h", "float", "h", "emergence time from the primordium's size clock (ln radius fitted over the track)", required=False),
        _c("n_frames", "int", "", "number of detections in the primordium's track", required=False),
        _c("fit_residual_um", "float", "µm", "RMS residual of the track's r(t) about the fitted growth law", required=False),
        _c("track_flags", "str", "", "quality marks of the track (see the tracks table)", required=False),
    ],
    "divergence": [
        _c("from_rank", "int", "", "birth rank of the earlier primordium"),
        _c("to_rank", "int", "", "birth rank of the next primordium"),
        _c("angle_deg", "float", "deg", "divergence angle in the direction of the generative spiral, [0, 360)"),
        _c("interval_h", "float", "h", "time between the two emergences"),
        _c("signed_angle_deg", "float", "deg", "azimuth difference, counter-clockwise positive, [-180, 180)", required=False),
        _c("angle_class", "str", "", "class of the angle under the permutation labelling (α, 2α, -α, 3α, -2α; α = expected angle)", required=False),
        _c("class_residual_deg", "float", "deg", "angle minus its class centre, [-180, 180)", required=False),
        _c("permutation_id", "int", "", "permuted block of birth order the pair belongs to (0 = none)", required=False),
        _c("unexplained", "bool", "", "the angle fits no class (von Mises density below uniform)", required=False),
        _c("corrected_angle_deg", "float", "deg", "k-th divergence angle after correcting the birth order", required=False),
        _c("angle_source", "str", "", "azimuths taken in a common frame ('common_frame') or at emergence ('emergence')", required=False),
        _c("frame", "int", "", "common frame of the two azimuths (-1 when none)", required=False),
        _c("from_theta_deg", "float", "deg", "azimuth of the earlier primordium used for the angle", required=False),
        _c("to_theta_deg", "float", "deg", "azimuth of the next primordium used for the angle", required=False),
        _c("co_initiated", "bool", "", "the two primordia were initiated together (same node)", required=False),
    ],
    "parastichies": [
        _c("frame", "int", "", "frame whose positions gave the parastichies"),
        _c("birth_rank", "int", "", "birth rank of the primordium"),
        _c("family", "str", "", "'m' (fewer spirals) or 'n' (more spirals)"),
        _c("parastichy_number", "int", "", "number of spirals of the family (m or n)"),
        _c("spiral_index", "int", "", "which spiral of the family the primordium lies on (0 .. number-1)"),
        _c("winding", "str", "", "way the family's spirals turn followed outward: 'ccw' or 'cw'", required=False),
    ],
}

# tracks carry every detection column as well
SCHEMA["tracks"] = SCHEMA["detections"] + SCHEMA["tracks"]

#: File name of each table in a results folder.
TABLE_FILES = {name: f"{name}.csv" for name in SCHEMA}


def columns_of(table: str, required_only: bool = False) -> list[str]:
    """Column names of a table in schema order."""
    return [c.name for c in SCHEMA[table] if c.required or not required_only]


def order_columns(df: pd.DataFrame, table: str) -> pd.DataFrame:
    """Put the schema columns first (in schema order), then any extra columns in their order."""
    known = [c for c in columns_of(table) if c in df.columns]
    extra = [c for c in df.columns if c not in known]
    return df[known + extra]


def _format_float(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(float(x))


def _cell_texts(s: pd.Series) -> list[str]:
    """The CSV text of every cell of a column: ``true``/``false``, floats exactly (``repr``,
    empty for NaN), integers, and anything else as ``str`` (empty for a missing value). Columns
    of numpy's plain types are converted as a whole (through Python numbers: a pandas map per
    cell cost most of the time of writing the tables)."""
    dt = s.dtype
    if isinstance(dt, np.dtype) and dt.kind in "biuf":
        values = s.to_numpy().tolist()
        if dt.kind == "b":
            return ["true" if v else "false" for v in values]
        if dt.kind == "f":
            return [_format_float(v) for v in values]
        return [str(v) for v in values]
    if pd.api.types.is_bool_dtype(s):
        return s.map(lambda v: "true" if bool(v) else "false").tolist()
    if pd.api.types.is_float_dtype(s):
        return s.map(_format_float).tolist()
    if pd.api.types.is_integer_dtype(s):
        return s.map(lambda v: "" if pd.isna(v) else str(int(v))).tolist()
    return s.map(lambda v: "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)).tolist()


def to_csv_text(df: pd.DataFrame) -> str:
    """Render a DataFrame as CSV text with exact, deterministic float formatting."""
    import csv
    import io

    if len(df.columns) == 0:
        return pd.DataFrame(index=df.index).to_csv(index=False, lineterminator="\n")
    columns = [_cell_texts(df.iloc[:, i]) for i in range(len(df.columns))]
    # the csv module quotes only the characters of its line terminator: with a carriage return
    # inside a text cell, rows are written with "\r\n" (so that the cell is quoted), then joined
    # with "\n"
    has_cr = any("\r" in v for col in columns for v in col) or any("\r" in str(c) for c in df.columns)
    rows = [list(map(str, df.columns)), *zip(*columns)]
    if has_cr:
        lines = []
        for row in rows:
            buf = io.StringIO()
            csv.writer(buf, lineterminator="\r\n").writerow(row)
            lines.append(buf.getvalue()[:-2])
        return "\n".join(lines) + "\n"
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    return buf.getvalue()


def _umask_mode() -> int:
    """File mode an ordinary ``open()`` would give (0o666 less the umask)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def atomic_write_text(path: str | Path, text: str) -> None:
    """Write text to ``path`` through a temporary file in the same folder and a rename."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    except OSError as exc:
        raise OutputError(f"cannot write here ({exc.strerror or exc})", path.parent,
                          "choose another output folder") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _umask_mode())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write bytes to ``path`` through a temporary file and a rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _umask_mode())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_table(df: pd.DataFrame, path: str | Path, table: str | None = None) -> Path:
    """Write a table as CSV (atomically); schema columns first when ``table`` is given."""
    if table is not None:
        df = order_columns(df, table)
    atomic_write_text(path, to_csv_text(df.reset_index(drop=True)))
    return Path(path)


def _json_default(obj: Any):
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, (set, tuple)):
        return list(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _clean_json(obj: Any) -> Any:
    """Replace NaN/inf by None so that the JSON is standard."""
    if isinstance(obj, dict):
        return {str(k): _clean_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean_json(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return None if (math.isnan(v) or math.isinf(v)) else v
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def to_json_text(obj: Any) -> str:
    """Deterministic JSON text (sorted keys, NaN as null)."""
    return json.dumps(_clean_json(obj), indent=2, sort_keys=True, default=_json_default,
                      ensure_ascii=False) + "\n"


def write_json(obj: Any, path: str | Path) -> Path:
    """Write JSON atomically with deterministic formatting."""
    atomic_write_text(path, to_json_text(obj))
    return Path(path)


def read_json(path: str | Path) -> Any:
    """Read a JSON file, with a clear error when it is missing or broken."""
    path = Path(path)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ResultsError("file is missing", path, "re-run the analysis") from None
    except json.JSONDecodeError as exc:
        raise ResultsError(f"not valid JSON ({exc.msg} at line {exc.lineno})", path,
                           "re-run the analysis") from None


_KIND_DTYPE = {"int": "int64", "float": "float64", "bool": "bool", "str": "object"}


def read_table(path: str | Path, table: str | None = None) -> pd.DataFrame:
    """Read a CSV table written by :func:`write_table`.

    When ``table`` names a schema, the required columns are checked and schema columns get
    their dtype; a missing or renamed column raises :class:`~apextrack.errors.ResultsError`.
    """
    path = Path(path)
    if not path.exists():
        raise ResultsError("table is missing", path, "re-run the analysis or give the right folder")
    try:
        df = pd.read_csv(path, keep_default_na=True, na_values=[""],
                         dtype=str if table is None else None)
    except pd.errors.EmptyDataError:
        raise ResultsError("table is empty (no header)", path, "re-run the analysis") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise ResultsError(f"not a readable CSV table ({str(exc).splitlines()[0]})", path,
                           "re-run the analysis") from None
    if table is None:
        return df
    missing = [c for c in columns_of(table, required_only=True) if c not in df.columns]
    if missing:
        raise ResultsError(
            f"{table} table lacks column(s) {', '.join(missing)} (found: {', '.join(map(str, df.columns))})",
            path, "columns and units must be as apextrack writes them")
    # text columns exactly as written ("1", "NA" stay text; an empty cell is missing)
    text_cols = [c.name for c in SCHEMA[table] if c.kind == "str" and c.name in df.columns]
    if text_cols:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, usecols=text_cols)
        for name in text_cols:
            df[name] = raw[name].astype(object).where(raw[name] != "", None)
    for col in SCHEMA[table]:
        if col.name not in df.columns:
            continue
        s = df[col.name]
        try:
            if col.kind == "bool":
                if s.dtype != bool:
                    text = s.map(lambda v: "" if pd.isna(v) else str(v).strip().lower())
                    if not text.isin(["true", "1", "yes", "false", "0", "no", "", "1.0", "0.0"]).all():
                        raise ValueError("not true/false")
                    s = text.isin(["true", "1", "yes", "1.0"])
                df[col.name] = s.astype(bool)
            elif col.kind == "int":
                if s.isna().any():
                    df[col.name] = s.astype("Int64")
                else:
                    df[col.name] = s.astype("int64")
            elif col.kind == "float":
                df[col.name] = pd.to_numeric(s, errors="raise").astype("float64")
        except (ValueError, TypeError):
            raise ResultsError(f"column {col.name} holds values that are not {col.kind}", path,
                               "columns and units must be as apextrack writes them") from None
    return df


def sha256_file(path: str | Path, chunk: int = 1 << 18, stop=None) -> str | None:
    """SHA-256 checksum of a file, read in chunks into one reused buffer (so that hashing a
    large file holds ``chunk`` bytes, not more); None when ``stop`` (a
    :class:`threading.Event`) is set before the end."""
    h = hashlib.sha256()
    buf = bytearray(chunk)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:
        while True:
            if stop is not None and stop.is_set():
                return None
            n = fh.readinto(buf)
            if not n:
                break
            h.update(view[:n])
    return h.hexdigest()
