"""Divergence angles between successive primordia, the chirality of the generative spiral and
the circular statistics of the angles.

The azimuth difference of primordia n and n+1 is taken in a frame where both are tracked (the
first such frame, i.e. as soon as the younger one is seen, which keeps apex growth and rotation
out of the angle); when they never share a frame the azimuths at emergence are used. The signed
difference in [-180, 180) (positive = counter-clockwise on the displayed image) decides the
chirality: the spiral turns the way most angles turn. Angles are then reported in that direction
in [0, 360).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import circular as circ

__all__ = ["successive_azimuths", "decide_chirality", "divergence_table", "divergence_statistics"]


def _sorted_primordia(primordia: pd.DataFrame) -> pd.DataFrame:
    if primordia is None or len(primordia) == 0:
        return pd.DataFrame(columns=["birth_rank", "track_id", "emergence_time_h", "theta_deg"])
    p = primordia.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    return p


def _same_node(coinit: np.ndarray, intervals: np.ndarray, co_initiation_h: float | None) -> np.ndarray:
    """Per successive pair: both organs flagged co-initiated and born within the co-initiation
    window (``co_initiation_h``, else a quarter of the typical interval between nodes)."""
    both = coinit[:-1] & coinit[1:]
    if not both.any():
        return both
    gaps = np.abs(intervals)
    if co_initiation_h is None:
        finite = gaps[np.isfinite(gaps)]
        big = finite[finite > 0.1 * finite.max()] if finite.size and finite.max() > 0 else finite
        tol = 0.25 * float(np.median(big)) if big.size else 0.0
    else:
        tol = float(co_initiation_h)
    return both & (~np.isfinite(gaps) | (gaps <= tol))


def successive_azimuths(primordia: pd.DataFrame, tracks: pd.DataFrame | None = None,
                        co_initiation_h: float | None = None) -> pd.DataFrame:
    """Azimuths of each successive pair of primordia, in a common frame where possible.

    Parameters
    ----------
    primordia : DataFrame
        One row per primordium with ``birth_rank``, ``theta_deg`` and optionally ``track_id``,
        ``emergence_time_h``, ``co_initiated``.
    tracks : DataFrame, optional
        One row per detection with ``track_id``, ``frame`` and ``theta_deg``.

    Returns
    -------
    DataFrame
        One row per pair: ``from_rank``, ``to_rank``, ``from_theta_deg``, ``to_theta_deg``,
        ``frame`` (common frame, -1 when none), ``angle_source`` ("common_frame" or
        "emergence"), ``signed_angle_deg`` in [-180, 180), ``interval_h``, ``co_initiated``
        (the two organs were initiated together: both flagged and born within
        ``co_initiation_h``, by default a quarter of the typical interval between nodes).
    """
    p = _sorted_primordia(primordia)
    cols = ["from_rank", "to_rank", "from_theta_deg", "to_theta_deg", "frame", "angle_source",
            "signed_angle_deg", "interval_h", "co_initiated"]
    if len(p) < 2:
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(
            cols, ["int64", "int64", "float64", "float64", "int64", "object", "float64", "float64", "bool"])})
    by_track: dict = {}
    if tracks is not None and len(tracks) and {"track_id", "frame", "theta_deg"} <= set(tracks.columns) \
            and "track_id" in p.columns:
        t = tracks[["track_id", "frame", "theta_deg"]].dropna()
        t = t.sort_values(["track_id", "frame"], kind="stable").drop_duplicates(["track_id", "frame"])
        for tid, g in t.groupby("track_id", sort=False):
            by_track[tid] = pd.Series(g["theta_deg"].to_numpy(float), index=g["frame"].to_numpy())
    times = p["emergence_time_h"].to_numpy(float) if "emergence_time_h" in p else np.full(len(p), np.nan)
    coinit = p["co_initiated"].fillna(False).astype(bool).to_numpy() if "co_initiated" in p else np.zeros(len(p), bool)
    rows = []
    for i in range(len(p) - 1):
        a, b = p.iloc[i], p.iloc[i + 1]
        th_a, th_b = float(a["theta_deg"]), float(b["theta_deg"])
        frame, source = -1, "emergence"
        if by_track and "track_id" in p.columns:
            sa, sb = by_track.get(a["track_id"]), by_track.get(b["track_id"])
            if sa is not None and sb is not None:
                common = np.intersect1d(sa.index.to_numpy(), sb.index.to_numpy())
                if common.size:
                    frame = int(common[0])
                    th_a, th_b = float(sa.loc[frame]), float(sb.loc[frame])
                    source = "common_frame"
        rows.append({
            "from_rank": int(a["birth_rank"]), "to_rank": int(b["birth_rank"]),
            "from_theta_deg": th_a, "to_theta_deg": th_b, "frame": frame, "angle_source": source,
            "signed_angle_deg": float(circ.circ_diff(th_b, th_a)),
            "interval_h": float(times[i + 1] - times[i]),
        })
    out = pd.DataFrame(rows, columns=cols[:-1])
    out["co_initiated"] = _same_node(coinit, out["interval_h"].to_numpy(float), co_initiation_h)
    return out


def decide_chirality(signed_angles, ambiguous_deg: float = 5.0) -> dict:
    """Direction of the generative spiral from signed divergence angles.

    Angles within ``ambiguous_deg`` of 0° or 180° carry no direction and are left out. The spiral
    is counter-clockwise ("ccw") when more of the remaining angles are positive; a tie is broken
    by the sum of their sines; with no informative angle the direction is undetermined and
    "ccw" is returned with ``determined = False``.

    Returns
    -------
    dict
        ``chirality`` ("ccw"/"cw"), ``support`` (share of informative angles that agree, or None),
        ``n_informative``, ``determined`` (bool), ``note`` (str or None).
    """
    s = np.asarray(signed_angles, dtype=float)
    s = s[np.isfinite(s)]
    mag = np.abs(s)
    info = s[(mag > ambiguous_deg) & (mag < 180.0 - ambiguous_deg)]
    if info.size == 0:
        note = ("chirality undetermined: no divergence angle available" if s.size == 0 else
                "chirality undetermined: every angle is within "
                f"{ambiguous_deg:g}° of 0° or 180°; angles reported counter-clockwise")
        return {"chirality": "ccw", "support": None, "n_informative": 0, "determined": False, "note": note}
    pos, neg = int(np.sum(info > 0)), int(np.sum(info < 0))
    if pos != neg:
        ccw = pos > neg
    else:
        ssum = float(np.sum(np.sin(np.deg2rad(info))))
        ccw = ssum >= 0
    support = max(pos, neg) / info.size
    note = None
    if pos == neg:
        note = "chirality tied between the two directions; decided by the sum of sines"
    return {"chirality": "ccw" if ccw else "cw", "support": float(support),
            "n_informative": int(info.size), "determined": pos != neg, "note": note}


def divergence_table(pairs: pd.DataFrame, chirality: str) -> pd.DataFrame:
    """Add ``angle_deg`` (in the generative direction, [0, 360)) to the pairs table."""
    d = pairs.copy()
    sign = 1.0 if chirality == "ccw" else -1.0
    d["angle_deg"] = circ.wrap360(sign * d["signed_angle_deg"].to_numpy(float)) if len(d) else \
        pd.Series(dtype="float64")
    return d


def divergence_statistics(angles, n_boot: int = 2000, confidence: float = 0.95, rng=0) -> tuple[dict, list[str]]:
    """Circular mean, SD, resultant length, bootstrap CI and Rayleigh test of divergence angles.

    Returns the summary entries and the notes explaining every value that could not be
    estimated.
    """
    a = np.asarray(angles, dtype=float)
    a = a[np.isfinite(a)]
    notes: list[str] = []
    out = {"n_angles": int(a.size), "divergence_mean_deg": None, "divergence_sd_deg": None,
           "divergence_ci_deg": None, "resultant_length": None, "rayleigh_z": None, "rayleigh_p": None}
    if a.size == 0:
        notes.append("divergence statistics need at least 1 angle (2 primordia); 0 available")
        return out, notes
    m = circ.circ_mean(a)
    out["divergence_mean_deg"] = None if math.isnan(m) else float(m)
    out["resultant_length"] = float(circ.resultant_length(a))
    if a.size >= 2:
        sd = circ.circ_sd(a)
        out["divergence_sd_deg"] = float(sd) if math.isfinite(sd) else None
        z, p = circ.rayleigh_test(a)
        out["rayleigh_z"], out["rayleigh_p"] = z, p
    else:
        notes.append("divergence SD and Rayleigh test need at least 2 angles; 1 available")
    if a.size >= 3 and n_boot > 0:
        lo, hi = circ.bootstrap_circ_mean_ci(a, n_boot, confidence, rng)
        if not math.isnan(lo):
            out["divergence_ci_deg"] = [float(lo), float(hi)]
    elif a.size < 3:
        notes.append(f"divergence CI needs at least 3 angles; {a.size} available")
    else:
        notes.append("divergence CI not computed: bootstrap_n is 0")
    return out, notes
