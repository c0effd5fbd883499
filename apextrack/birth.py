"""Emergence times and birth order of primordia from their tracks.

After its birth at time τ on the rim of the apex (radius R) a primordium drifts outward as
r(t) = R·exp(γ(t − τ)) (Richards 1951, Phil. Trans. R. Soc. B 235; Douady & Couder 1992,
Phys. Rev. Lett. 68). Every track is fitted with ln r(t) = a_k + γ·t, γ common to all tracks
(weighted least squares, weights r² since the position error is about the same in µm at every
distance), and its emergence time is where the fitted line crosses the reference radius:
τ_k = (ln R − a_k)/γ. This is the back-extrapolation τ = t − ln(r/R)/γ of Refahi et al. (2016,
eLife 5:e14093, Appendix), applied to the whole track rather than its first point, so primordia
already present in the first frame, or entering the field of view later, get emergence times
on the same scale as those seen being born. The reference radius R is estimated from the
primordia seen appearing: their first sighting falls anywhere in the interval after their
emergence, on average half an interval after it. The primordium size gives a second,
independent clock (ln radius(t) fitted the same way, reference size from the new primordia),
reported as ``emergence_time_size_h``.

Each emergence time has a standard deviation from the fit (the scatter of ln r about the
line, the uncertainty of γ over the extrapolated distance and the uncertainty of the apex
centre, which moves r by up to its own size) and from the reference radius, common to all.
Birth rank 1 is the earliest emergence. Two primordia whose emergence times differ by less than
the uncertainty of that difference, or by less than the co-initiation tolerance, are flagged
co-initiated; each rank has a confidence: the probability, under Gaussian timing errors, that
its primordium emerged after the previous one and before the next.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

PRIMORDIA_COLUMNS = ["birth_rank", "track_id", "emergence_time_h", "emergence_frame", "x_um", "y_um",
                     "r_um", "theta_deg", "co_initiated", "emergence_time_sd_h", "rank_confidence",
                     "co_initiated_with", "emergence_time_size_h", "n_frames", "fit_residual_um",
                     "track_flags"]

#: Default co-initiation tolerance as a fraction of the median interval between successive
#: emergences (common practice, no source: a quarter of a plastochron).
CO_INITIATION_FRACTION = 0.25


def _pooled_log_fit(tracks: pd.DataFrame, column: str, weights: np.ndarray | None = None,
                    min_points: int = 2) -> tuple[float, float, float, int]:
    """Common slope of ``ln column`` against ``time_h`` within tracks (per-track intercepts).

    Returns ``(slope, slope_se, residual_sd, n_tracks_used)``; NaN when no track has
    ``min_points`` distinct times."""
    y = np.log(np.maximum(tracks[column].to_numpy(float), 1e-12))
    t = tracks["time_h"].to_numpy(float)
    w = np.ones(len(t)) if weights is None else np.asarray(weights, float)
    tid = tracks["track_id"].to_numpy()
    df = pd.DataFrame({"tid": tid, "t": t, "y": y, "w": w})
    nt = df.groupby("tid")["t"].transform("nunique")
    df = df[nt >= min_points]
    if df.empty:
        return math.nan, math.nan, math.nan, 0
    sw = df.groupby("tid")["w"].transform("sum")
    tbar = (df["w"] * df["t"]).groupby(df["tid"]).transform("sum") / sw
    ybar = (df["w"] * df["y"]).groupby(df["tid"]).transform("sum") / sw
    dt, dy = df["t"] - tbar, df["y"] - ybar
    sxx = float((df["w"] * dt * dt).sum())
    if sxx <= 0:
        return math.nan, math.nan, math.nan, 0
    slope = float((df["w"] * dt * dy).sum() / sxx)
    res = dy - slope * dt
    n_tr = int(df["tid"].nunique())
    dof = len(df) - n_tr - 1
    # residual SD of one point of unit weight
    s2 = float((df["w"] * res * res).sum() / dof) if dof > 0 else math.nan
    se = math.sqrt(s2 / sxx) if dof > 0 else math.nan
    return slope, se, math.sqrt(s2) if dof > 0 else math.nan, n_tr


def growth_rate(tracks: pd.DataFrame, min_points: int = 3) -> tuple[float, float, int]:
    """Relative radial growth rate γ (1/h) pooled over tracks: common slope of ln r against
    time within tracks (weights r²). Returns ``(gamma, standard error, n_tracks)``; NaN when
    no track has ``min_points`` detections at distinct times.

    Examples
    --------
    >>> t = np.arange(4) * 3.0
    >>> tr = pd.DataFrame({"track_id": [0] * 4 + [1] * 4, "time_h": np.r_[t, t],
    ...                    "r_um": np.r_[20 * np.exp(0.02 * t), 30 * np.exp(0.02 * t)]})
    >>> round(growth_rate(tr)[0], 6)
    0.02
    """
    tr = tracks[tracks["r_um"] > 0]
    g, se, _, n = _pooled_log_fit(tr, "r_um", tr["r_um"].to_numpy(float) ** 2, min_points)
    return g, se, n


def _interval_before(frames: np.ndarray, all_frames: np.ndarray, time_of: dict) -> np.ndarray:
    """Time between each frame and the previous frame of the record (NaN for the first)."""
    idx = np.searchsorted(all_frames, frames)
    out = np.full(len(frames), np.nan)
    ok = idx > 0
    out[ok] = [time_of[all_frames[i]] - time_of[all_frames[i - 1]] for i in idx[ok]]
    return out


def _normal_cdf(x):
    from scipy.special import ndtr

    return ndtr(x)


def order_primordia(tracks: pd.DataFrame, co_initiation_h: float | None = None,
                    min_track_frames: int = 1, *, centre_sd_um: float = 0.0,
                    growth_rate_per_h: float | None = None) -> tuple[pd.DataFrame, dict]:
    """One row per primordium (track) with its emergence time, uncertainty and birth rank.

    Parameters
    ----------
    tracks : DataFrame
        Linked detections with ``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um``,
        ``r_um``, ``theta_deg`` (optional ``radius_um``, ``track_flags``).
    co_initiation_h : float, optional
        Emergences closer than this are flagged co-initiated, besides those closer than
        their uncertainty. Default: a quarter of the median interval between successive
        emergences.
    min_track_frames : int
        Tracks with fewer detections are left out of the ranking (they stay in the tracks
        table, flagged ``short``), unless they touch the first or last frame of the record
        (a primordium just born, or about to leave the field of view, cannot be seen longer)
        and are not flagged ``unconfirmed``.
    centre_sd_um : float
        Uncertainty of the apex centre (µm); it moves r by up to as much.
    growth_rate_per_h : float, optional
        γ to use when the tracks are too short to estimate it.

    Returns
    -------
    primordia : DataFrame
        Columns :data:`PRIMORDIA_COLUMNS`, sorted by birth rank.
    info : dict
        ``growth_rate_per_h`` (γ) and its standard error, ``rim_radius_um`` (R), how the times
        were estimated, ``co_initiation_h`` and the tracks left out.

    Examples
    --------
    >>> t = np.arange(5) * 3.0
    >>> rows = [(k, f, tt, 20 * np.exp(0.02 * (tt - tau))) for k, tau in enumerate([-10.0, 1.0, 7.0])
    ...         for f, tt in enumerate(t) if tt >= tau]
    >>> tr = pd.DataFrame(rows, columns=["track_id", "frame", "time_h", "r_um"])
    >>> tr["x_um"], tr["y_um"], tr["theta_deg"] = tr["r_um"], 0.0, 0.0
    >>> prim, info = order_primordia(tr)
    >>> prim["track_id"].tolist()
    [0, 1, 2]
    """
    info: dict = {}
    if tracks.empty:
        return pd.DataFrame({c: pd.Series(dtype=float) for c in PRIMORDIA_COLUMNS}), {"reason": "no tracks"}
    all_frames = np.sort(tracks["frame"].unique())
    time_of = tracks.groupby("frame")["time_h"].first().to_dict()
    f_first, f_last = int(all_frames[0]), int(all_frames[-1])
    g = tracks.groupby("track_id", sort=True)
    n_det = g.size()
    f_min, f_max = g["frame"].min(), g["frame"].max()
    censored = (f_min == f_first) | (f_max == f_last)
    if "track_flags" in tracks:
        # a blob seen once at an end of the record that the motion cannot explain (link.py)
        unconfirmed = g["track_flags"].first().fillna("").astype(str).str.contains("unconfirmed")
        censored &= ~unconfirmed.reindex(n_det.index).to_numpy()
    keep_ids = n_det.index[(n_det >= min_track_frames) | censored]
    info["tracks_left_out"] = [int(k) for k in n_det.index.difference(keep_ids)]
    tr = tracks[tracks["track_id"].isin(keep_ids) & (tracks["r_um"] > 0)].copy()
    first = tr.sort_values(["track_id", "frame"], kind="stable").drop_duplicates("track_id").set_index("track_id")
    ids = first.index.to_numpy()

    n_frames = n_det.reindex(ids).to_numpy(np.int64)
    flags = (tr.groupby("track_id")["track_flags"].first().reindex(ids).fillna("").astype(str).to_numpy()
             if "track_flags" in tr else np.full(len(ids), "", dtype=object))
    key_all = tr["track_id"].to_numpy()
    r_all = tr["r_um"].to_numpy(float)
    t_all = tr["time_h"].to_numpy(float)
    use = np.ones(len(tr), bool)
    n_trimmed = 0
    # the fit is repeated without detections far off their track's line (a blob cut by the
    # image border stops moving outward; a wrong link jumps); every track keeps its points
    # when all of them would go
    for it in range(4):
        sub = tr[use]
        gamma, gamma_se, n_fit = growth_rate(sub)
        if not (math.isfinite(gamma) and gamma > 0) and growth_rate_per_h is not None and growth_rate_per_h > 0:
            gamma, gamma_se, n_fit = float(growth_rate_per_h), math.nan, 0
        w = r_all[use] ** 2
        lr = np.log(r_all[use])
        tt = t_all[use]
        key = key_all[use]
        sw = pd.Series(w).groupby(key).sum()
        ybar = (pd.Series(w * lr).groupby(key).sum() / sw).reindex(ids).to_numpy()
        tbar = (pd.Series(w * tt).groupby(key).sum() / sw).reindex(ids).to_numpy()
        sw = sw.reindex(ids).to_numpy()
        if not (math.isfinite(gamma) and gamma > 0):
            break
        pred = np.exp(pd.Series(ybar, index=ids).reindex(key_all).to_numpy()
                      + gamma * (t_all - pd.Series(tbar, index=ids).reindex(key_all).to_numpy()))
        res_all = r_all - pred
        scale = 1.4826 * float(np.median(np.abs(res_all[use])))
        new_use = np.abs(res_all) <= max(4.0 * scale, 0.5)
        kept = pd.Series(new_use).groupby(key_all).transform("any").to_numpy()
        new_use |= ~kept
        if np.array_equal(new_use, use) or it == 3:
            break
        use = new_use
    n_trimmed = int((~use).sum())
    info["growth_rate_per_h"] = gamma
    info["growth_rate_se_per_h"] = gamma_se
    info["growth_tracks"] = n_fit
    info["detections_left_out_of_fit"] = n_trimmed
    rbar = np.exp(ybar)

    new_ids = np.array([], dtype=ids.dtype)
    if math.isfinite(gamma) and gamma > 0:
        # residual SD of ln r for a point of weight r² → per-point SD in µm
        res_um = pd.Series(r_all[use]
                           - np.exp(pd.Series(ybar, index=ids).reindex(key).to_numpy()
                                    + gamma * (tt - pd.Series(tbar, index=ids).reindex(key).to_numpy())))
        fit_res = np.sqrt((res_um ** 2).groupby(key).mean()).reindex(ids).to_numpy()
        dof = len(tr) - len(ids) - 1
        s_um = float(np.sqrt((res_um ** 2).sum() / dof)) if dof > 0 else math.nan
        if not math.isfinite(s_um) or s_um <= 0:
            s_um = max(float(centre_sd_um), 0.1)
        # reference radius from the primordia seen appearing (innermost in their first frame)
        r_min_frame = tr.groupby("frame")["r_um"].min()
        first_r = first["r_um"].to_numpy(float)
        ff = first["frame"].to_numpy()
        dt_before = _interval_before(ff, all_frames, time_of)
        dt_med = float(np.median(np.diff(sorted(time_of.values())))) if len(time_of) > 1 else 1.0
        # innermost in its first frame (within 1.5 intervals of growth): a birth, not a
        # primordium entering the field of view or a track restarted after a break
        appears = (ff > f_first) & (first_r <= r_min_frame.reindex(ff).to_numpy() * math.exp(1.5 * gamma * dt_med))
        if appears.any():
            # fitted ln r at the midpoint of the interval before the first sighting
            ln_r_emerge = ybar[appears] + gamma * (first["time_h"].to_numpy(float)[appears]
                                                   - 0.5 * dt_before[appears] - tbar[appears])
            ln_rim = float(np.median(ln_r_emerge))
            spread = (float(np.std(ln_r_emerge, ddof=1)) if appears.sum() > 1
                      else gamma * float(np.nanmedian(dt_before)) / math.sqrt(12.0))
            ln_rim_se = spread / math.sqrt(appears.sum())
            info["rim_from"] = f"{int(appears.sum())} primordia seen appearing"
            new_ids = ids[appears]
        else:
            ln_rim = float(np.log(np.min(rbar)))
            ln_rim_se = math.nan
            info["rim_from"] = "no primordium seen appearing: the innermost track"
        rim = math.exp(ln_rim)
        info["rim_radius_um"] = rim
        info["rim_radius_se_um"] = rim * ln_rim_se if math.isfinite(ln_rim_se) else math.nan
        tau = tbar - (ybar - ln_rim) / gamma
        # own uncertainty: scatter about the line, γ over the extrapolated distance, centre
        se_y = s_um / np.sqrt(sw)                       # SD of ybar (weights r², s in µm)
        var_own = (se_y / gamma) ** 2
        if math.isfinite(gamma_se):
            var_own += ((ybar - ln_rim) / gamma ** 2 * gamma_se) ** 2
        var_own += (float(centre_sd_um) / (gamma * rbar)) ** 2
        sd_own = np.sqrt(var_own)
        sd_ref = ln_rim_se / gamma if math.isfinite(ln_rim_se) else 0.0
        sd = np.sqrt(sd_own ** 2 + sd_ref ** 2)
        info["method"] = ("ln r(t) fitted per track with a common γ, extrapolated to the reference radius "
                          "(τ = t − ln(r/R)/γ)")
        tau_size = _size_clock(tr, ids, first, new_ids, dt_before, time_of)
    else:
        info["method"] = ("growth rate unknown: first frame seen; primordia present from the start ordered "
                          "by distance (older farther out)")
        info["rim_radius_um"] = math.nan
        t_first = first["time_h"].to_numpy(float)
        r_first = first["r_um"].to_numpy(float)
        tau = t_first.copy()
        at0 = first["frame"].to_numpy() == f_first
        if at0.any():
            order = np.argsort(-r_first[at0], kind="stable")
            ranks = np.empty(order.size)
            ranks[order] = np.arange(order.size)
            tau[at0] = t_first[at0] - (order.size - ranks) * 1e-6
        sd_own = np.full(len(tau), math.nan)
        sd = sd_own.copy()
        fit_res = np.full(len(tau), math.nan)
        tau_size = np.full(len(tau), math.nan)

    prim = pd.DataFrame({
        "track_id": ids.astype(np.int64),
        "emergence_time_h": tau,
        "emergence_frame": first["frame"].to_numpy(np.int64),
        "x_um": first["x_um"].to_numpy(float),
        "y_um": first["y_um"].to_numpy(float),
        "r_um": first["r_um"].to_numpy(float),
        "theta_deg": first["theta_deg"].to_numpy(float),
        "emergence_time_sd_h": sd,
        "_sd_own": sd_own,
        "emergence_time_size_h": tau_size,
        "n_frames": n_frames,
        "fit_residual_um": fit_res,
        "track_flags": flags,
    })
    prim = prim.sort_values(["emergence_time_h", "r_um", "track_id"], ascending=[True, False, True],
                            kind="stable").reset_index(drop=True)
    prim.insert(0, "birth_rank", np.arange(1, len(prim) + 1, dtype=np.int64))
    tau_s = prim["emergence_time_h"].to_numpy(float)
    gaps = np.diff(tau_s)
    if co_initiation_h is None:
        tol = CO_INITIATION_FRACTION * float(np.median(gaps)) if gaps.size else 0.0
        info["co_initiation_rule"] = ("emergences closer than their uncertainty or than a quarter of the "
                                      "median interval")
    else:
        tol = float(co_initiation_h)
        info["co_initiation_rule"] = "emergences closer than their uncertainty or than co_initiation_h"
    info["co_initiation_h"] = tol
    s_own = np.nan_to_num(prim["_sd_own"].to_numpy(float), nan=0.0)
    pair_sd = np.sqrt(s_own[:-1] ** 2 + s_own[1:] ** 2)
    close = (gaps < tol) | (gaps < pair_sd)
    co = np.zeros(len(prim), bool)
    co[:-1] |= close
    co[1:] |= close
    partners = [[] for _ in range(len(prim))]
    ranks = prim["birth_rank"].to_numpy()
    for i in np.flatnonzero(close):
        partners[i].append(str(ranks[i + 1]))
        partners[i + 1].append(str(ranks[i]))
    prim["co_initiated"] = co
    prim["co_initiated_with"] = [";".join(p) for p in partners]
    # confidence: the primordium emerged after the previous and before the next one
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(pair_sd > 0, gaps / pair_sd, np.inf)
    p_pair = np.where(np.isfinite(z), _normal_cdf(z), 1.0) if gaps.size else np.array([])
    conf = np.ones(len(prim))
    conf[:-1] *= p_pair
    conf[1:] *= p_pair
    if not np.isfinite(s_own).any() or not (s_own > 0).any():
        conf[:] = np.nan
    prim["rank_confidence"] = conf
    info["n_co_initiated"] = int(co.sum())
    return prim[PRIMORDIA_COLUMNS], info


def _size_clock(tr: pd.DataFrame, ids, first: pd.DataFrame, new_ids, dt_before, time_of) -> np.ndarray:
    """Emergence times from primordium size: ln radius(t) per track with a common rate,
    extrapolated back to the typical size of the primordia seen appearing (NaN when the
    sizes do not grow or no primordium is seen appearing)."""
    out = np.full(len(ids), np.nan)
    if "radius_um" not in tr or len(new_ids) == 0:
        return out
    sub = tr[tr["radius_um"] > 0]
    rate, _, _, n = _pooled_log_fit(sub, "radius_um", None, 3)
    if not (math.isfinite(rate) and rate > 0):
        return out
    key = sub["track_id"].to_numpy()
    ybar = pd.Series(np.log(sub["radius_um"].to_numpy(float))).groupby(key).mean().reindex(ids).to_numpy()
    tbar = pd.Series(sub["time_h"].to_numpy(float)).groupby(key).mean().reindex(ids).to_numpy()
    is_new = np.isin(ids, new_ids)
    t_first = first["time_h"].to_numpy(float)
    ln_ref = np.nanmedian(ybar[is_new] + rate * (t_first[is_new] - 0.5 * dt_before[is_new] - tbar[is_new]))
    return tbar - (ybar - ln_ref) / rate
