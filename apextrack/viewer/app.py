"""Opening stacks and results in a napari viewer and keeping the overlays in step with the tables.

Used by the ``apextrack view`` command, the run widget (to show a finished analysis) and the
review widget (to redraw the overlays after an edit).
"""

from __future__ import annotations

from pathlib import Path

from ..edits import Correction
from ..errors import InputError
from . import layers as L
from ._reader import (is_result_folder, is_stack_path, read_stack_file, register, result_layers,
                      session_for)


def add_layer_tuples(viewer, tuples) -> list:
    """Add napari layer data tuples to a viewer (public ``add_<type>`` calls); return the layers."""
    out = []
    for data, kwargs, layer_type in tuples:
        added = getattr(viewer, f"add_{layer_type}")(data, **kwargs)
        out.extend(added if isinstance(added, list) else [added])
    return out


def layer_role(layer) -> dict:
    """apextrack's metadata of a layer (``role``, ``result``), or an empty dict."""
    return (getattr(layer, "metadata", None) or {}).get(L.META_KEY) or {}


def find_layer(viewer, role: str, folder=None):
    """The layer of ``role`` (of the results ``folder`` when given), or None."""
    for layer in viewer.layers:
        meta = layer_role(layer)
        if meta.get("role") == role and (folder is None or meta.get("result") == str(folder)):
            return layer
    return None


def find_correction(viewer) -> Correction | None:
    """The correction session of the (last opened) results shown in the viewer."""
    for layer in reversed(list(viewer.layers)):
        corr = session_for(layer_role(layer).get("result"))
        if corr is not None:
            return corr
    return None


def _update_layer(layer, data, kwargs: dict, layer_type: str) -> None:
    """Give an existing overlay layer new data and styling (no remove/insert: that is slow)."""
    if layer_type == "points":
        layer.selected_data = set()  # row indices change with the data: never keep a stale selection
        layer.data = data
        layer.features = kwargs["features"]
        for key in ("size", "symbol", "face_color"):
            if key in kwargs and len(data):
                setattr(layer, key, kwargs[key])
        if "text" in kwargs:
            layer.text = kwargs["text"]
    elif layer_type == "tracks":
        layer.data = data
        layer.features = kwargs["features"]
        layer.tail_length = kwargs.get("tail_length", layer.tail_length)
    elif layer_type == "shapes":
        layer.data = [(d, kwargs["shape_type"]) for d in data]
        layer.features = kwargs["features"]
        if len(data):
            for key in ("edge_color", "face_color"):
                if key in kwargs:
                    setattr(layer, key, kwargs[key])
        if "text" in kwargs:
            layer.text = kwargs["text"]
    else:  # pragma: no cover - only overlay types above are built
        layer.data = data


def refresh_overlays(viewer, correction: Correction) -> None:
    """Redraw every overlay layer of ``correction`` from its tables (same layers, same order and
    visibility), e.g. after an edit. Missing overlay layers are added."""
    from napari.layers import Layer

    for data, kwargs, layer_type in L.overlay_layers(correction):
        role = kwargs["metadata"][L.META_KEY]["role"]
        old = find_layer(viewer, role, correction.source)
        if old is None or old._type_string != layer_type:
            viewer.layers.append(Layer.create(data, kwargs, layer_type))
            continue
        _update_layer(old, data, kwargs, layer_type)


def open_result(viewer, folder, with_stack: bool = True, dock: bool = True) -> Correction:
    """Show a results folder (stack, top view, overlays) and dock the review widget."""
    correction = register(Correction.from_folder(folder))
    if with_stack is None:
        with_stack = find_layer(viewer, "stack") is None
    add_layer_tuples(viewer, result_layers(correction, with_stack=with_stack))
    if dock and getattr(viewer, "window", None) is not None:
        from ._widgets import ReviewWidget

        widget = ReviewWidget(viewer, correction)
        viewer.window.add_dock_widget(widget, name="apextrack review", area="right")
    return correction


def open_stack(viewer, path, dock: bool = True):
    """Show a stack and dock the run widget with it as input."""
    layers = add_layer_tuples(viewer, read_stack_file(path))
    if dock and getattr(viewer, "window", None) is not None:
        from ._widgets import RunWidget

        widget = RunWidget(viewer, source=path)
        viewer.window.add_dock_widget(widget, name="apextrack run", area="right")
    return layers


def kind_of(path) -> str:
    """``"result"`` or ``"stack"``; :class:`~apextrack.errors.InputError` for anything else."""
    p = Path(path)
    if not p.exists():
        raise InputError("no such file or folder", p, "give a results folder or a stack file")
    if is_result_folder(p):
        return "result"
    if is_stack_path(p):
        return "stack"
    raise InputError("is neither a results folder nor a stack apextrack can read", p,
                     "give a folder written by 'apextrack analyse' or a TIFF/zarr stack")


def open_path(viewer, path=None):
    """Open a results folder or a stack; with no path, dock the run widget on the demo stack."""
    if path is None:
        from ._widgets import RunWidget

        viewer.window.add_dock_widget(RunWidget(viewer), name="apextrack run", area="right")
        return None
    if kind_of(path) == "result":
        return open_result(viewer, path)
    return open_stack(viewer, path)


def launch(path=None, block: bool = True):
    """Open napari with a results folder or stack (the ``apextrack view`` command)."""
    if path is not None and kind_of(path) == "result":  # a bad path fails before any window opens
        from ..results import load_results

        load_results(path)  # a missing table or hand-edited columns too
    import napari

    viewer = napari.Viewer(title="apextrack")
    open_path(viewer, path)
    if block:
        napari.run()
    return viewer
