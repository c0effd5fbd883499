"""Accuracy of detection, tracking and birth order against a known ground truth.

The measures here are implemented from their published definitions:

* **AOGM, DET and TRA** of the Cell Tracking Challenge (Matula et al. 2015, PLoS ONE 10:
  e0144959). Detections and tracks are acyclic oriented graphs: a node is one detection
  (frame, object), an edge links two successive detections of one track (also across a gap
  of missed frames). Computed and reference detections are matched one-to-one within a
  distance gate, frame by frame (Hungarian assignment). AOGM is the weighted number of
  operations that turn the computed graph into the reference graph: splitting a node matched
  to several references (NS, weight 5), adding a missed node (FN, 10), deleting a spurious
  node (FP, 1), deleting a wrong edge (ED, 1), adding a missing edge (EA, 1.5) and changing
  an edge's semantics (EC, 1). AOGM0 is the cost of building the reference graph from
  nothing (every node and every edge added); TRA = 1 − min(AOGM, AOGM0)/AOGM0. DET is the
  same with the node operations only (AOGM-D0 = 10 × reference nodes). Edges touching a
  spurious node go away with that node at no cost, as in the published measure.
* **α, β, track and detection Jaccard, RMSE** of the particle-tracking comparison
  (Chenouard et al. 2014, Nat. Methods 11:281, Supplementary Note "Performance measures").
  The distance between two tracks is the sum over every frame where either exists of the
  gated distance min(‖p − q‖, ε), a frame where one of them is absent counting ε. Reference
  tracks are paired one-to-one with computed tracks or with dummy tracks (cost ε per
  reference point) by an optimal assignment. α = 1 − d(X, Y*)/d(X, ∅) and
  β = (d(X, ∅) − d(X, Y*)) / (d(X, ∅) + d(Ȳ, ∅)) where Ȳ are the computed tracks left
  unpaired (spurious). A computed track with no point within ε of a reference track is never
  paired with it (that pairing would cost at least as much as the dummy). Matched points are points of paired tracks in the same frame closer
  than ε (strictly: a point at exactly ε costs as much as a missing one).
* **MOTA** (CLEAR MOT; Bernardin & Stiefelhagen 2008, EURASIP J. Image Video Proc.) and
  **IDF1** (Ristani et al. 2016, ECCV workshops), with the same gate.
* **Birth-order accuracy**: predicted primordia are matched to true ones through their
  tracks; the share of true primordia whose rank is exactly right and Kendall's τ-b between
  the true and predicted ranks.

All distances are in the units of the coordinates given (µm for results folders).

Examples
--------
>>> import pandas as pd
>>> truth = pd.DataFrame({"track": [1, 1, 1], "frame": [0, 1, 2],
...                       "x": [0.0, 1.0, 2.0], "y": [0.0, 0.0, 0.0]})
>>> pred = truth.copy()
>>> ctc_measures(truth, pred, gate=1.0)["TRA"]
1.0
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment

from .errors import AnalysisError, ResultsError
from .tables import read_json, read_table, to_csv_text, atomic_write_text, write_json

__all__ = ["CTC_WEIGHTS", "DEFAULT_GATE_UM", "TrackGraph", "build_track_graph",
           "match_detections", "ctc_measures", "particle_tracking_measures",
           "clear_mot_measures", "identity_measures", "match_tracks", "kendall_tau_b",
           "birth_order_accuracy", "read_truth", "score_tracks", "score_results",
           "write_scores"]

#: Cell Tracking Challenge AOGM weights (Matula et al. 2015, TRA and DET settings).
CTC_WEIGHTS = {"NS": 5.0, "FN": 10.0, "FP": 1.0, "ED": 1.0, "EA": 1.5, "EC": 1.0}

#: Default matching gate in µm: about the radius of a young primordium (common practice for
#: point matching — half the typical spacing of neighbouring objects; no published source).
DEFAULT_GATE_UM = 5.0

_TRUTH_COLUMNS = ("primordium", "birth_rank", "frame", "x_um", "y_um")


# ----------------------------------------------------------------------------- graphs


@dataclass
class TrackGraph:
    """An acyclic oriented graph of point detections.

    Attributes
    ----------
    frame : ndarray of int, shape (n,)
        Frame of each node.
    pos : ndarray of float, shape (n, d)
        Position of each node.
    track : ndarray, shape (n,)
        Track label of each node.
    edges : ndarray of int, shape (m, 2)
        (source node, target node) of each edge, source earlier than target.
    edge_parent : ndarray of bool, shape (m,)
        Edge semantics: False for a link within one track, True for a parent–daughter link
        (the two ends carry different track labels).
    """

    frame: np.ndarray
    pos: np.ndarray
    track: np.ndarray
    edges: np.ndarray
    edge_parent: np.ndarray

    @property
    def n_nodes(self) -> int:
        return int(self.frame.size)

    @property
    def n_edges(self) -> int:
        return int(self.edges.shape[0])


def build_track_graph(df: pd.DataFrame, track: str = "track", frame: str = "frame",
                      coords=("x", "y"), source: str | Path | None = None) -> TrackGraph:
    """Build the graph of a tracks table: one node per row, an edge between successive rows
    of a track (ordered by frame, gaps allowed).

    Parameters
    ----------
    df : DataFrame
        One row per detection.
    track, frame : str
        Column names of the track label and the frame index.
    coords : sequence of str
        Coordinate columns.
    source : str or Path, optional
        File the table came from (named in errors).

    Raises
    ------
    ResultsError
        When a column is missing, a value is not finite, or a track has two detections in one
        frame.
    """
    missing = [c for c in (track, frame, *coords) if c not in df.columns]
    if missing:
        raise ResultsError(f"table lacks column(s) {', '.join(missing)}", source,
                           "give a table with track, frame and position columns")
    d = df.reset_index(drop=True)
    pos = d[list(coords)].to_numpy(dtype=float)
    fr = d[frame].to_numpy()
    if not np.all(np.isfinite(pos)):
        raise ResultsError("positions hold missing or non-finite values", source,
                           "every detection needs a position")
    fr = fr.astype(np.int64)
    lab = d[track].to_numpy()
    order = np.lexsort((fr, pd.factorize(lab, sort=True)[0]))
    lab_s, fr_s = lab[order], fr[order]
    same = lab_s[1:] == lab_s[:-1]
    if np.any(same & (fr_s[1:] == fr_s[:-1])):
        bad = lab_s[1:][same & (fr_s[1:] == fr_s[:-1])][0]
        raise ResultsError(f"track {bad} has two detections in one frame", source,
                           "each track may hold one detection per frame")
    edges = np.stack([order[:-1][same], order[1:][same]], axis=1) if order.size > 1 else \
        np.zeros((0, 2), dtype=np.int64)
    edges = edges.astype(np.int64).reshape(-1, 2)
    parent = np.zeros(edges.shape[0], dtype=bool)  # links within a track only
    return TrackGraph(frame=fr, pos=pos, track=lab, edges=edges, edge_parent=parent)


def _as_graph(x, coords) -> TrackGraph:
    if isinstance(x, TrackGraph):
        return x
    return build_track_graph(x, coords=coords)


# ----------------------------------------------------------------------------- matching


def _assign_gated(dist: np.ndarray, gate: float) -> tuple[np.ndarray, np.ndarray]:
    """One-to-one assignment of rows to columns: as many pairs within the gate as possible,
    then the smallest total distance among those (pairs beyond the gate are never made)."""
    if dist.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    valid = dist <= gate
    if not valid.any():
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    r = min(dist.shape)
    c = float(np.abs(dist[valid]).max()) + 1.0
    cost = np.where(valid, dist, 2 * r * c + 1.0)
    rows, cols = linear_sum_assignment(cost)
    keep = valid[rows, cols]
    return rows[keep].astype(np.int64), cols[keep].astype(np.int64)


def match_detections(truth: TrackGraph, pred: TrackGraph, gate: float) -> np.ndarray:
    """Match reference and computed detections one-to-one within ``gate``, frame by frame.

    In each frame the Hungarian assignment (``scipy.optimize.linear_sum_assignment``) makes as
    many pairs closer than or at ``gate`` as possible and, among those, minimises the summed
    Euclidean distance.

    Returns
    -------
    ndarray of int, shape (k, 2)
        (reference node, computed node) pairs.
    """
    out = []
    frames = np.intersect1d(np.unique(truth.frame), np.unique(pred.frame))
    for f in frames:
        ti = np.flatnonzero(truth.frame == f)
        pi = np.flatnonzero(pred.frame == f)
        d = np.linalg.norm(truth.pos[ti][:, None, :] - pred.pos[pi][None, :, :], axis=-1)
        r, c = _assign_gated(d, gate)
        out.append(np.stack([ti[r], pi[c]], axis=1))
    if not out:
        return np.zeros((0, 2), dtype=np.int64)
    return np.concatenate(out).astype(np.int64)


# ----------------------------------------------------------------------------- AOGM


def _aogm_counts(truth: TrackGraph, pred: TrackGraph, pairs: np.ndarray) -> dict:
    """Error counts of the graph transformation (pairs may be many reference to one computed)."""
    # computed node -> list of reference nodes
    refs_of = {}
    for t, p in pairs:
        refs_of.setdefault(int(p), []).append(int(t))
    ns = sum(len(v) - 1 for v in refs_of.values() if len(v) > 1)
    matched_ref = np.zeros(truth.n_nodes, dtype=bool)
    matched_ref[pairs[:, 0]] = True
    fn = int((~matched_ref).sum())
    fp = int(pred.n_nodes - len(refs_of))
    # edges among computed nodes matched to exactly one reference node (true positives)
    tp_map = {p: v[0] for p, v in refs_of.items() if len(v) == 1}
    ref_edges = {(int(a), int(b)): bool(s) for (a, b), s in zip(truth.edges, truth.edge_parent)}
    found = set()
    ed = ec = 0
    for (a, b), sem in zip(pred.edges, pred.edge_parent):
        a, b = int(a), int(b)
        if a not in tp_map or b not in tp_map:
            continue  # an edge of a deleted (or split) node goes with the node
        e = (tp_map[a], tp_map[b])
        if e not in ref_edges:
            ed += 1
        else:
            found.add(e)
            if ref_edges[e] != bool(sem):
                ec += 1
    ea = len(ref_edges) - len(found)
    return {"NS": ns, "FN": fn, "FP": fp, "ED": ed, "EA": ea, "EC": ec}


def ctc_measures(truth, pred, gate: float, coords=("x", "y"), weights: dict | None = None) -> dict:
    """Cell Tracking Challenge AOGM, TRA and DET for point detections.

    Parameters
    ----------
    truth, pred : DataFrame or TrackGraph
        Reference and computed tracks; DataFrames need columns ``track``, ``frame`` and the
        ``coords`` (see :func:`build_track_graph`).
    gate : float
        Largest distance (inclusive) at which a computed detection can match a reference one.
    coords : sequence of str
        Coordinate columns of DataFrame inputs.
    weights : dict, optional
        AOGM weights; defaults to :data:`CTC_WEIGHTS` (Matula et al. 2015).

    Returns
    -------
    dict
        ``TRA``, ``DET``, ``AOGM``, ``AOGM0``, ``AOGM_D``, ``AOGM_D0`` and the counts
        ``n_NS``, ``n_FN``, ``n_FP``, ``n_ED``, ``n_EA``, ``n_EC``, ``n_ref_nodes``,
        ``n_ref_edges``. TRA and DET are NaN when the reference is empty.

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"track": [1, 1], "frame": [0, 1], "x": [0., 0.], "y": [0., 0.]})
    >>> p = t.iloc[:1]
    >>> r = ctc_measures(t, p, gate=1.0)
    >>> r["n_FN"], r["n_EA"], r["AOGM"], r["AOGM0"]
    (1, 1, 11.5, 21.5)
    """
    w = dict(CTC_WEIGHTS if weights is None else weights)
    tg, pg = _as_graph(truth, coords), _as_graph(pred, coords)
    pairs = match_detections(tg, pg, gate)
    n = _aogm_counts(tg, pg, pairs)
    aogm = sum(w[k] * n[k] for k in ("NS", "FN", "FP", "ED", "EA", "EC"))
    aogm0 = w["FN"] * tg.n_nodes + w["EA"] * tg.n_edges
    aogm_d = w["NS"] * n["NS"] + w["FN"] * n["FN"] + w["FP"] * n["FP"]
    aogm_d0 = w["FN"] * tg.n_nodes
    tra = 1.0 - min(aogm, aogm0) / aogm0 if aogm0 > 0 else math.nan
    det = 1.0 - min(aogm_d, aogm_d0) / aogm_d0 if aogm_d0 > 0 else math.nan
    out = {"TRA": tra, "DET": det, "AOGM": aogm, "AOGM0": aogm0, "AOGM_D": aogm_d,
           "AOGM_D0": aogm_d0, "n_ref_nodes": tg.n_nodes, "n_ref_edges": tg.n_edges,
           "n_pred_nodes": pg.n_nodes, "n_pred_edges": pg.n_edges}
    out.update({f"n_{k}": int(v) for k, v in n.items()})
    return out


# ----------------------------------------------------------------------------- Chenouard


def _track_index(g: TrackGraph):
    labels, inv = np.unique(g.track, return_inverse=True)
    return labels, inv.astype(np.int64)


def _pair_gains(tg, pg, eps):
    """For every (reference track, computed track) sharing frames: the number of shared
    frames, and the summed gain ε − min(d, ε) over them."""
    t_lab, t_idx = _track_index(tg)
    p_lab, p_idx = _track_index(pg)
    a = pd.DataFrame({"frame": tg.frame, "ti": t_idx, "row_t": np.arange(tg.n_nodes)})
    b = pd.DataFrame({"frame": pg.frame, "pi": p_idx, "row_p": np.arange(pg.n_nodes)})
    m = a.merge(b, on="frame", how="inner")
    if len(m):
        d = np.linalg.norm(tg.pos[m["row_t"].to_numpy()] - pg.pos[m["row_p"].to_numpy()], axis=1)
    else:
        d = np.zeros(0)
    m["dist"] = d
    m["gain"] = eps - np.minimum(d, eps)
    return t_lab, t_idx, p_lab, p_idx, m


def particle_tracking_measures(truth, pred, eps: float, coords=("x", "y")) -> dict:
    """Particle-tracking measures of Chenouard et al. 2014 (Nat. Methods 11:281).

    Parameters
    ----------
    truth, pred : DataFrame or TrackGraph
        Reference and computed tracks (columns ``track``, ``frame`` and ``coords``).
    eps : float
        Gate ε of the gated distance min(‖p − q‖, ε); a missing point costs ε.
    coords : sequence of str
        Coordinate columns of DataFrame inputs.

    Returns
    -------
    dict
        ``alpha``, ``beta``, ``jaccard_tracks``, ``jaccard_detections``, ``rmse`` and the
        ingredients: ``d_paired`` = d(X, Y*), ``d_ref_empty`` = d(X, ∅), ``d_spurious_empty``
        = d(Ȳ, ∅), track counts (``tracks_TP``, ``tracks_FN``, ``tracks_FP``) and point counts
        (``points_TP``, ``points_FN``, ``points_FP``), and ``pairing`` (reference track label →
        computed track label, None for a dummy).

    Examples
    --------
    >>> import pandas as pd
    >>> t = pd.DataFrame({"track": [0] * 3, "frame": [0, 1, 2], "x": [0.0] * 3, "y": [0.0] * 3})
    >>> p = t.assign(x=1.0)
    >>> r = particle_tracking_measures(t, p, eps=5.0)
    >>> round(r["alpha"], 6), r["rmse"]
    (0.8, 1.0)
    """
    tg, pg = _as_graph(truth, coords), _as_graph(pred, coords)
    t_lab, t_idx, p_lab, p_idx, m = _pair_gains(tg, pg, eps)
    nt, npr = t_lab.size, p_lab.size
    len_t = np.bincount(t_idx, minlength=nt).astype(float)
    len_p = np.bincount(p_idx, minlength=npr).astype(float)
    common = np.zeros((nt, npr))
    gain = np.zeros((nt, npr))
    if len(m):
        np.add.at(common, (m["ti"].to_numpy(), m["pi"].to_numpy()), 1.0)
        np.add.at(gain, (m["ti"].to_numpy(), m["pi"].to_numpy()), m["gain"].to_numpy())
    # d(θx, θy) over every frame where either track exists
    d_pair = eps * (len_t[:, None] + len_p[None, :] - common) - gain
    d_dummy = eps * len_t
    big = eps * (len_t.sum() + len_p.sum()) + 1.0
    cost = np.full((nt, npr + nt), big)
    # a computed track with no point within ε of a reference track brings nothing to it
    # (paired or not, the cost is the same or higher): such pairs are not allowed, so ties
    # go to the dummy track and a far track is counted as spurious
    cost[:, :npr] = np.where(gain > 0, d_pair, big)
    cost[np.arange(nt), npr + np.arange(nt)] = d_dummy
    pairing = {}
    paired_p = np.full(nt, -1)
    d_xy = 0.0
    if nt:
        rows, cols = linear_sum_assignment(cost)
        for r, c in zip(rows, cols):
            d_xy += cost[r, c]
            if c < npr:
                paired_p[r] = c
    for i in range(nt):
        pairing[_plain(t_lab[i])] = None if paired_p[i] < 0 else _plain(p_lab[paired_p[i]])
    d_x0 = float(eps * len_t.sum())
    spurious = np.setdiff1d(np.arange(npr), paired_p[paired_p >= 0])
    d_y0 = float(eps * len_p[spurious].sum())
    # matched points: points of paired tracks in one frame, closer than ε
    if len(m):
        pp = paired_p[m["ti"].to_numpy()]
        tp_rows = (pp == m["pi"].to_numpy()) & (m["dist"].to_numpy() < eps)
        tp_d = m["dist"].to_numpy()[tp_rows]
    else:
        tp_d = np.zeros(0)
    n_tp = int(tp_d.size)
    n_fn = int(tg.n_nodes - n_tp)
    n_fp = int(pg.n_nodes - n_tp)
    tr_tp = int((paired_p >= 0).sum())
    tr_fn = int(nt - tr_tp)
    tr_fp = int(spurious.size)
    alpha = 1.0 - d_xy / d_x0 if d_x0 > 0 else math.nan
    beta = (d_x0 - d_xy) / (d_x0 + d_y0) if d_x0 > 0 else math.nan
    jt = tr_tp / (tr_tp + tr_fn + tr_fp) if (tr_tp + tr_fn + tr_fp) else math.nan
    jd = n_tp / (n_tp + n_fn + n_fp) if (n_tp + n_fn + n_fp) else math.nan
    rmse = float(np.sqrt(np.mean(tp_d ** 2))) if n_tp else math.nan
    return {"alpha": float(alpha), "beta": float(beta), "jaccard_tracks": jt,
            "jaccard_detections": jd, "rmse": rmse, "d_paired": float(d_xy),
            "d_ref_empty": d_x0, "d_spurious_empty": d_y0, "tracks_TP": tr_tp,
            "tracks_FN": tr_fn, "tracks_FP": tr_fp, "points_TP": n_tp, "points_FN": n_fn,
            "points_FP": n_fp, "pairing": pairing}


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


# ----------------------------------------------------------------------------- MOT


def clear_mot_measures(truth, pred, gate: float, coords=("x", "y")) -> dict:
    """CLEAR MOT accuracy (MOTA) and precision (MOTP) with a distance gate.

    Frame by frame (Bernardin & Stiefelhagen 2008): a reference object keeps the computed
    track it was last matched to if that track is still within the gate; the remaining ones
    are assigned by the gated Hungarian rule of :func:`match_detections`; a match to another
    track than the object's last one is an identity switch.
    MOTA = 1 − (misses + false positives + switches) / reference detections;
    MOTP = mean distance of the matches.
    """
    tg, pg = _as_graph(truth, coords), _as_graph(pred, coords)
    last = {}
    misses = fps = switches = 0
    dsum = 0.0
    nmatch = 0
    for f in np.union1d(np.unique(tg.frame), np.unique(pg.frame)):
        ti = np.flatnonzero(tg.frame == f)
        pi = np.flatnonzero(pg.frame == f)
        ti = ti[np.argsort(tg.track[ti], kind="stable")]
        pi = pi[np.argsort(pg.track[pi], kind="stable")]
        d = np.linalg.norm(tg.pos[ti][:, None, :] - pg.pos[pi][None, :, :], axis=-1) \
            if ti.size and pi.size else np.zeros((ti.size, pi.size))
        used_t = np.zeros(ti.size, bool)
        used_p = np.zeros(pi.size, bool)
        plabels = pg.track[pi]
        for i in range(ti.size):
            o = _plain(tg.track[ti[i]])
            if o in last:
                js = np.flatnonzero(~used_p & (plabels == last[o]))
                if js.size and d[i, js[0]] <= gate:
                    j = js[0]
                    used_t[i] = used_p[j] = True
                    dsum += d[i, j]
                    nmatch += 1
        rest = d.copy()
        rest[used_t, :] = np.inf
        rest[:, used_p] = np.inf
        r, c = _assign_gated(rest, gate)
        for i, j in zip(r, c):
            o = _plain(tg.track[ti[i]])
            h = _plain(plabels[j])
            if o in last and last[o] != h:
                switches += 1
            last[o] = h
            used_t[i] = used_p[j] = True
            dsum += d[i, j]
            nmatch += 1
        misses += int((~used_t).sum())
        fps += int((~used_p).sum())
    n_obj = tg.n_nodes
    mota = 1.0 - (misses + fps + switches) / n_obj if n_obj else math.nan
    motp = float(dsum / nmatch) if nmatch else math.nan
    return {"MOTA": mota, "MOTP": motp, "mot_misses": misses, "mot_false_positives": fps,
            "mot_switches": switches, "mot_matches": nmatch}


def identity_measures(truth, pred, gate: float, coords=("x", "y")) -> dict:
    """Identity measures IDF1, IDP, IDR (Ristani et al. 2016).

    Reference and computed tracks are paired one-to-one so as to maximise the number of
    detections (IDTP) where the paired tracks are within ``gate`` of each other in the same
    frame. IDF1 = 2 IDTP / (reference detections + computed detections).
    """
    tg, pg = _as_graph(truth, coords), _as_graph(pred, coords)
    t_lab, t_idx, p_lab, p_idx, m = _pair_gains(tg, pg, 1.0)
    counts = np.zeros((t_lab.size, p_lab.size))
    if len(m):
        ok = m["dist"].to_numpy() <= gate
        np.add.at(counts, (m["ti"].to_numpy()[ok], m["pi"].to_numpy()[ok]), 1.0)
    idtp = 0.0
    if counts.size:
        r, c = linear_sum_assignment(counts, maximize=True)
        idtp = float(counts[r, c].sum())
    n_t, n_p = tg.n_nodes, pg.n_nodes
    return {"IDF1": 2 * idtp / (n_t + n_p) if (n_t + n_p) else math.nan,
            "IDP": idtp / n_p if n_p else math.nan, "IDR": idtp / n_t if n_t else math.nan,
            "IDTP": idtp, "IDFP": n_p - idtp, "IDFN": n_t - idtp}


# ----------------------------------------------------------------------------- birth order


def match_tracks(truth, pred, gate: float, coords=("x", "y")) -> dict:
    """Pair computed tracks with reference tracks one-to-one, maximising the number of
    detections matched between them (per-frame gated matching of :func:`match_detections`).

    Returns
    -------
    dict
        reference track label → computed track label (only pairs sharing ≥ 1 matched
        detection).
    """
    tg, pg = _as_graph(truth, coords), _as_graph(pred, coords)
    pairs = match_detections(tg, pg, gate)
    t_lab, t_idx = _track_index(tg)
    p_lab, p_idx = _track_index(pg)
    counts = np.zeros((t_lab.size, p_lab.size))
    if pairs.size:
        np.add.at(counts, (t_idx[pairs[:, 0]], p_idx[pairs[:, 1]]), 1.0)
    out = {}
    if counts.size:
        r, c = linear_sum_assignment(counts, maximize=True)
        for i, j in zip(r, c):
            if counts[i, j] > 0:
                out[_plain(t_lab[i])] = _plain(p_lab[j])
    return out


def kendall_tau_b(x, y) -> float:
    """Kendall's rank correlation τ-b (ties corrected), by counting pairs.

    τ-b = (C − D) / sqrt((n0 − n1)(n0 − n2)) with C, D the concordant and discordant pairs,
    n0 = n(n − 1)/2 and n1, n2 the pairs tied in x and in y (Kendall 1945, Biometrika 33).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    n = x.size
    if n < 2:
        return math.nan
    iu = np.triu_indices(n, 1)
    sx = np.sign(x[:, None] - x[None, :])[iu]
    sy = np.sign(y[:, None] - y[None, :])[iu]
    s = float(np.sum(sx * sy))
    n0 = n * (n - 1) / 2
    n1 = float(np.sum(sx == 0))
    n2 = float(np.sum(sy == 0))
    den = math.sqrt((n0 - n1) * (n0 - n2))
    return s / den if den > 0 else math.nan


