"""Tests of apextrack.scoring: CTC DET/TRA, particle-tracking α/β/Jaccard, MOTA/IDF1 and
birth-order accuracy, against hand-worked examples and independent implementations."""

from __future__ import annotations

import json
import logging
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from apextrack.errors import ResultsError
from apextrack.scoring import (birth_order_accuracy, build_track_graph, clear_mot_measures,
                               ctc_measures, identity_measures, kendall_tau_b, match_tracks,
                               particle_tracking_measures, score_results, write_scores)
from apextrack.tables import read_table, write_table


# ----------------------------------------------------------------------------- fixtures


def _hand_example():
    """One true track over frames 0–4; found over frames 0–3, 1.2 px off; plus a 3-frame
    spurious track far from everything."""
    truth = pd.DataFrame({"track": [1] * 5, "frame": range(5),
                          "x": np.arange(5) * 10.0, "y": np.zeros(5)})
    found = pd.DataFrame({"track": [7] * 4, "frame": range(4),
                          "x": np.arange(4) * 10.0, "y": np.full(4, 1.2)})
    spurious = pd.DataFrame({"track": [8] * 3, "frame": range(3),
                             "x": np.full(3, 100.0), "y": np.full(3, 50.0)})
    return truth, pd.concat([found, spurious], ignore_index=True)


