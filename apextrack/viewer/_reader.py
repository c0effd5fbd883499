"""napari reader: a time-lapse stack (any format apextrack reads) or an analysis results folder.

A results folder gives the stack it was computed from (when the file is still there), the top
view and every overlay; its tables are held by a :class:`~apextrack.edits.Correction` registered
under the folder, so that the review widget and the writer work on the same tables.
"""

from __future__ import annotations

from pathlib import Path

from ..edits import Correction
from ..stack import TIFF_SUFFIXES, read_stack
from . import layers as L

#: Live correction sessions by results folder (``str(Path.resolve())``).
SESSIONS: dict[str, Correction] = {}


def _key(folder) -> str:
    return str(Path(folder).resolve())


def register(correction: Correction) -> Correction:
    """Remember a correction session under its folder (replacing an older one)."""
    if correction.source is not None:
        SESSIONS[_key(correction.source)] = correction
    return correction


def session_for(folder) -> Correction | None:
    """The live correction session of a results folder, if one is open."""
    return None if folder is None else SESSIONS.get(_key(folder))


def is_result_folder(path) -> bool:
    """True for a folder written by ``apextrack analyse`` (or a saved ``corrected/`` folder)."""
    p = Path(path)
    return p.is_dir() and (p / "summary.json").is_file() and (p / "tracks.csv").is_file()


def is_stack_path(path) -> bool:
    """True for a path :func:`apextrack.stack.read_stack` may read (TIFF, zarr, folder of TIFFs)."""
    p = Path(path)
    name = p.name.lower()
    if p.is_file():
        return name.endswith(TIFF_SUFFIXES)
    if p.is_dir():
        if name.endswith(".zarr") or (p / ".zarray").exists() or (p / "zarr.json").exists():
            return True
        return any(q.name.lower().endswith(TIFF_SUFFIXES) for q in p.iterdir())
    return False


def napari_get_reader(path):
    """npe2 reader hook: a results folder or a stack; ``None`` for anything else."""
    if isinstance(path, (list, tuple)):
        if len(path) != 1:
            return None
        path = path[0]
    if is_result_folder(path):
        return read_result
    if is_stack_path(path):
        return read_stack_file
    return None


def read_stack_file(path) -> list[tuple]:
    """Layers of a stack: the image at µm/hour scale and its (lazy) maximum top view."""
    if isinstance(path, (list, tuple)):
        path = path[0]
    stack = read_stack(path)
    return L.stack_layers(stack) + [L.topview_of_stack(stack)]


def stack_of(correction: Correction):
    """The stack an analysis was computed from, opened with the analysis' overrides, or None."""
    src = correction.run.get("input")
    if not src or src == "array" or not Path(src).exists():
        return None
    from ..pipeline import open_stack

    return open_stack(src, correction.settings)


def topview_path(correction: Correction) -> Path | None:
    """``topview.tif`` of the results folder (for a corrected folder: of the original one)."""
    if correction.source is not None and (correction.source / "topview.tif").exists():
        return correction.source / "topview.tif"
    tv = (correction.run.get("corrections") or {}).get("topview")
    return Path(tv) if tv and Path(tv).exists() else None


def result_layers(correction: Correction, with_stack: bool = True) -> list[tuple]:
    """Stack (when found), top view and overlays of a correction session."""
    out: list[tuple] = []
    if with_stack:
        stack = stack_of(correction)
        if stack is not None:
            out += L.stack_layers(stack)
    tv = topview_path(correction)
    if tv is not None:
        out.append(L.topview_layer(tv, correction.pixel_size_um, correction.interval_h, correction.source))
    return out + L.overlay_layers(correction)


def read_result(path) -> list[tuple]:
    """Layers of an analysis results folder (see :func:`result_layers`)."""
    if isinstance(path, (list, tuple)):
        path = path[0]
    correction = register(Correction.from_folder(path))
    return result_layers(correction)