def birth_order_accuracy(true_rank: dict, pred_rank: dict, track_pairs: dict) -> dict:
    """Birth-order accuracy of matched primordia.

    Parameters
    ----------
    true_rank : dict
        reference primordium → true birth rank.
    pred_rank : dict
        computed track → predicted birth rank.
    track_pairs : dict
        reference primordium → computed track (from :func:`match_tracks`).

    Returns
    -------
    dict
        ``rank_exact_fraction``: share of all reference primordia whose matched primordium
        holds the same rank once both rankings are restricted to the matched primordia (a
        missed primordium counts as wrong but does not shift the others);
        ``rank_exact_fraction_raw``: the same with the ranks as written;
        ``kendall_tau``: τ-b between true and predicted ranks of matched primordia;
        ``n_primordia_true``, ``n_primordia_matched``, ``n_primordia_pred``.
    """
    matched = [(k, track_pairs[k]) for k in true_rank
               if k in track_pairs and track_pairs[k] in pred_rank]
    n_true = len(true_rank)
    tr = np.array([true_rank[k] for k, _ in matched], dtype=float)
    pr = np.array([pred_rank[p] for _, p in matched], dtype=float)
    if matched:
        rt = pd.Series(tr).rank(method="min").to_numpy()
        rp = pd.Series(pr).rank(method="min").to_numpy()
        exact = int(np.sum(rt == rp))
        exact_raw = int(np.sum(tr == pr))
    else:
        exact = exact_raw = 0
    return {"rank_exact_fraction": exact / n_true if n_true else math.nan,
            "rank_exact_fraction_raw": exact_raw / n_true if n_true else math.nan,
            "kendall_tau": kendall_tau_b(tr, pr) if len(matched) >= 2 else math.nan,
            "n_primordia_true": n_true, "n_primordia_matched": len(matched),
            "n_primordia_pred": len(pred_rank)}


