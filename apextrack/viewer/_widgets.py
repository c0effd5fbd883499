"""The run widget (parameters → pipeline in a worker thread) and the review widget (edit tracks
and birth order, see the measurements update, save the corrections).

Both only gather input, call library functions (:func:`apextrack.pipeline.analyse`,
:class:`apextrack.edits.Correction`) and show layers.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from qtpy.QtCore import QObject, Qt, Signal
from qtpy.QtWidgets import (QCheckBox, QComboBox, QDoubleSpinBox, QFileDialog, QFormLayout, QGroupBox,
                            QHBoxLayout, QLabel, QLineEdit, QListWidget, QProgressBar, QPushButton,
                            QScrollArea, QSpinBox, QVBoxLayout, QWidget)

from ..edits import Correction, EditError
from ..errors import ApextrackError
from ..settings import Settings, describe, from_dict
from . import layers as L
from .app import find_correction, find_layer, layer_role, open_result, refresh_overlays


# ----------------------------------------------------------------------------------------------
# run widget
# ----------------------------------------------------------------------------------------------
class _ProgressBridge(QObject):
    """Carries progress from the worker thread to the GUI thread (queued signal)."""

    progressed = Signal(int, int, str)


def _setting_editor(name: str, default, meta: dict, type_text: str):
    """A Qt editor for one setting and a getter returning its value (None = not set)."""
    choices = meta.get("choices")
    low, high = meta.get("low"), meta.get("high")
    if choices:
        w = QComboBox()
        for c in choices:
            w.addItem("(auto)" if c is None else str(c), c)
        w.setCurrentIndex(list(choices).index(default))
        return w, lambda: w.currentData()
    if isinstance(default, bool):
        w = QCheckBox()
        w.setChecked(default)
        return w, w.isChecked
    if isinstance(default, int) and default is not None:
        w = QSpinBox()
        w.setRange(int(low) if low is not None else -10**9, int(high) if high is not None else 10**9)
        w.setValue(default)
        return w, w.value
    if isinstance(default, float):
        w = QDoubleSpinBox()
        w.setDecimals(6)
        w.setRange(float(low) if low is not None else -1e12, float(high) if high is not None else 1e12)
        w.setSingleStep(max(abs(default) / 10.0, 0.01) if default else 0.1)
        w.setValue(default)
        shown = w.value()  # the default rounded to the shown decimals: keep the exact default

        return w, lambda: default if w.value() == shown else w.value()
    # optional values (None default): free text, empty means "not set"
    w = QLineEdit()
    w.setPlaceholderText("auto / from the file")
    if default is not None:
        w.setText(str(default))

    def get():
        text = w.text().strip()
        return None if text == "" else text

    return w, get


class RunWidget(QWidget):
    """Analyse a stack: parameters with their units and defaults, a run button and a progress
    bar. The pipeline runs in a worker thread; the result is shown when it finishes."""

    def __init__(self, napari_viewer, source=None, out=None):
        super().__init__()
        self.viewer = napari_viewer
        self.worker = None
        self.result = None
        self.error = None
        self._bridge = _ProgressBridge()
        self._bridge.progressed.connect(self._on_progress)
        lay = QVBoxLayout(self)

        io = QFormLayout()
        self.source_edit = QLineEdit(str(source) if source is not None else self._default_source())
        browse = QPushButton("…")
        browse.clicked.connect(self._browse_source)
        row = QHBoxLayout()
        row.addWidget(self.source_edit)
        row.addWidget(browse)
        io.addRow("stack", row)
        self.out_edit = QLineEdit(str(out) if out is not None else "")
        self.out_edit.setPlaceholderText("results folder (default: <stack name>_results here)")
        io.addRow("results folder", self.out_edit)
        self.overwrite_box = QCheckBox("replace an existing results folder")
        io.addRow("", self.overwrite_box)
        lay.addLayout(io)

        self.editors: dict[str, tuple] = {}
        form = QFormLayout()
        types = {f.name: str(f.type) for f in dataclasses.fields(Settings)}
        for item in describe():
            w, get = _setting_editor(item["name"], item["default"], item, types[item["name"]])
            unit = f" [{item['unit']}]" if item["unit"] else ""
            label = QLabel(f"{item['name']}{unit}")
            label.setToolTip(item["meaning"])
            w.setToolTip(f"{item['meaning']} (default: {item['default']!r})")
            form.addRow(label, w)
            self.editors[item["name"]] = (w, get)
        box = QWidget()
        box.setLayout(form)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setWidget(box)
        lay.addWidget(scroll, 1)

        self.run_button = QPushButton("Run analysis")
        self.run_button.clicked.connect(self.run)
        lay.addWidget(self.run_button)
        self.progress = QProgressBar()
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        lay.addWidget(self.progress)
        self.status = QLabel("")
        self.status.setWordWrap(True)
        lay.addWidget(self.status)

    # -- input ------------------------------------------------------------------------------------
    def _default_source(self) -> str:
        for layer in self.viewer.layers:
            path = layer_role(layer).get("path")
            if path:
                return str(path)
        try:
            from ..model import demo_stack_path

            return str(demo_stack_path("spiral"))
        except Exception:  # no demo bundled: leave empty
            return ""

    def _browse_source(self):
        path, _ = QFileDialog.getOpenFileName(self, "Stack", self.source_edit.text(),
                                              "Stacks (*.tif *.tiff *.btf *.zarr);;All files (*)")
        if path:
            self.source_edit.setText(path)

    def settings(self) -> Settings:
        """The settings as entered (raises SettingsError naming a bad value)."""
        values = {name: get() for name, (_w, get) in self.editors.items()}
        return from_dict(values, source="run widget")

    def out_folder(self) -> Path:
        text = self.out_edit.text().strip()
        if text:
            return Path(text)
        return Path.cwd() / f"{Path(self.source_edit.text()).stem}_results"

    # -- running ----------------------------------------------------------------------------------
    def run(self):
        """Start the analysis in a worker thread; returns the worker (None when the input is bad)."""
        from napari.qt.threading import thread_worker

        from ..pipeline import analyse

        self.result, self.error = None, None
        try:
            settings = self.settings()
        except ApextrackError as exc:
            self._fail(exc)
            return None
        source = self.source_edit.text().strip() or None
        out, overwrite = self.out_folder(), self.overwrite_box.isChecked()
        emit = self._bridge.progressed.emit

        def progress(done, total, stage):
            emit(int(done), int(total), str(stage))

        @thread_worker
        def work():
            return analyse(source, out=out, settings=settings, overwrite=overwrite, progress=progress)

        self.run_button.setEnabled(False)
        self.progress.setRange(0, 0)  # busy until the first frame is reported
        self.status.setText(f"analysing {source or 'the demo stack'} …")
        self.worker = work()
        self.worker.returned.connect(self._done)
        self.worker.errored.connect(self._fail)
        self.worker.finished.connect(lambda: self.run_button.setEnabled(True))
        self.worker.start()
        return self.worker

    def _on_progress(self, done: int, total: int, stage: str):
        if done >= total:
            self.progress.setRange(0, 0)
            self.status.setText("linking, ordering births and measuring …")
        else:
            self.progress.setRange(0, total)
            self.progress.setValue(done)
            self.progress.setFormat(f"{stage} %v/%m")

    def _done(self, result):
        self.result = result
        self.progress.setRange(0, 1)
        self.progress.setValue(1)
        s = result.summary
        self.status.setText(f"{s.get('n_primordia')} primordia in {s.get('n_frames')} frames; "
                            f"results in {result.out_dir}")
        if result.out_dir is not None:
            open_result(self.viewer, result.out_dir, with_stack=None, dock=True)

    def _fail(self, exc):
        self.error = exc
        self.progress.setRange(0, 1)
        self.progress.setValue(0)
        text = exc.one_line() if isinstance(exc, ApextrackError) else f"{type(exc).__name__}: {exc}"
        self.status.setText(f"<span style='color:#ff6060'>error: {text}</span>")


# ----------------------------------------------------------------------------------------------
# review widget
# ----------------------------------------------------------------------------------------------
class ReviewWidget(QWidget):
    """Review and correct an analysis: edit, see the measurements update, undo, save.

    Select detections (or primordia) in their point layers, then press an action. "At cursor"
    actions use the last mouse position on the canvas (shortcuts: Alt-A add, Alt-C centre).
    """

    def __init__(self, napari_viewer, correction: Correction | None = None):
        super().__init__()
        self.viewer = napari_viewer
        self.correction = correction or find_correction(napari_viewer)
        self.last_error: Exception | None = None
        lay = QVBoxLayout(self)

        self.summary_label = QLabel("open an apextrack results folder")
        self.summary_label.setWordWrap(True)
        self.summary_label.setTextFormat(Qt.RichText)
        box = QGroupBox("measurements")
        QVBoxLayout(box).addWidget(self.summary_label)
        lay.addWidget(box)

        edit = QGroupBox("edit")
        el = QVBoxLayout(edit)

        def button(text, slot, tip):
            b = QPushButton(text)
            b.setToolTip(tip)
            b.clicked.connect(lambda *_: slot())
            return b

        r1 = QHBoxLayout()
        r1.addWidget(button("Delete selected", self.delete_selected, "delete the selected detection(s)"))
        r1.addWidget(button("Add at cursor", self.add_at_cursor, "add a detection at the cursor, this frame (Alt-A)"))
        el.addLayout(r1)
        r2 = QHBoxLayout()
        r2.addWidget(button("Merge tracks", self.merge_selected, "merge the tracks of two selected detections"))
        r2.addWidget(button("Split at frame", self.split_selected,
                            "split the selected detection's track at the current frame"))
        el.addLayout(r2)
        r3 = QHBoxLayout()
        self.rank_spin = QSpinBox()
        self.rank_spin.setRange(1, 10**6)
        self.rank_spin.setToolTip("birth rank to give the selected primordium")
        r3.addWidget(QLabel("rank"))
        r3.addWidget(self.rank_spin)
        r3.addWidget(button("Set rank", self.set_rank, "give the selected primordium this birth rank"))
        el.addLayout(r3)
        r4 = QHBoxLayout()
        r4.addWidget(button("Mark co-initiated", lambda: self.mark_co_initiated(True),
                            "mark the two selected primordia co-initiated"))
        r4.addWidget(button("Unmark", lambda: self.mark_co_initiated(False),
                            "the two selected primordia are not co-initiated"))
        el.addLayout(r4)
        r5 = QHBoxLayout()
        self.all_frames_box = QCheckBox("shift all frames")
        r5.addWidget(button("Move centre to cursor", self.move_centre_to_cursor,
                            "move the apex centre of this frame to the cursor (Alt-C)"))
        r5.addWidget(self.all_frames_box)
        el.addLayout(r5)
        self.undo_button = button("Undo last edit", self.undo, "undo the last edit")
        el.addWidget(self.undo_button)
        lay.addWidget(edit)

        self.parastichy_box = QCheckBox("show parastichy spirals")
        self.parastichy_box.toggled.connect(self.show_parastichies)
        lay.addWidget(self.parastichy_box)

        save_row = QHBoxLayout()
        self.overwrite_box = QCheckBox("overwrite")
        self.overwrite_box.setToolTip("replace tables already in the target folder")
        save_row.addWidget(button("Save corrections", self.save, "write the corrected tables (default: corrected/)"))
        save_row.addWidget(self.overwrite_box)
        lay.addLayout(save_row)

        self.status = QLabel("")
        self.status.setWordWrap(True)
        lay.addWidget(self.status)
        lay.addWidget(QLabel("edit log"))
        self.log_list = QListWidget()
        self.log_list.setMaximumHeight(120)
        lay.addWidget(self.log_list)

        legend = QGroupBox("legend")
        ll = QVBoxLayout(legend)
        self.legend_label = QLabel(L.legend_html())
        self.legend_label.setTextFormat(Qt.RichText)
        self.legend_label.setWordWrap(True)
        ll.addWidget(self.legend_label)
        lay.addWidget(legend)
        lay.addStretch(1)

        self.viewer.bind_key("Alt-A", lambda v: self.add_at_cursor(), overwrite=True)
        self.viewer.bind_key("Alt-C", lambda v: self.move_centre_to_cursor(), overwrite=True)
        self.viewer.layers.events.inserted.connect(self._on_layer_inserted)
        self._update_panels()

    # -- state ------------------------------------------------------------------------------------
    def _on_layer_inserted(self, event=None):
        if self.correction is None:
            self.correction = find_correction(self.viewer)
            self._update_panels()

    def _need(self) -> Correction:
        if self.correction is None:
            raise EditError("no apextrack results are open", hint="open a results folder first")
        return self.correction

    def layer(self, role: str):
        c = self.correction
        return find_layer(self.viewer, role, None if c is None else c.source)

    def current_frame(self) -> int:
        """The frame shown (from the time slider, in hours)."""
        c = self._need()
        t_axis = self.viewer.dims.ndim - 3
        return int(round(float(self.viewer.dims.point[t_axis]) / c.interval_h))

    def cursor_um(self) -> tuple[float, float]:
        """``(x_um, y_um)`` of the cursor on the canvas (world coordinates are µm)."""
        pos = self.viewer.cursor.position
        return float(pos[-1]), float(pos[-2])

    def selected(self) -> list[dict]:
        """Features rows of the selected points in the detections and primordia layers."""
        rows = []
        for role in ("primordia", "detections"):
            layer = self.layer(role)
            if layer is None:
                continue
            for i in sorted(layer.selected_data):
                rows.append(layer.features.iloc[int(i)].to_dict())
        return rows

    def selected_tracks(self) -> list[int]:
        out: list[int] = []
        for r in self.selected():
            t = int(r["track_id"])
            if t not in out:
                out.append(t)
        return out

    # -- actions ----------------------------------------------------------------------------------
    def _do(self, fn, *args):
        try:
            entry = fn(*args)
        except ApextrackError as exc:
            self.last_error = exc
            self.status.setText(f"<span style='color:#ff6060'>{exc.one_line()}</span>")
            return None
        self.last_error = None
        if entry.get("action") not in (None, "save"):
            refresh_overlays(self.viewer, self.correction)
        self._update_panels()
        self.status.setText(self._describe(entry))
        return entry

    @staticmethod
    def _describe(entry: dict) -> str:
        args = ", ".join(f"{k}={v}" for k, v in entry.items() if k not in ("action", "when"))
        return f"{entry.get('action')} ({args})"

    def delete_selected(self):
        def go():
            ids = [int(r["detection_id"]) for r in self.selected()]
            return self._need().delete_detections(ids)
        return self._do(go)

    def add_at_cursor(self, x_um: float | None = None, y_um: float | None = None, frame: int | None = None):
        def go():
            c = self._need()
            x, y = self.cursor_um() if x_um is None else (x_um, y_um)
            return c.add_detection(self.current_frame() if frame is None else frame, x, y)
        return self._do(go)

    def merge_selected(self):
        def go():
            t = self.selected_tracks()
            if len(t) != 2:
                raise EditError(f"select detections of exactly two tracks (selected: {len(t)})",
                                hint="shift-click one detection of each track")
            return self._need().merge_tracks(t[0], t[1])
        return self._do(go)

    def split_selected(self, frame: int | None = None):
        def go():
            t = self.selected_tracks()
            if len(t) != 1:
                raise EditError(f"select a detection of one track (selected: {len(t)} tracks)",
                                hint="select one detection of the track to split")
            return self._need().split_track(t[0], self.current_frame() if frame is None else frame)
        return self._do(go)

    def set_rank(self, rank: int | None = None):
        def go():
            t = self.selected_tracks()
            if len(t) != 1:
                raise EditError(f"select one primordium (selected: {len(t)})", hint="select one primordium")
            return self._need().set_birth_rank(t[0], self.rank_spin.value() if rank is None else rank)
        return self._do(go)

    def mark_co_initiated(self, value: bool = True):
        def go():
            t = self.selected_tracks()
            if len(t) != 2:
                raise EditError(f"select two primordia (selected: {len(t)})", hint="shift-click two primordia")
            return self._need().set_co_initiated(t[0], t[1], value)
        return self._do(go)

    def move_centre_to_cursor(self, x_um: float | None = None, y_um: float | None = None,
                              all_frames: bool | None = None):
        def go():
            c = self._need()
            x, y = self.cursor_um() if x_um is None else (x_um, y_um)
            every = self.all_frames_box.isChecked() if all_frames is None else all_frames
            return c.move_centre(self.current_frame(), x, y, every)
        return self._do(go)

    def undo(self):
        return self._do(lambda: self._need().undo())

    def save(self, folder=None, overwrite: bool | None = None):
        """Write the corrected tables (default ``<results>/corrected``); returns the folder."""
        ow = self.overwrite_box.isChecked() if overwrite is None else overwrite
        out = {}

        def go():
            out["folder"] = self._need().save(folder, overwrite=ow)
            return {"action": "save", "folder": str(out["folder"])}
        self._do(go)
        return out.get("folder")

    def show_parastichies(self, on: bool = True):
        layer = self.layer("parastichies")
        if layer is not None:
            layer.visible = bool(on)
        if self.parastichy_box.isChecked() != bool(on):
            self.parastichy_box.setChecked(bool(on))

    # -- panels -----------------------------------------------------------------------------------
    def _update_panels(self):
        c = self.correction
        if c is None:
            return
        self.summary_label.setText(L.summary_html(c.summary, c.notes))
        self.rank_spin.setMaximum(max(1, len(c.primordia)))
        self.undo_button.setEnabled(c.can_undo)
        self.log_list.clear()
        for e in c.log:
            mark = " (undone)" if e.get("undone") else ""
            self.log_list.addItem(f"{e.get('when', '')}  {self._describe(e)}{mark}")
        self.log_list.scrollToBottom()
