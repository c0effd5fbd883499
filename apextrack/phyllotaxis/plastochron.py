"""Plastochron, plastochron ratio and phyllotaxis index.

Two independent plastochron estimators:

(a) from emergence times: the intervals between successive births (mean, median, bootstrap
    intervals);
(b) from radial growth (Richards 1951, Phil. Trans. R. Soc. B 235): primordia drift outward as
    r(t) = r0·exp(k t); k is fitted from ln r against time over every track (one common slope,
    one intercept per track); the plastochron ratio R = r_n / r_(n+1) is measured between
    successive primordia in one frame; then the plastochron is T = ln R / k.

Richards' phyllotaxis index is P.I. = 0.379 − 2.3925·log10(log10 R), where
2.3925 = 1 / (2 log10 φ).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import circular as circ

__all__ = ["phyllotaxis_index", "emergence_plastochron", "radial_growth_rate", "plastochron_ratio",
           "choose_frame", "growth_plastochron"]

from ..constants import PHI
#: 1 / (2 log10 φ) = 2.39249... (Richards 1951)
PI_SLOPE = 1.0 / (2.0 * math.log10(PHI))


def phyllotaxis_index(ratio: float) -> float | None:
    """Richards' (1951) phyllotaxis index P.I. = 0.379 − 2.3925·log10(log10 R).

    Returns None when ``R <= 1`` (the index is defined for R > 1 only).

    Examples
    --------
    >>> round(phyllotaxis_index(1.20451), 2)
    2.99
    """
    if ratio is None or not np.isfinite(ratio) or ratio <= 1.0:
        return None
    return float(0.379 - 2.3925 * math.log10(math.log10(ratio)))


def _none(x):
    return None if x is None or not np.isfinite(x) else float(x)


def emergence_plastochron(times_h, n_boot: int = 2000, confidence: float = 0.95,
                          rng=0) -> tuple[dict, list[str]]:
    """Plastochron from successive emergence times (in birth order).

    Returns ``plastochron_h`` (mean interval), ``plastochron_median_h``, ``plastochron_ci_h``
    (bootstrap of the mean) and ``plastochron_median_ci_h``, with notes for what is missing.
    """
    t = np.asarray(times_h, dtype=float)
    t = t[np.isfinite(t)]
    iv = np.diff(t)
    notes: list[str] = []
    out = {"n_intervals": int(iv.size), "plastochron_h": None, "plastochron_median_h": None,
           "plastochron_sd_h": None, "plastochron_ci_h": None, "plastochron_median_ci_h": None}
    if iv.size == 0:
        notes.append(f"plastochron needs at least 2 primordia with emergence times; {t.size} available")
        return out, notes
    out["plastochron_h"] = float(iv.mean())
    out["plastochron_median_h"] = float(np.median(iv))
    if iv.size >= 2:
        out["plastochron_sd_h"] = float(iv.std(ddof=1))
        if n_boot > 0:
            rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
            lo, hi = circ.bootstrap_ci(iv, np.mean, n_boot, confidence, rng)
            out["plastochron_ci_h"] = [lo, hi]
            lo, hi = circ.bootstrap_ci(iv, np.median, n_boot, confidence, rng)
            out["plastochron_median_ci_h"] = [lo, hi]
    else:
        notes.append("plastochron CI needs at least 2 intervals (3 primordia); 1 available")
    if np.any(iv < 0):
        notes.append("some emergence times decrease with birth rank; intervals may be negative")
    return out, notes


def _track_sums(tracks: pd.DataFrame, track_ids=None, min_frames: int = 3) -> pd.DataFrame:
    """Per track: n, Sxx and Sxy of ln r against time (centred within the track)."""
    need = {"track_id", "time_h", "r_um"}
    if tracks is None or len(tracks) == 0 or not need <= set(tracks.columns):
        return pd.DataFrame(columns=["track_id", "n", "sxx", "sxy", "k_per_h"])
    t = tracks[list(need)].dropna()
    t = t[t["r_um"] > 0]
    if track_ids is not None:
        t = t[t["track_id"].isin(list(track_ids))]
    rows = []
    for tid, g in t.groupby("track_id", sort=True):
        if len(g) < min_frames:
            continue
        x = g["time_h"].to_numpy(float)
        y = np.log(g["r_um"].to_numpy(float))
        xc = x - x.mean()
        sxx = float(np.sum(xc * xc))
        if sxx <= 0:
            continue
        sxy = float(np.sum(xc * (y - y.mean())))
        rows.append({"track_id": tid, "n": len(g), "sxx": sxx, "sxy": sxy, "k_per_h": sxy / sxx})
    return pd.DataFrame(rows, columns=["track_id", "n", "sxx", "sxy", "k_per_h"])


def radial_growth_rate(tracks: pd.DataFrame, track_ids=None, min_frames: int = 3) -> tuple[float | None, pd.DataFrame]:
    """Relative radial growth rate k (1/h) of primordia: common slope of ln r_um on time_h.

    Each track keeps its own intercept (a fixed-effects fit); tracks with fewer than
    ``min_frames`` detections are left out. Returns ``(k, per_track_table)``; k is None when no
    track qualifies.
    """
    s = _track_sums(tracks, track_ids, min_frames)
    if len(s) == 0:
        return None, s
    return float(s["sxy"].sum() / s["sxx"].sum()), s


def choose_frame(primordia: pd.DataFrame, tracks: pd.DataFrame, frame: int | None = None) -> int | None:
    """The analysis frame: ``frame`` if given, else the frame in which the most primordia are
    tracked (ties: the latest). None when no primordium is tracked."""
    if tracks is None or len(tracks) == 0 or "frame" not in tracks or primordia is None or len(primordia) == 0 \
            or "track_id" not in primordia:
        return None
    t = tracks[tracks["track_id"].isin(primordia["track_id"])]
    if len(t) == 0:
        return None
    counts = t.groupby("frame")["track_id"].nunique()
    if frame is not None:
        return int(frame) if frame in counts.index else None
    best = counts.max()
    return int(max(counts.index[counts == best]))


def positions_in_frame(primordia: pd.DataFrame, tracks: pd.DataFrame, frame: int) -> pd.DataFrame:
    """Position (r_um, theta_deg) of every primordium tracked in ``frame``, with its birth rank."""
    t = tracks[tracks["frame"] == frame][["track_id", "r_um", "theta_deg"]]
    t = t.drop_duplicates("track_id")
    m = primordia[["birth_rank", "track_id"]].merge(t, on="track_id", how="inner")
    return m.sort_values("birth_rank", kind="stable").reset_index(drop=True)


def plastochron_ratio(pos: pd.DataFrame, n_boot: int = 2000, confidence: float = 0.95,
                      rng=0) -> tuple[dict, list[str]]:
    """Plastochron ratio R = r_n / r_(n+1) between successive primordia seen in one frame.

    ``pos`` holds ``birth_rank`` and ``r_um`` of the primordia in that frame. R is the geometric
    mean over successive pairs (ranks differing by one); its interval is a bootstrap over pairs.
    """
    notes: list[str] = []
    out = {"plastochron_ratio": None, "plastochron_ratio_ci": None, "n_ratio_pairs": 0}
    if pos is None or len(pos) < 2:
        notes.append(f"plastochron ratio needs 2 successive primordia in one frame; {0 if pos is None else len(pos)} visible")
        return out, notes
    p = pos.sort_values("birth_rank", kind="stable")
    rank = p["birth_rank"].to_numpy(int)
    r = p["r_um"].to_numpy(float)
    ok = (np.diff(rank) == 1) & (r[:-1] > 0) & (r[1:] > 0)
    lr = np.log(r[:-1][ok] / r[1:][ok])
    out["n_ratio_pairs"] = int(lr.size)
    if lr.size == 0:
        notes.append("plastochron ratio needs 2 primordia of successive ranks in one frame; none found")
        return out, notes
    out["plastochron_ratio"] = float(math.exp(lr.mean()))
    if lr.size >= 2 and n_boot > 0:
        lo, hi = circ.bootstrap_ci(lr, np.mean, n_boot, confidence, rng)
        out["plastochron_ratio_ci"] = [math.exp(lo), math.exp(hi)]
    elif lr.size < 2:
        notes.append("plastochron ratio CI needs at least 2 successive pairs in the frame; 1 available")
    return out, notes


def growth_plastochron(pos: pd.DataFrame, tracks: pd.DataFrame, track_ids=None, n_boot: int = 2000,
                       confidence: float = 0.95, rng=0) -> tuple[dict, list[str]]:
    """Richards' plastochron T = ln R / k, the ratio R, P.I., and their intervals.

    Returns the summary entries: ``plastochron_ratio``, ``plastochron_ratio_ci``,
    ``radial_growth_rate_per_h`` (k), ``plastochron_growth_h``, ``plastochron_growth_ci_h``,
    ``relative_plastochron_rate`` (ln R, the relative radial growth per plastochron),
    ``phyllotaxis_index``.
    """
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    out, notes = plastochron_ratio(pos, n_boot, confidence, rng)
    k, per_track = radial_growth_rate(tracks, track_ids)
    out.update({"radial_growth_rate_per_h": k, "n_growth_tracks": int(len(per_track)),
                "plastochron_growth_h": None, "plastochron_growth_ci_h": None,
                "relative_plastochron_rate": None, "phyllotaxis_index": None})
    R = out["plastochron_ratio"]
    if R is not None:
        out["relative_plastochron_rate"] = float(math.log(R))
        out["phyllotaxis_index"] = phyllotaxis_index(R)
        if out["phyllotaxis_index"] is None:
            notes.append(f"phyllotaxis index needs a plastochron ratio above 1; R = {R:.4g}")
    if k is None:
        notes.append("radial growth rate needs tracks with at least 3 detections and radii; none available")
    elif k <= 0:
        notes.append(f"growth plastochron needs primordia that drift outward; fitted k = {k:.4g} /h")
    if R is not None and k is not None and k > 0:
        out["plastochron_growth_h"] = float(math.log(R) / k)
        p = pos.sort_values("birth_rank", kind="stable")
        rank = p["birth_rank"].to_numpy(int)
        r = p["r_um"].to_numpy(float)
        ok = (np.diff(rank) == 1) & (r[:-1] > 0) & (r[1:] > 0)
        lr = np.log(r[:-1][ok] / r[1:][ok])
        if lr.size >= 2 and len(per_track) >= 2 and n_boot > 0:
            sxx, sxy = per_track["sxx"].to_numpy(float), per_track["sxy"].to_numpy(float)
            i1 = rng.integers(0, lr.size, size=(n_boot, lr.size))
            i2 = rng.integers(0, sxx.size, size=(n_boot, sxx.size))
            kb = sxy[i2].sum(axis=1) / sxx[i2].sum(axis=1)
            tb = lr[i1].mean(axis=1) / np.where(kb > 0, kb, np.nan)
            tb = tb[np.isfinite(tb)]
            if tb.size:
                a = (1 - confidence) / 2
                lo, hi = np.quantile(tb, [a, 1 - a])
                out["plastochron_growth_ci_h"] = [float(lo), float(hi)]
        else:
            notes.append("growth plastochron CI needs at least 2 ratio pairs and 2 growth tracks")
    return out, notes