# ----------------------------------------------------------------------------- results folders


def read_truth(truth_csv: str | Path) -> pd.DataFrame:
    """Read a ground-truth table (one row per primordium per frame).

    Required columns: ``primordium``, ``birth_rank``, ``frame``, ``x_um``, ``y_um`` (as
    written by :func:`apextrack.model.write_synthetic`). Rows that cannot be seen in the
    images are left out: ``visible`` false (centre outside the field of view) or
    ``frame_status`` "missing" (a blank frame), when those columns are present.

    Raises
    ------
    ResultsError
        When the file is missing, unreadable, lacks a column or holds non-numeric values.
    """
    path = Path(truth_csv)
    df = read_table(path)  # strings; raises ResultsError when missing/unreadable
    missing = [c for c in _TRUTH_COLUMNS if c not in df.columns]
    if missing:
        raise ResultsError(f"ground-truth table lacks column(s) {', '.join(missing)} "
                           f"(found: {', '.join(map(str, df.columns))})", path,
                           "give the truth.csv written with the synthetic stack")
    out = df.copy()
    try:
        for c in ("birth_rank", "frame"):
            out[c] = pd.to_numeric(out[c], errors="raise").astype("int64")
        for c in ("x_um", "y_um"):
            out[c] = pd.to_numeric(out[c], errors="raise").astype("float64")
    except (ValueError, TypeError):
        raise ResultsError("ground-truth columns frame, birth_rank, x_um, y_um must be numbers "
                           "on every row", path, "give the truth.csv written with the synthetic "
                           "stack") from None
    if "visible" in out.columns:
        vis = out["visible"].map(lambda v: str(v).strip().lower() in ("true", "1", "yes"))
        out = out[vis.to_numpy()]
    if "frame_status" in out.columns:
        out = out[(out["frame_status"].astype(str).str.strip().str.lower() != "missing").to_numpy()]
    return out.reset_index(drop=True)


