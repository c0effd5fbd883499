"""The napari plugin, in a real viewer (run under ``xvfb-run -a``: Qt's offscreen platform has no GL).

    xvfb-run -a python -m pytest tests/test_viewer.py -q -x
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("napari")
pytest.importorskip("pytestqt")

from apextrack.edits import Correction  # noqa: E402
from apextrack.pipeline import analyse, make_summary, measure_tracks  # noqa: E402
from apextrack.results import load_results  # noqa: E402
from apextrack.tables import sha256_file, to_json_text  # noqa: E402

pytestmark = pytest.mark.viewer


@pytest.fixture(scope="module")
def demo_stack():
    from apextrack.model import demo_stack_path

    return demo_stack_path("spiral")


@pytest.fixture(scope="module")
def demo_result_master(tmp_path_factory, demo_stack):
    """The spiral demo stack (invented demo data) analysed once for this module."""
    out = tmp_path_factory.mktemp("viewer") / "result"
    analyse(demo_stack, out=out, progress=False, report=False)
    return out


@pytest.fixture
def demo_result(demo_result_master, tmp_path):
    """A private copy of the demo result for one test."""
    out = tmp_path / "result"
    shutil.copytree(demo_result_master, out)
    return out


def _layer(viewer, role):
    from apextrack.viewer.app import find_layer

    return find_layer(viewer, role)


def _review_widget(viewer):
    from apextrack.viewer._widgets import ReviewWidget

    for dock in viewer.window.dock_widgets.values():
        if isinstance(dock, ReviewWidget):
            return dock
    raise AssertionError("no review widget docked")


# -- manifest, reader, sample data -------------------------------------------------------------------
def test_manifest_validates_and_declares_every_contribution():
    res = subprocess.run([sys.executable, "-m", "npe2", "validate", "apextrack"], capture_output=True, text=True)
    assert res.returncode == 0, res.stdout + res.stderr
    from npe2 import PluginManifest

    mf = PluginManifest.from_distribution("apextrack")
    c = mf.contributions
    assert [r.command for r in c.readers] == ["apextrack.get_reader"]
    assert [w.command for w in c.writers] == ["apextrack.write_corrections"]
    assert sorted(s.key for s in c.sample_data) == ["distichous", "spiral"]
    assert sorted(w.command for w in c.widgets) == ["apextrack.review_widget", "apextrack.run_widget"]


def test_reader_on_stacks_gives_physical_scale(tmp_path, demo_stack):
    import tifffile

    from apextrack.viewer._reader import napari_get_reader

    # a 3D + time ImageJ hyperstack: expected scale from the file's own ImageJ metadata
    with tifffile.TiffFile(demo_stack) as tif:
        ij = tif.imagej_metadata
        px = 1.0 / (tif.pages[0].resolution[0])
        dz, dt_h = float(ij["spacing"]), float(ij["finterval"]) / 3600.0
        shape = tif.series[0].shape  # T, Z, Y, X
    layers = napari_get_reader(str(demo_stack))(str(demo_stack))
    img, kw, kind = layers[0]
    assert kind == "image" and img.shape == (shape[1], shape[0], shape[2], shape[3])  # Z, T, Y, X
    assert kw["scale"] == pytest.approx([dz, dt_h, px, px], rel=1e-12)
    assert kw["units"] == ["um", "h", "um", "um"]
    top, tkw, _ = layers[1]
    assert top.shape == (shape[0], shape[2], shape[3]) and tkw["scale"] == pytest.approx([dt_h, px, px])

    # a 2D + time ImageJ stack written here: 0.5 µm pixels, 2 h between frames
    a = np.random.default_rng(1).integers(0, 500, size=(3, 20, 24), dtype=np.uint16)
    p = tmp_path / "flat.tif"
    tifffile.imwrite(p, a, imagej=True, resolution=(2.0, 2.0),
                     metadata={"axes": "TYX", "unit": "um", "finterval": 7200.0})
    layers = napari_get_reader(str(p))(str(p))
    img, kw, _ = layers[0]
    assert img.shape == (3, 20, 24) and kw["scale"] == pytest.approx([2.0, 0.5, 0.5])
    np.testing.assert_array_equal(np.asarray(img), a)
    assert napari_get_reader(str(tmp_path / "nothing.txt")) is None


def test_reader_on_a_result_folder(make_napari_viewer, demo_result):
    from apextrack.viewer._reader import napari_get_reader

    viewer = make_napari_viewer()
    reader = napari_get_reader(str(demo_result))
    assert reader is not None
    for data, kw, kind in reader(str(demo_result)):
        getattr(viewer, f"add_{kind}")(data, **kw)
    t = load_results(demo_result)
    px = t["summary"]["pixel_size_um"]
    dt = t["summary"]["interval_h"]
    names = [layer.name for layer in viewer.layers]
    assert names == ["coralbell_spiral.tif", "top view", "tracks", "divergence angles", "parastichies",
                     "detections", "apex centre", "primordia"]
    assert tuple(viewer.layers["coralbell_spiral.tif"].scale) == pytest.approx((5.0, dt, px, px))
    for name in names[1:]:
        assert tuple(viewer.layers[name].scale) == pytest.approx((dt, px, px))
    # detections: one point per tracks row, at (time_h, y_um, x_um) in world coordinates
    det = viewer.layers["detections"]
    tr = t["tracks"]
    assert len(det.data) == len(tr)
    world = np.array([det.data_to_world(p) for p in det.data])
    feats = det.features.set_index("detection_id").loc[tr["detection_id"]]
    np.testing.assert_allclose(world[:, 0], det.features["time_h"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(world[:, 1:], det.features[["y_um", "x_um"]].to_numpy(), rtol=0, atol=1e-9)
    assert feats["track_id"].tolist() == tr["track_id"].tolist()
    # tracks rebuilt from the points: same ids, the layer keeps our detection ids
    trk = viewer.layers["tracks"]
    assert sorted(set(trk.features["track_id"])) == sorted(set(tr["track_id"]))
    assert sorted(trk.features["detection_id"]) == sorted(tr["detection_id"])
    # primordia labelled with their birth ranks; every primordium present
    prim = viewer.layers["primordia"]
    assert set(prim.features["birth_rank"]) == set(t["primordia"]["birth_rank"])
    assert prim.text.string.format == "{birth_rank}"
    # the apex centre of every frame
    assert len(viewer.layers["apex centre"].data) == len(t["centres"])
    assert not viewer.layers["parastichies"].visible  # a toggle, off at start


def test_sample_data_loads(make_napari_viewer):
    from apextrack.model import demo_stack_path
    from apextrack.stack import read_stack

    for key in ("spiral", "distichous"):
        viewer = make_napari_viewer()
        viewer.open_sample("apextrack", key)
        stack = read_stack(demo_stack_path(key))
        px, _, dz = stack.pixel_size_um
        images = [layer for layer in viewer.layers if layer._type_string == "image"]
        assert len(images) == stack.n_channels + 1  # one layer per channel + the top view
        if stack.n_channels > 1:
            assert [im.name for im in images[:-1]] == [f"{stack.name} [{c}]" for c in stack.channel_names]
        for im in images[:-1]:
            assert tuple(im.scale) == pytest.approx((dz, stack.interval_h, px, px))
            assert im.data.shape[1] == stack.n_frames
        assert tuple(images[-1].scale) == pytest.approx((stack.interval_h, px, px))
        stack.close()


# -- editing in the review widget ----------------------------------------------------------------------
def _fresh(folder):
    """Re-measure a saved folder with the library stages that analyse runs after linking."""
    t = load_results(folder)
    run = t["run"]
    c = Correction.from_loaded(t)
    hand = bool(run["corrections"]["rank_edits"])
    measured = measure_tracks(t["tracks"].drop(columns=["r_um", "theta_deg"]), t["centres"], c.settings,
                              primordia=t["primordia"] if hand else None)
    return json.loads(to_json_text(make_summary(measured, t["detections"], c.settings, c.context))), measured


def test_scripted_edits_in_the_viewer_and_round_trip(make_napari_viewer, demo_result, tmp_path):
    from apextrack.viewer._reader import read_result
    from apextrack.viewer._writer import write_corrections
    from apextrack.viewer.app import open_result

    originals = {p.name: sha256_file(p) for p in demo_result.glob("*.csv")}
    viewer = make_napari_viewer()
    c = open_result(viewer, demo_result)
    w = _review_widget(viewer)
    assert w.correction is c
    det = _layer(viewer, "detections")
    n0 = len(c.detections)

    # delete: select the first detection
    victim = int(det.features["detection_id"].iloc[0])
    det.selected_data = {0}
    assert w.delete_selected()["detection_ids"] == [victim]
    assert len(_layer(viewer, "detections").data) == n0 - 1
    assert victim not in set(c.detections["detection_id"])

    # add at the cursor, in the frame on screen
    viewer.dims.set_point(viewer.dims.ndim - 3, 4 * c.interval_h)
    viewer.cursor.position = (0.0, 4 * c.interval_h, 70.0, 30.0)
    e = w.add_at_cursor()
    assert (e["frame"], e["x_um"], e["y_um"]) == (4, 30.0, 70.0)
    assert len(_layer(viewer, "detections").data) == n0

    # split the longest track at the frame on screen, then merge the halves again
    longest = int(c.tracks.groupby("track_id").size().idxmax())
    frames = sorted(c.tracks.loc[c.tracks["track_id"] == longest, "frame"])
    f_split = frames[len(frames) // 2]
    viewer.dims.set_point(viewer.dims.ndim - 3, f_split * c.interval_h)
    det = _layer(viewer, "detections")
    det.selected_data = {int(np.flatnonzero(det.features["track_id"] == longest)[0])}
    e = w.split_selected()
    assert e["frame"] == f_split
    new_id = e["new_track_id"]
    assert sorted(c.tracks.loc[c.tracks["track_id"] == new_id, "frame"]) == frames[len(frames) // 2:]
    trk = _layer(viewer, "tracks")
    assert new_id in set(trk.features["track_id"])  # tracks layer rebuilt from the points
    det = _layer(viewer, "detections")
    ids = det.features["track_id"].to_numpy()
    det.selected_data = {int(np.flatnonzero(ids == longest)[0]), int(np.flatnonzero(ids == new_id)[0])}
    assert w.merge_selected()["kept"] == longest
    assert sorted(c.tracks.loc[c.tracks["track_id"] == longest, "frame"]) == frames

    # re-rank: select the primordium ranked 5 and give it rank 2
    prim = _layer(viewer, "primordia")
    i5 = int(np.flatnonzero(prim.features["birth_rank"] == 5)[0])
    tid = int(prim.features["track_id"].iloc[i5])
    prim.selected_data = {i5}
    w.set_rank(2)
    assert int(c.primordia.loc[c.primordia["track_id"] == tid, "birth_rank"].iloc[0]) == 2
    prim = _layer(viewer, "primordia")
    assert set(prim.features.loc[prim.features["track_id"] == tid, "birth_rank"]) == {2}

    # mark two primordia co-initiated: shown with the co-initiated marker
    from apextrack.viewer.layers import STYLE

    ta, tb = (int(v) for v in c.primordia["track_id"].iloc[-2:])
    ia = int(np.flatnonzero(prim.features["track_id"] == ta)[0])
    ib = int(np.flatnonzero(prim.features["track_id"] == tb)[0])
    prim.selected_data = {ia, ib}
    w.mark_co_initiated(True)
    prim = _layer(viewer, "primordia")
    rows = prim.features["track_id"].isin([ta, tb]).to_numpy()
    assert (prim.features.loc[rows, "flag"] == "co_initiated").all()
    assert {str(s.value) for s in np.asarray(prim.symbol)[rows]} == {STYLE["co_initiated"]["symbol"]}

    # a bad request is reported, not raised, and changes nothing
    n_log = len(c.log)
    prim.selected_data = set()
    assert w.merge_selected() is None and "exactly two tracks" in w.last_error.what
    assert len(c.log) == n_log

    # undo the last edit
    w.undo()
    assert [e["action"] for e in c.rank_edits] == ["set_birth_rank"]
    # move the centre of this frame to the cursor
    viewer.cursor.position = (0.0, f_split * c.interval_h, 50.0, 51.0)
    w.move_centre_to_cursor(all_frames=False)
    row = c.centres[c.centres["frame"] == f_split].iloc[0]
    assert (row["x_um"], row["y_um"], row["method"]) == (51.0, 50.0, "user")
    assert "divergence" in w.summary_label.text()
    actions = [e["action"] for e in c.log]
    assert actions == ["delete_detections", "add_detection", "split_track", "merge_tracks", "set_birth_rank",
                       "set_co_initiated", "undo", "move_centre"]

    # save through the npe2 writer, next to the original tables
    layer_data = [layer.as_layer_data_tuple() for layer in viewer.layers]
    out = write_corrections(str(demo_result / "corrected"), layer_data)
    assert out == [str(demo_result / "corrected")]
    saved = demo_result / "corrected"
    # the summary equals a fresh measurement of the saved tables
    fresh, _ = _fresh(saved)
    assert fresh == json.loads(to_json_text(c.summary))
    # round trip: reload gives identical tables and identical layers
    again = Correction.from_folder(saved)
    for name, df in c.tables.items():
        pd.testing.assert_frame_equal(again.tables[name], df, check_exact=True)
    run = json.loads((saved / "run.json").read_text())
    assert [e["action"] for e in run["corrections"]["edits"]] == actions
    layers = {kw["name"]: (d, kw) for d, kw, _ in read_result(str(saved))}
    for role in ("detections", "primordia", "apex centre"):
        np.testing.assert_array_equal(layers[role][0], viewer.layers[role].data)
        pd.testing.assert_frame_equal(layers[role][1]["features"].reset_index(drop=True),
                                      viewer.layers[role].features.reset_index(drop=True), check_exact=True,
                                      check_dtype=False, check_categorical=False)
    # the originals are untouched
    assert {p.name: sha256_file(p) for p in demo_result.glob("*.csv")} == originals


# -- screenshot ------------------------------------------------------------------------------------------
def test_screenshot_shows_overlay_colours_at_the_primordia(make_napari_viewer, demo_result, tmp_path):
    from apextrack.viewer.app import open_result
    from apextrack.viewer.layers import STYLE

    viewer = make_napari_viewer(show=True)
    viewer.window.resize(1000, 800)
    c = open_result(viewer, demo_result, dock=False)
    last = int(c.centres["frame"].max())
    viewer.dims.set_point(viewer.dims.ndim - 3, last * c.interval_h)
    viewer.reset_view()
    img = viewer.screenshot(canvas_only=True, flash=False)
    from skimage.io import imsave

    imsave(tmp_path / "review.png", img, check_contrast=False)
    assert (tmp_path / "review.png").stat().st_size > 0
    rgb = img[..., :3].astype(float)
    assert rgb.std() > 5.0  # not blank

    prim = viewer.layers["primordia"]
    here = prim.features["frame"].to_numpy() == last
    assert here.sum() >= 3
    h, w = rgb.shape[:2]
    cy, cx = viewer.camera.center[-2:]
    zoom = viewer.camera.zoom
    hits = 0
    for i in np.flatnonzero(here):
        y, x = prim.data_to_world(prim.data[i])[-2:]
        r, col = int(round(h / 2 + (y - cy) * zoom)), int(round(w / 2 + (x - cx) * zoom))
        want = np.array([int(STYLE[prim.features["flag"].iloc[i]]["color"][j:j + 2], 16) for j in (1, 3, 5)])
        win = rgb[max(r - 2, 0):r + 3, max(col - 2, 0):col + 3]
        if (np.abs(win - want).max(axis=-1) < 40).any():
            hits += 1
    assert hits == here.sum()
    # the colours are overlay colours only: none of them in a screenshot without the overlays
    for layer in viewer.layers:
        if layer.name != "top view" and layer._type_string != "image":
            layer.visible = False
    bare = viewer.screenshot(canvas_only=True, flash=False)[..., :3].astype(float)
    want = np.array([int(STYLE["primordium"]["color"][j:j + 2], 16) for j in (1, 3, 5)])
    assert not (np.abs(bare - want).max(axis=-1) < 40).any()


# -- run widget ----------------------------------------------------------------------------------------
def test_run_widget_runs_the_pipeline_without_blocking(make_napari_viewer, qtbot, demo_stack, tmp_path):
    from qtpy.QtCore import QTimer

    from apextrack.settings import Settings, describe
    from apextrack.viewer._widgets import ReviewWidget, RunWidget

    viewer = make_napari_viewer()
    w = RunWidget(viewer, source=demo_stack, out=tmp_path / "run")
    # every setting has an editor with its default and unit
    assert set(w.editors) == {d["name"] for d in describe()}
    s = w.settings()
    assert s == Settings()
    w.editors["report"][0].setChecked(False)

    ticks = []
    timer = QTimer()
    timer.timeout.connect(lambda: ticks.append(1))
    timer.start(10)
    progress = []
    w._bridge.progressed.connect(lambda d, t, st: progress.append((d, t)))
    worker = w.run()
    assert worker is not None and w.result is None  # run() returned while the pipeline works
    assert not w.run_button.isEnabled()
    qtbot.waitUntil(lambda: w.result is not None or w.error is not None, timeout=180_000)
    timer.stop()
    assert w.error is None, w.error
    assert len(ticks) >= 3  # the event loop kept running during the analysis
    n_frames = w.result.summary["n_frames"]
    assert progress[-1] == (n_frames, n_frames) and len(progress) == n_frames + 1
    assert (tmp_path / "run" / "tracks.csv").exists()
    # the finished result is shown with its overlays and the review widget
    assert _layer(viewer, "primordia") is not None
    assert any(isinstance(d, ReviewWidget) for d in viewer.window.dock_widgets.values())
    qtbot.waitUntil(lambda: w.run_button.isEnabled(), timeout=10_000)


def test_cli_view_opens_a_result(monkeypatch, demo_result, qtbot):
    import napari

    from apextrack.cli import main

    opened = {}
    monkeypatch.setattr(napari, "run", lambda *a, **k: opened.setdefault("ran", True))
    import apextrack.viewer.app as app

    real = app.open_path

    def spy(viewer, path=None):
        opened["viewer"] = viewer
        return real(viewer, path)

    monkeypatch.setattr(app, "open_path", spy)
    assert main(["view", str(demo_result)]) == 0
    v = opened["viewer"]
    try:
        assert opened["ran"] and v.layers["primordia"] is not None
    finally:
        v.close()
    assert main(["view", str(demo_result / "missing")]) == 2