def _growing_scene(seed=1, n_tracks=6, n_frames=8):
    """Primordia drifting outward from an apex centre, r = 10·exp(0.1 t) µm (invented scene)."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(n_tracks):
        th = rng.uniform(0, 2 * np.pi)
        for f in range(k, k + n_frames):
            r = 10 * np.exp(0.1 * (f - k))
            rows.append((k, f, r * np.cos(th) + 50, r * np.sin(th) + 50))
    truth = pd.DataFrame(rows, columns=["track", "frame", "x", "y"])
    pred = truth.copy()
    pred[["x", "y"]] += rng.normal(0, 0.8, (len(pred), 2))
    pred = pred.drop(index=rng.choice(len(pred), 5, replace=False))      # missed detections
    sel0 = (pred.track == 0) & (pred.frame >= 4)                           # identity swap
    sel1 = (pred.track == 1) & (pred.frame >= 4)
    pred.loc[sel0, "track"] = 1
    pred.loc[sel1, "track"] = 0
    extra = pd.DataFrame({"track": [50] * 3, "frame": [2, 3, 5],          # spurious, with a gap
                          "x": [0.0, 1.0, 2.0], "y": [0.0, 0.0, 0.0]})
    return truth, pd.concat([pred, extra], ignore_index=True)


# ----------------------------------------------------------------------------- Chenouard


def test_particle_measures_hand_example():
    # Chenouard et al. 2014, Nat. Methods 11:281, Supplementary Note (measures α, β, JSC).
    # By hand, ε = 5:
    #   d(X, ∅)  = ε × 5 true points                        = 25
    #   d(X, Y*) = 4 × 1.2 (frames 0–3) + ε (frame 4 missing) = 4.8 + 5 = 9.8
    #   α = 1 − 9.8/25 = 0.608
    #   d(Ȳ, ∅)  = ε × 3 points of the spurious track        = 15
    #   β = (25 − 9.8) / (25 + 15) = 15.2 / 40 = 0.38
    #   detections: TP 4, FN 1, FP 3 → JSC = 4 / 8 = 0.5
    #   tracks: TP 1 (true track paired), FN 0, FP 1 (spurious) → JSCθ = 1 / 2 = 0.5
    #   RMSE over the 4 matched points = 1.2
    # All five stated values follow from the definitions.
    truth, pred = _hand_example()
    r = particle_tracking_measures(truth, pred, eps=5.0)
    assert r["alpha"] == pytest.approx(0.608, abs=1e-12)
    assert r["beta"] == pytest.approx(0.38, abs=1e-12)
    assert r["jaccard_detections"] == pytest.approx(0.5, abs=1e-12)
    assert r["jaccard_tracks"] == pytest.approx(0.5, abs=1e-12)
    assert r["rmse"] == pytest.approx(1.2, abs=1e-12)
    assert r["pairing"] == {1: 7}
    assert (r["points_TP"], r["points_FN"], r["points_FP"]) == (4, 1, 3)


def test_particle_measures_perfect_and_empty():
    # Definitions (Chenouard et al. 2014): a perfect result gives α = β = 1; no result α = 0.
    truth, _ = _hand_example()
    r = particle_tracking_measures(truth, truth.assign(track=3), eps=5.0)
    assert (r["alpha"], r["beta"], r["jaccard_tracks"], r["rmse"]) == (1.0, 1.0, 1.0, 0.0)
    r0 = particle_tracking_measures(truth, truth.iloc[:0], eps=5.0)
    assert r0["alpha"] == 0.0 and r0["beta"] == 0.0 and r0["pairing"] == {1: None}


def test_particle_measures_far_track_is_not_paired():
    # A computed track everywhere beyond ε over the same frames costs ε per frame paired,
    # exactly as much as the dummy (25 = 25): pairing it gains nothing, so it is spurious
    # (our tie rule: a pair needs at least one point within ε; definitions of Chenouard et
    # al. 2014). Extra frames would make the pairing strictly worse than the dummy.
    truth, _ = _hand_example()
    far = truth.assign(track=9, y=20.0)
    r = particle_tracking_measures(truth, far, eps=5.0)
    assert r["pairing"] == {1: None}
    assert r["alpha"] == 0.0
    assert r["beta"] == 0.0
    assert r["jaccard_detections"] == 0.0


# ----------------------------------------------------------------------------- CTC


def test_ctc_hand_example():
    # Matula et al. 2015, PLoS ONE 10:e0144959 (AOGM with the TRA/DET weights).
    # Same scene as above, gate 5: matched nodes 4 (frames 0–3); FN node: frame 4 (×10);
    # FP nodes: the 3 spurious detections (×1; their 2 edges go with them, no cost);
    # EA: the reference edge 3→4 is missing (×1.5); ED 0; NS 0; EC 0.
    #   AOGM  = 10 + 3 + 1.5 = 14.5;  AOGM0 = 10 × 5 nodes + 1.5 × 4 edges = 56
    #   TRA   = 1 − 14.5/56 = 0.7410714…;  DET = 1 − (10 + 3)/50 = 0.74
    truth, pred = _hand_example()
    r = ctc_measures(truth, pred, gate=5.0)
    assert (r["n_FN"], r["n_FP"], r["n_EA"], r["n_ED"], r["n_NS"], r["n_EC"]) == (1, 3, 1, 0, 0, 0)
    assert r["AOGM"] == pytest.approx(14.5)
    assert r["AOGM0"] == pytest.approx(56.0)
    assert r["TRA"] == pytest.approx(1 - 14.5 / 56, abs=1e-12)
    assert r["DET"] == pytest.approx(0.74, abs=1e-12)


def test_ctc_gap_edge_and_gate():
    # A computed track that skips frame 1 links frame 0 to frame 2: that edge is not in the
    # reference (ED, ×1) and both reference edges 0→1, 1→2 must be added (EA, ×1.5 each), the
    # node of frame 1 is missing (FN, ×10). Matula et al. 2015 definitions.
    t = pd.DataFrame({"track": [1, 1, 1], "frame": [0, 1, 2], "x": [0.0, 0, 0], "y": [0.0, 0, 0]})
    p = t.drop(index=1)
    r = ctc_measures(t, p, gate=1.0)
    assert (r["n_FN"], r["n_ED"], r["n_EA"]) == (1, 1, 2)
    assert r["AOGM"] == pytest.approx(10 + 1 + 3)
    # the gate is inclusive: a detection exactly at the gate matches, just beyond does not
    assert ctc_measures(t, t.assign(x=1.0), gate=1.0)["TRA"] == 1.0
    assert ctc_measures(t, t.assign(x=1.0 + 1e-9), gate=1.0)["DET"] == 0.0


def _to_traccuracy(df):
    import networkx as nx
    from traccuracy import TrackingGraph

    g = build_track_graph(df)
    G = nx.DiGraph()
    for i in range(g.n_nodes):
        G.add_node(i + 1, t=int(g.frame[i]), x=float(g.pos[i, 0]), y=float(g.pos[i, 1]))
    for a, b in g.edges:
        G.add_edge(int(a) + 1, int(b) + 1)
    return TrackingGraph(G, frame_key="t", location_keys=("x", "y"), label_key=None)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_ctc_agrees_with_traccuracy(seed):
    # Independent implementation from the registry: traccuracy (CTCMetrics with PointMatcher:
    # one-to-one Hungarian point matching within a threshold). Agreement within 1e-6.
    pytest.importorskip("traccuracy")
    from traccuracy.matchers import PointMatcher
    from traccuracy.metrics import CTCMetrics

    logging.getLogger("traccuracy").setLevel(logging.WARNING)
    truth, pred = _growing_scene(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        matched = PointMatcher(threshold=3.0).compute_mapping(_to_traccuracy(truth),
                                                              _to_traccuracy(pred))
        ref = CTCMetrics().compute(matched).results
    ours = ctc_measures(truth, pred, gate=3.0)
    assert ours["TRA"] == pytest.approx(ref["TRA"], abs=1e-6)
    assert ours["DET"] == pytest.approx(ref["DET"], abs=1e-6)
    assert ours["AOGM"] == pytest.approx(ref["AOGM"], abs=1e-6)
    assert (ours["n_FP"], ours["n_FN"], ours["n_ED"], ours["n_EA"], ours["n_EC"]) == \
        (ref["fp_nodes"], ref["fn_nodes"], ref["fp_edges"], ref["fn_edges"], ref["ws_edges"])
    assert ours["TRA"] < 1.0  # the scene does hold errors


# ----------------------------------------------------------------------------- MOT


@pytest.mark.parametrize("seed", [1, 4])
def test_mota_idf1_agree_with_motmetrics(seed):
    # Independent implementation from the registry: motmetrics (CLEAR MOT, Bernardin &
    # Stiefelhagen 2008; IDF1, Ristani et al. 2016), fed Euclidean distances gated at 3.
    mm = pytest.importorskip("motmetrics")
    truth, pred = _growing_scene(seed)
    acc = mm.MOTAccumulator(auto_id=False)
    for f in sorted(set(truth.frame) | set(pred.frame)):
        a, b = truth[truth.frame == f], pred[pred.frame == f]
        d = np.linalg.norm(a[["x", "y"]].to_numpy()[:, None] - b[["x", "y"]].to_numpy()[None],
                           axis=-1) if len(a) and len(b) else np.zeros((len(a), len(b)))
        acc.update(a.track.to_numpy(), b.track.to_numpy(), np.where(d <= 3.0, d, np.nan),
                   frameid=int(f))
    ref = mm.metrics.create().compute(acc, metrics=["mota", "motp", "idf1", "num_switches"],
                                      name="x").iloc[0]
    mot = clear_mot_measures(truth, pred, gate=3.0)
    idm = identity_measures(truth, pred, gate=3.0)
    assert mot["MOTA"] == pytest.approx(ref["mota"], abs=1e-6)
    assert mot["MOTP"] == pytest.approx(ref["motp"], abs=1e-6)
    assert mot["mot_switches"] == ref["num_switches"]
    assert idm["IDF1"] == pytest.approx(ref["idf1"], abs=1e-6)
    assert mot["mot_switches"] >= 1  # the identity swap is seen


# ----------------------------------------------------------------------------- birth order


def test_kendall_tau_matches_scipy():
    # Reference library: scipy.stats.kendalltau (τ-b, ties corrected).
    rng = np.random.default_rng(0)
    for _ in range(20):
        x = rng.integers(0, 6, 12)
        y = x + rng.integers(-2, 3, 12)
        assert kendall_tau_b(x, y) == pytest.approx(stats.kendalltau(x, y).statistic, abs=1e-12)


def test_birth_order_accuracy_swap():
    # Two neighbouring primordia swapped in a record of 6: 4 of 6 ranks exact; τ from scipy.
    true_rank = {f"p{i}": i for i in range(1, 7)}
    pred_rank = {10 + i: i for i in range(1, 7)}
    pred_rank[13], pred_rank[14] = 4, 3
    pairs = {f"p{i}": 10 + i for i in range(1, 7)}
    r = birth_order_accuracy(true_rank, pred_rank, pairs)
    assert r["rank_exact_fraction"] == pytest.approx(4 / 6)
    assert r["kendall_tau"] == pytest.approx(
        stats.kendalltau([1, 2, 3, 4, 5, 6], [1, 2, 4, 3, 5, 6]).statistic)
    # a missed primordium counts as wrong but does not shift the ranks of the others
    del pairs["p1"]
    pred_rank = {10 + i: i - 1 for i in range(2, 7)}
    r = birth_order_accuracy(true_rank, pred_rank, pairs)
    assert r["rank_exact_fraction"] == pytest.approx(5 / 6)
    assert r["rank_exact_fraction_raw"] == 0.0
    assert r["kendall_tau"] == pytest.approx(1.0)


def test_match_tracks_follows_the_majority_of_detections():
    truth, pred = _growing_scene(1)
    pairs = match_tracks(truth, pred, gate=3.0)
    assert all(pairs[k] == k for k in range(2, 6))
    assert 50 not in pairs.values()


# ----------------------------------------------------------------------------- folders


def _write_results(folder, truth, drop_col=None):
    """Results folder in the analyse schema, built from a truth table (perfect tracking)."""
    n = len(truth)
    tracks = pd.DataFrame({
        "frame": truth["frame"].to_numpy(), "time_h": truth["frame"].to_numpy() * 4.0,
        "x_um": truth["x_um"].to_numpy(), "y_um": truth["y_um"].to_numpy(),
        "radius_um": np.full(n, 3.0), "intensity": np.ones(n), "snr": np.full(n, 10.0),
        "track_id": truth["primordium"].to_numpy() + 100, "r_um": np.ones(n),
        "theta_deg": np.zeros(n)})
    first = truth.sort_values("frame").drop_duplicates("primordium")
    prim = pd.DataFrame({
        "birth_rank": first["birth_rank"].to_numpy(), "track_id": first["primordium"].to_numpy() + 100,
        "emergence_time_h": first["frame"].to_numpy() * 4.0,
        "emergence_frame": first["frame"].to_numpy(), "x_um": first["x_um"].to_numpy(),
        "y_um": first["y_um"].to_numpy(), "r_um": np.ones(len(first)),
        "theta_deg": np.zeros(len(first)), "co_initiated": np.zeros(len(first), bool)})
    if drop_col:
        tracks = tracks.drop(columns=drop_col)
    folder.mkdir(parents=True, exist_ok=True)
    write_table(tracks, folder / "tracks.csv", "tracks")
    write_table(prim, folder / "primordia.csv", "primordia")


def _truth_table():
    t, _ = _growing_scene(2)
    return pd.DataFrame({"primordium": t["track"] + 1, "birth_rank": t["track"] + 1,
                         "frame": t["frame"], "x_um": t["x"], "y_um": t["y"],
                         "time_h": t["frame"] * 4.0})


def test_score_results_perfect_and_written(tmp_path):
    truth = _truth_table()
    write_table(truth, tmp_path / "truth.csv")
    _write_results(tmp_path / "res", truth)
    s = score_results(tmp_path / "res", tmp_path / "truth.csv", gate_um=3.0)
    for k in ("TRA", "DET", "alpha", "beta", "jaccard_tracks", "jaccard_detections", "MOTA",
              "IDF1", "rank_exact_fraction", "kendall_tau"):
        assert s[k] == pytest.approx(1.0), k
    files = write_scores(s, tmp_path / "out")
    assert [f.name for f in files] == ["scores.json", "scores.csv"]
    back = json.loads(files[0].read_text())
    assert back["TRA"] == 1.0 and back["gate_um"] == 3.0
    csv = read_table(files[1])
    assert float(csv.set_index("measure").loc["alpha", "value"]) == 1.0


def test_score_results_swapped_birth_ranks(tmp_path):
    truth = _truth_table()
    write_table(truth, tmp_path / "truth.csv")
    _write_results(tmp_path / "res", truth)
    prim = read_table(tmp_path / "res" / "primordia.csv", "primordia")
    swap = {2: 3, 3: 2}
    prim["birth_rank"] = prim["birth_rank"].map(lambda r: swap.get(r, r))
    write_table(prim, tmp_path / "res" / "primordia.csv", "primordia")
    s = score_results(tmp_path / "res", tmp_path / "truth.csv", gate_um=3.0)
    assert s["rank_exact_fraction"] == pytest.approx(4 / 6)
    assert s["TRA"] == 1.0


def test_score_results_bad_inputs(tmp_path):
    truth = _truth_table()
    write_table(truth.drop(columns="x_um"), tmp_path / "truth_bad.csv")
    write_table(truth, tmp_path / "truth.csv")
    _write_results(tmp_path / "res", truth)
    with pytest.raises(ResultsError, match="truth_bad.csv.*x_um"):
        score_results(tmp_path / "res", tmp_path / "truth_bad.csv")
    _write_results(tmp_path / "res2", truth, drop_col="y_um")
    with pytest.raises(ResultsError, match="tracks.csv.*y_um"):
        score_results(tmp_path / "res2", tmp_path / "truth.csv")
    (tmp_path / "res" / "primordia.csv").unlink()
    with pytest.raises(ResultsError, match="primordia.csv"):
        score_results(tmp_path / "res", tmp_path / "truth.csv")
    with pytest.raises(ResultsError, match="nowhere"):
        score_results(tmp_path / "nowhere", tmp_path / "truth.csv")


def test_duplicate_detection_in_track_is_an_error():
    t = pd.DataFrame({"track": [1, 1], "frame": [0, 0], "x": [0.0, 1.0], "y": [0.0, 0.0]})
    with pytest.raises(ResultsError, match="two detections in one frame"):
        build_track_graph(t)