def score_tracks(truth: pd.DataFrame, tracks: pd.DataFrame, primordia: pd.DataFrame | None,
                 gate_um: float = DEFAULT_GATE_UM, source: str | Path | None = None) -> dict:
    """Every accuracy measure of computed tracks (and birth ranks) against a ground truth.

    Parameters
    ----------
    truth : DataFrame
        Columns ``primordium``, ``birth_rank``, ``frame``, ``x_um``, ``y_um``.
    tracks : DataFrame
        Columns ``track_id``, ``frame``, ``x_um``, ``y_um`` (tracks table).
    primordia : DataFrame or None
        Columns ``track_id``, ``birth_rank`` (primordia table); birth-order measures are NaN
        without it.
    gate_um : float
        Matching gate (CTC, MOTA, IDF1) and ε of the particle-tracking measures, in µm.

    Returns
    -------
    dict
        Flat mapping of measure name → value (see :func:`ctc_measures`,
        :func:`particle_tracking_measures`, :func:`clear_mot_measures`,
        :func:`identity_measures`, :func:`birth_order_accuracy`).
    """
    if not (gate_um > 0 and math.isfinite(gate_um)):
        raise AnalysisError(f"matching gate must be a positive distance, got {gate_um}", source,
                            "give gate_um in µm, e.g. 5")
    t = truth.rename(columns={"primordium": "track"})
    p = tracks.rename(columns={"track_id": "track"})
    coords = ("x_um", "y_um")
    tg = build_track_graph(t, coords=coords, source=source)
    pg = build_track_graph(p, coords=coords, source=source)
    out = {"gate_um": float(gate_um)}
    out.update(ctc_measures(tg, pg, gate_um))
    pt = particle_tracking_measures(tg, pg, gate_um)
    pt.pop("pairing")
    out.update(pt)
    out.update(clear_mot_measures(tg, pg, gate_um))
    out.update(identity_measures(tg, pg, gate_um))
    true_rank = (truth.drop_duplicates("primordium").set_index("primordium")["birth_rank"]
                 .to_dict())
    if primordia is not None and len(primordia):
        pred_rank = dict(zip(primordia["track_id"].map(_plain), primordia["birth_rank"]))
    else:
        pred_rank = {}
    out.update(birth_order_accuracy(true_rank, pred_rank, match_tracks(tg, pg, gate_um)))
    return out


