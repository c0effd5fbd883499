"""apextrack's napari plugin: reader (stacks and results folders), writer (corrected tables),
sample data (the demo stacks), a run widget and a review widget.

The manifest is ``napari.yaml`` in this package (entry point group ``napari.manifest``).
Everything napari shows is computed by the library; this package only builds layers, gathers
input and calls library functions.
"""

from __future__ import annotations

__all__ = ["napari_get_reader", "write_corrections", "RunWidget", "ReviewWidget", "open_path", "launch"]


def __getattr__(name):  # import napari/Qt only when a viewer part is used
    if name == "napari_get_reader":
        from ._reader import napari_get_reader
        return napari_get_reader
    if name == "write_corrections":
        from ._writer import write_corrections
        return write_corrections
    if name in ("RunWidget", "ReviewWidget"):
        from . import _widgets
        return getattr(_widgets, name)
    if name in ("open_path", "launch"):
        from . import app
        return getattr(app, name)
    raise AttributeError(name)
