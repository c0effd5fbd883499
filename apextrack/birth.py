"""Emergence times and birth order of primordia from their tracks.

Primordia drift outward from the apex centre as r(t) = R·exp(γ(t − τ)) after their birth at
time τ on the rim radius R. γ is estimated from the tracks (slope of ln r against time); the
emergence time of every primordium, including those already present in the first frame, is
its first observation extrapolated back along that law: τ = t − ln(r/R)/γ. Birth rank 1 is the
earliest emergence. Emergences closer than the co-initiation tolerance are flagged.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

PRIMORDIA_COLUMNS = ["birth_rank", "track_id", "emergence_time_h", "emergence_frame", "x_um", "y_um",
                     "r_um", "theta_deg", "co_initiated", "emergence_time_sd_h", "n_frames"]


def growth_rate(tracks: pd.DataFrame, min_points: int = 3) -> tuple[float, float, int]:
    """Relative radial growth rate γ (1/h) pooled over tracks: mean within-track slope of ln r
    against time, weighted by the number of points. Returns ``(gamma, sd, n_tracks)``;
    NaN when no track has ``min_points`` detections."""
    slopes, weights = [], []
    for _, g in tracks.groupby("track_id", sort=True):
        g = g[g["r_um"] > 0]
        if len(g) < min_points or g["time_h"].nunique() < min_points:
            continue
        t = g["time_h"].to_numpy(float)
        lr = np.log(g["r_um"].to_numpy(float))
        slope = np.polyfit(t, lr, 1)[0]
        slopes.append(slope)
        weights.append(len(g))
    if not slopes:
        return math.nan, math.nan, 0
    slopes, weights = np.asarray(slopes), np.asarray(weights, float)
    g = float(np.average(slopes, weights=weights))
    sd = float(np.sqrt(np.average((slopes - g) ** 2, weights=weights))) if len(slopes) > 1 else math.nan
    return g, sd, len(slopes)


def order_primordia(tracks: pd.DataFrame, co_initiation_h: float | None = None,
                    min_track_frames: int = 1) -> tuple[pd.DataFrame, dict]:
    """One row per primordium (track) with its emergence time and birth rank.

    Parameters
    ----------
    tracks : DataFrame
        Linked detections with ``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um``,
        ``r_um``, ``theta_deg``.
    co_initiation_h : float, optional
        Emergences closer than this are flagged co-initiated. Default: a quarter of the median
        interval between successive emergences.
    min_track_frames : int
        Tracks with fewer detections are left out of the primordia table.

    Returns
    -------
    primordia : DataFrame
        Columns :data:`PRIMORDIA_COLUMNS`, sorted by birth rank.
    info : dict
        ``growth_rate_per_h``, ``rim_radius_um`` and how the times were estimated.
    """
    info: dict = {}
    if tracks.empty:
        return pd.DataFrame({c: pd.Series(dtype=float) for c in PRIMORDIA_COLUMNS}), {"reason": "no tracks"}
    lengths = tracks.groupby("track_id").size()
    keep_ids = lengths.index[lengths >= min_track_frames]
    tr = tracks[tracks["track_id"].isin(keep_ids)]
    first = tr.sort_values(["track_id", "frame"], kind="stable").drop_duplicates("track_id")
    first = first.set_index("track_id")
    first0 = int(tracks["frame"].min())
    gamma, gamma_sd, n_fit = growth_rate(tr)
    info["growth_rate_per_h"] = gamma
    info["growth_rate_sd_per_h"] = gamma_sd
    info["growth_tracks"] = n_fit
    new = first[first["frame"] > first0]
    if len(new):
        rim = float(np.median(new["r_um"]))
    else:
        rim = float(first["r_um"].min()) if len(first) else math.nan
    info["rim_radius_um"] = rim
    t_first = first["time_h"].to_numpy(float)
    r_first = first["r_um"].to_numpy(float)
    if math.isfinite(gamma) and gamma > 0 and math.isfinite(rim) and rim > 0:
        tau = t_first - np.log(np.maximum(r_first, 1e-9) / rim) / gamma
        # a primordium seen after the first frame emerged between the previous frame and now
        info["method"] = "back-extrapolation along r = R·exp(γ(t − τ))"
        # the back-extrapolation cannot place a newly appearing primordium after its first sighting
        later = first["frame"].to_numpy() > first0
        tau = np.where(later, np.minimum(tau, t_first), tau)
        sd = np.full(len(tau), math.nan)
        if math.isfinite(gamma_sd):
            sd = np.abs(np.log(np.maximum(r_first, 1e-9) / rim)) * gamma_sd / gamma
    else:
        info["method"] = "first frame seen; primordia present from the start ordered by distance (older farther out)"
        tau = t_first.copy()
        at0 = first["frame"].to_numpy() == first0
        # older primordia are farther out: order those present at the start by -r
        if at0.any():
            order = np.argsort(-r_first[at0], kind="stable")
            ranks = np.empty(order.size)
            ranks[order] = np.arange(order.size)
            tau[at0] = t_first[at0] - (order.size - ranks) * 1e-6
        sd = np.full(len(tau), math.nan)
    prim = pd.DataFrame({
        "track_id": first.index.to_numpy(np.int64),
        "emergence_time_h": tau,
        "emergence_frame": first["frame"].to_numpy(np.int64),
        "x_um": first["x_um"].to_numpy(float),
        "y_um": first["y_um"].to_numpy(float),
        "r_um": r_first,
        "theta_deg": first["theta_deg"].to_numpy(float),
        "emergence_time_sd_h": sd,
        "n_frames": tr.groupby("track_id").size().reindex(first.index).to_numpy(np.int64),
    })
    prim = prim.sort_values(["emergence_time_h", "r_um", "track_id"], ascending=[True, False, True],
                            kind="stable").reset_index(drop=True)
    prim.insert(0, "birth_rank", np.arange(1, len(prim) + 1, dtype=np.int64))
    gaps = np.diff(prim["emergence_time_h"].to_numpy(float))
    if co_initiation_h is None:
        co_initiation_h = 0.25 * float(np.median(gaps)) if gaps.size else 0.0
    info["co_initiation_h"] = co_initiation_h
    co = np.zeros(len(prim), bool)
    close = gaps < co_initiation_h
    co[:-1] |= close
    co[1:] |= close
    prim["co_initiated"] = co
    return prim[PRIMORDIA_COLUMNS], info