def image_coordinates(tracks: pd.DataFrame, results_dir: str | Path) -> pd.DataFrame:
    """Tracks with ``x_um``/``y_um`` in each frame's own image coordinates.

    The analysis reports positions in the registered frame of reference (drift and rotation
    removed); a ground truth of rendered stacks is in each frame's image. The detector's pixel
    position (``x_px``, ``y_px``) times the pixel size (``summary.json``) gives the latter.
    Tables without pixel columns are returned unchanged.
    """
    if not {"x_px", "y_px"} <= set(tracks.columns):
        return tracks
    summary_path = Path(results_dir) / "summary.json"
    if not summary_path.exists():
        return tracks
    px = read_json(summary_path).get("pixel_size_um")
    if not px:
        return tracks
    out = tracks.copy()
    out["x_um"] = out["x_px"].astype(float) * float(px)
    out["y_um"] = out["y_px"].astype(float) * float(px)
    return out


def score_results(results_dir: str | Path, truth_csv: str | Path,
                  gate_um: float = DEFAULT_GATE_UM) -> dict:
    """Score an analysis results folder against a ground-truth table.

    Parameters
    ----------
    results_dir : str or Path
        Folder holding ``tracks.csv`` and ``primordia.csv`` as written by ``apextrack analyse``.
    truth_csv : str or Path
        Ground truth, one row per primordium per frame (see :func:`read_truth`).
    gate_um : float
        Matching gate in µm.

    Returns
    -------
    dict
        All measures (see :func:`score_tracks`) plus ``results_dir`` and ``truth_csv``.

    Raises
    ------
    ResultsError
        When a file or a column is missing.
    """
    results_dir = Path(results_dir)
    if not results_dir.is_dir():
        raise ResultsError("results folder not found", results_dir,
                           "give the folder written by apextrack analyse")
    tracks = read_table(results_dir / "tracks.csv", "tracks")
    primordia = read_table(results_dir / "primordia.csv", "primordia")
    truth = read_truth(truth_csv)
    tracks = image_coordinates(tracks, results_dir)
    scores = score_tracks(truth, tracks, primordia, gate_um, source=results_dir / "tracks.csv")
    scores["results_dir"] = str(results_dir)
    scores["truth_csv"] = str(truth_csv)
    return scores


def write_scores(scores: dict, out_path: str | Path) -> list[Path]:
    """Write scores as JSON and CSV (``measure, value``), atomically.

    ``out_path`` is a folder (``scores.json`` and ``scores.csv`` go in it) or a file name whose
    suffix is replaced by ``.json`` and ``.csv``.

    Returns
    -------
    list of Path
        The two files written.
    """
    out_path = Path(out_path)
    if out_path.suffix.lower() in (".json", ".csv"):
        base = out_path.with_suffix("")
    else:
        base = out_path / "scores"
    js = write_json(scores, base.with_suffix(".json"))
    rows = [(k, float(v)) for k, v in sorted(scores.items())
            if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)]
    df = pd.DataFrame(rows, columns=["measure", "value"])
    csv = base.with_suffix(".csv")
    atomic_write_text(csv, to_csv_text(df))
    return [js, csv]
