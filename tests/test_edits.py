"""Hand corrections (apextrack.edits): table operations, re-measurement, log, undo, save/reload.

No napari here; the viewer tests drive the same operations through the review widget.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from apextrack.edits import (Correction, EditError, add_detection, delete_detections, merge_tracks,
                             move_centre, set_birth_rank, set_co_initiated, split_track)
from apextrack.errors import OutputError
from apextrack.pipeline import analyse, make_summary, measure_tracks
from apextrack.results import load_results
from apextrack.stack import read_stack
from apextrack.tables import sha256_file


@pytest.fixture(scope="module")
def demo_result(tmp_path_factory):
    """The spiral demo stack analysed once for this module (invented demo data)."""
    from apextrack.model import demo_stack_path

    out = tmp_path_factory.mktemp("edits") / "result"
    analyse(demo_stack_path("spiral"), out=out, progress=False, report=False)
    return out


def _tiny_tracks():
    det = pd.DataFrame({"detection_id": np.arange(6, dtype=np.int64),
                        "frame": np.array([0, 1, 2, 0, 1, 3], dtype=np.int64),
                        "time_h": [0.0, 2.0, 4.0, 0.0, 2.0, 6.0],
                        "x_um": [1.0, 1.5, 2.0, 9.0, 9.5, 10.0], "y_um": [1.0, 1.0, 1.0, 5.0, 5.0, 5.0],
                        "radius_um": [3.0, 3.0, 3.0, 4.0, 4.0, 4.0],
                        "intensity": [1.0] * 6, "snr": [9.0] * 6})
    tr = det.assign(track_id=np.array([0, 0, 0, 1, 1, 1], dtype=np.int64))
    return tr, det


# -- pure table operations -------------------------------------------------------------------------
def test_delete_detections_removes_rows_from_both_tables():
    tr, det = _tiny_tracks()
    tr2, det2 = delete_detections(tr, det, [1, 4])
    assert tr2["detection_id"].tolist() == [0, 2, 3, 5]
    assert det2["detection_id"].tolist() == [0, 2, 3, 5]
    with pytest.raises(EditError, match="no detection with id 99"):
        delete_detections(tr, det, [99])


def test_add_detection_gets_new_ids_and_unmeasured_values():
    tr, det = _tiny_tracks()
    tr2, det2, did, tid = add_detection(tr, det, frame=2, x_um=7.0, y_um=3.0, time_h=4.0)
    assert (did, tid) == (6, 2)
    new = tr2[tr2["detection_id"] == 6].iloc[0]
    assert (new["frame"], new["x_um"], new["y_um"], new["track_id"]) == (2, 7.0, 3.0, 2)
    assert new["radius_um"] == 3.5  # median radius of the detections
    assert np.isnan(new["intensity"]) and np.isnan(new["snr"])  # never measured
    assert tr2["detection_id"].dtype == np.int64 and tr2["track_id"].dtype == np.int64
    # onto an existing track, but not into a frame it already has
    tr3, _, _, tid3 = add_detection(tr, det, frame=2, x_um=9.7, y_um=5.0, time_h=4.0, track_id=1)
    assert tid3 == 1 and sorted(tr3.loc[tr3["track_id"] == 1, "frame"]) == [0, 1, 2, 3]
    with pytest.raises(EditError, match="already has a detection in frame 1"):
        add_detection(tr, det, frame=1, x_um=0.0, y_um=0.0, time_h=2.0, track_id=0)


def test_merge_and_split_tracks():
    tr, _ = _tiny_tracks()
    with pytest.raises(EditError, match="both have a detection in frame"):
        merge_tracks(tr, 0, 1)
    split, new = split_track(tr, 0, 2)
    assert new == 2
    assert split.loc[split["track_id"] == 2, "detection_id"].tolist() == [2]
    assert split.loc[split["track_id"] == 0, "detection_id"].tolist() == [0, 1]
    merged, kept = merge_tracks(split, 2, 0)
    assert kept == 0
    assert merged.loc[merged["track_id"] == 0, "detection_id"].tolist() == [0, 1, 2]
    with pytest.raises(EditError, match="cannot be split at frame 0"):
        split_track(tr, 0, 0)


def test_set_birth_rank_and_co_initiation():
    prim = pd.DataFrame({"birth_rank": np.arange(1, 6, dtype=np.int64), "track_id": [10, 11, 12, 13, 14],
                         "co_initiated": [False] * 5})
    out = set_birth_rank(prim, 14, 2)
    assert out["track_id"].tolist() == [10, 14, 11, 12, 13]
    assert out["birth_rank"].tolist() == [1, 2, 3, 4, 5]
    out = set_co_initiated(prim, 10, 13)  # not successive: 13 moves right after 10
    assert out["track_id"].tolist() == [10, 13, 11, 12, 14]
    assert out.set_index("track_id").loc[[10, 13], "co_initiated"].all()
    assert not out.set_index("track_id").loc[[11, 12, 14], "co_initiated"].any()
    with pytest.raises(EditError, match="out of range"):
        set_birth_rank(prim, 10, 6)


def test_move_centre_one_frame_or_all_frames():
    c = pd.DataFrame({"frame": [0, 1, 2], "time_h": [0.0, 1.0, 2.0], "x_um": [10.0, 11.0, 12.0],
                      "y_um": [20.0, 20.0, 21.0], "method": ["dome"] * 3})
    one = move_centre(c, 1, 15.0, 25.0)
    assert one["x_um"].tolist() == [10.0, 15.0, 12.0] and one["method"].tolist() == ["dome", "user", "dome"]
    every = move_centre(c, 1, 15.0, 25.0, all_frames=True)
    assert every["x_um"].tolist() == [14.0, 15.0, 16.0] and every["y_um"].tolist() == [25.0, 25.0, 26.0]


# -- a correction session on an analysed stack -------------------------------------------------------
def _independent_summary(folder) -> dict:
    """Re-measure a saved (corrected) folder with the library's own post-linking stages, the scale
    taken from the stack file itself, as :func:`apextrack.pipeline.analyse` does."""
    t = load_results(folder)
    run = t["run"]
    settings = Correction.from_loaded(t).settings
    stack = read_stack(run["input"])
    context = {"stack": stack.name, "n_frames": stack.n_frames, "pixel_size_um": stack.pixel_size_um[0],
               "z_step_um": stack.pixel_size_um[2] if stack.has_z else None, "interval_h": stack.interval_h}
    stack.close()
    hand = bool(run["corrections"]["rank_edits"])
    tracks = t["tracks"].drop(columns=["r_um", "theta_deg"])
    measured = measure_tracks(tracks, t["centres"], settings, primordia=t["primordia"] if hand else None)
    summary = make_summary(measured, t["detections"], settings, context)
    return json.loads(json.dumps(summary, default=float)), measured


def _norm(d):
    from apextrack.tables import to_json_text

    return json.loads(to_json_text(d))


def test_scripted_edits_match_a_fresh_measurement(demo_result, tmp_path):
    c = Correction.from_folder(demo_result)
    n_det = len(c.detections)
    # delete a false detection
    victim = int(c.tracks["detection_id"].iloc[0])
    c.delete_detections([victim])
    assert victim not in set(c.detections["detection_id"]) and len(c.detections) == n_det - 1
    assert c.summary["n_detections"] == n_det - 1
    # add a missed one in frame 4 (a new track)
    e = c.add_detection(4, 30.0, 70.0)
    new = c.tracks[c.tracks["detection_id"] == e["detection_id"]].iloc[0]
    assert (new["frame"], new["x_um"], new["y_um"]) == (4, 30.0, 70.0)
    # split the longest track in the middle, then merge it back
    longest = int(c.tracks.groupby("track_id").size().idxmax())
    frames = sorted(c.tracks.loc[c.tracks["track_id"] == longest, "frame"])
    e = c.split_track(longest, frames[len(frames) // 2])
    assert set(c.tracks.loc[c.tracks["track_id"] == e["new_track_id"], "frame"]) == set(frames[len(frames) // 2:])
    c.merge_tracks(longest, e["new_track_id"])
    assert sorted(c.tracks.loc[c.tracks["track_id"] == longest, "frame"]) == frames
    # re-rank: the primordium ranked 5 becomes rank 2
    tid = int(c.primordia.loc[c.primordia["birth_rank"] == 5, "track_id"].iloc[0])
    c.set_birth_rank(tid, 2)
    assert int(c.primordia.loc[c.primordia["track_id"] == tid, "birth_rank"].iloc[0]) == 2
    assert c.primordia["birth_rank"].tolist() == list(range(1, len(c.primordia) + 1))
    assert c.summary["birth_order"]["method"] == "birth ranks set by hand"
    # the divergence table follows the new order
    d = c.divergence
    assert d["from_rank"].tolist() == list(range(1, len(c.primordia)))
    # every edit is logged with what and when
    assert [x["action"] for x in c.log] == ["delete_detections", "add_detection", "split_track",
                                            "merge_tracks", "set_birth_rank"]
    assert all("when" in x and x["when"].endswith("+00:00") for x in c.log)

    out = c.save(tmp_path / "corrected")
    fresh, measured = _independent_summary(out)
    assert _norm(fresh) == _norm(c.summary)
    saved = load_results(out)
    pd.testing.assert_frame_equal(saved["divergence"][["from_rank", "to_rank", "angle_deg"]],
                                  measured.phyllotaxis.divergence[["from_rank", "to_rank", "angle_deg"]]
                                  .reset_index(drop=True), check_exact=True)


def test_swapping_two_successive_primordia_gives_the_permutation_pattern(demo_result):
    # Refahi et al. 2016 (eLife 5:e14093) and Guédon et al. 2013 (J. Theor. Biol.): exchanging
    # the order of two successive organs turns the angle sequence a1, a2, a3 (into k, from k to
    # k+1, out of k+1) into a1 + a2, 360 − a2, a2 + a3; for the golden angle 275°, 222.5°, 275°.
    c = Correction.from_folder(demo_result)
    old = c.divergence.set_index(["from_rank", "to_rank"])
    assert c.summary["chirality"] == "ccw"
    k = len(c.primordia) // 2
    prim = c.primordia.set_index("birth_rank")
    t_k, t_k1 = int(prim.loc[k, "track_id"]), int(prim.loc[k + 1, "track_id"])
    c.set_birth_rank(t_k1, k)
    p2 = c.primordia.set_index("birth_rank")
    assert (int(p2.loc[k, "track_id"]), int(p2.loc[k + 1, "track_id"])) == (t_k1, t_k)
    assert c.summary["chirality"] == "ccw"
    new = c.divergence.set_index(["from_rank", "to_rank"])
    a1, a2, a3 = (float(old.loc[(k - 1 + i, k + i), "angle_deg"]) for i in range(3))
    b1, b2, b3 = (float(new.loc[(k - 1 + i, k + i), "angle_deg"]) for i in range(3))
    # the swapped pair is measured in the same frame as before: exactly the reversed step
    if int(new.loc[(k, k + 1), "frame"]) == int(old.loc[(k, k + 1), "frame"]):
        assert b2 == pytest.approx(360.0 - a2, abs=1e-9)
    else:
        assert b2 == pytest.approx(360.0 - a2, abs=2.0)
    # the neighbours may be measured in another frame (the apex drifts a little): within 2°
    assert b1 == pytest.approx((a1 + a2) % 360.0, abs=2.0)
    assert b3 == pytest.approx((a2 + a3) % 360.0, abs=2.0)
    # the demo grows at the golden angle: the published pattern, within the demo's scatter
    assert [b1, b2, b3] == pytest.approx([275.0, 222.5, 275.0], abs=10.0)
    # every other angle is untouched
    for key in old.index:
        if key not in {(k - 1, k), (k, k + 1), (k + 1, k + 2)}:
            assert new.loc[key, "angle_deg"] == old.loc[key, "angle_deg"]


def test_undo_restores_tables_and_summary(demo_result):
    c = Correction.from_folder(demo_result)
    before = {k: v.copy() for k, v in c.tables.items()}
    summary = json.loads(json.dumps(c.summary))
    c.move_centre(3, 50.0, 52.0, all_frames=True)
    assert c.centres["method"].eq("user").all()
    assert not c.tables["tracks"]["r_um"].equals(before["tracks"]["r_um"])
    c.undo()
    for name, df in before.items():
        pd.testing.assert_frame_equal(c.tables[name], df, check_exact=True)
    assert c.summary == summary
    assert [e["action"] for e in c.log] == ["move_centre", "undo"] and c.log[0]["undone"]
    with pytest.raises(EditError, match="nothing to undo"):
        c.undo()


def test_save_reload_round_trip_is_exact_and_never_touches_the_original(demo_result, tmp_path):
    originals = {p.name: sha256_file(p) for p in demo_result.glob("*.csv")}
    c = Correction.from_folder(demo_result)
    tids = c.primordia["track_id"].tolist()
    c.set_co_initiated(tids[-1], tids[-2])
    c.delete_detections([int(c.tracks["detection_id"].iloc[-1])])
    c.split_track(int(c.tracks.groupby("track_id").size().idxmax()), 6)
    with pytest.raises(OutputError, match="original results folder"):
        c.save(demo_result)
    out = c.save()  # default: <result>/corrected
    assert out == demo_result / "corrected"
    again = Correction.from_folder(out)
    assert set(again.tables) == set(c.tables)
    for name, df in c.tables.items():
        pd.testing.assert_frame_equal(again.tables[name], df, check_exact=True)
    assert again.summary == c.summary
    assert again.log == c.log and again.rank_edits == c.rank_edits
    assert again.run["corrections"]["source"] == str(demo_result)
    # the reloaded session saves to the same files, byte for byte
    b = {p.name: p.read_bytes() for p in out.glob("*.csv")}
    again.save(overwrite=True)
    assert {p.name: p.read_bytes() for p in out.glob("*.csv")} == b
    # an existing corrected folder is not replaced by another session without asking
    with pytest.raises(OutputError, match="already holds tables"):
        Correction.from_folder(demo_result).save()
    assert {p.name: sha256_file(p) for p in demo_result.glob("*.csv")} == originals
