"""Linking detections into tracks (one track per primordium) with trackpy.

Primordia do not wander: after birth on the rim of the apex they drift outward from the apex
centre at a fixed azimuth as r(t) = R·exp(γ(t − τ)) (Richards 1951; Douady & Couder 1992),
while the specimen as a whole may drift and rotate under the objective. In image coordinates
(complex notation z = x + i·y) every primordium then follows

    z_k(t) = c(t) + exp(λ·(t − t_ref))·a_k,      λ = γ + i·ω,     c(t) = c0 + d·(t − t_ref),

a spiral similarity about a linearly drifting centre c(t): γ is the relative radial growth
rate, ω the rotation rate of the specimen and a_k the primordium's offset from the centre at
``t_ref``. :func:`fit_motion` fits this model to a first set of tracks; :func:`link_tracks`
links in two passes (plain nearest-neighbour linking → motion fit → linking again with a
trackpy predictor that moves every primordium along the model, ``z(t + Δt) = c(t + Δt) +
exp(λΔt)·(z(t) − c(t))``), falls back to nearest-neighbour linking when the motion cannot be
fitted, splits off tracks that jump, and adds per-track quality columns.

With a linear drift the centre is only weakly fixed by the outward motion alone (a shift of
the centre is almost the same as a change of drift); newly born primordia, which appear on a
circle of radius R about the centre, pin it down. The fit therefore adds that rim constraint
whenever three or more new primordia are seen.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .apex import azimuth_deg

#: Per-track quality columns added to the tracks table by :func:`track_quality`.
QUALITY_COLUMNS = ["track_n_frames", "track_gaps", "track_mean_snr", "track_motion_residual_um",
                   "track_flags"]


# ----------------------------------------------------------------------------- motion model


@dataclass
class MotionModel:
    """Spiral-similarity motion of the primordia about a linearly drifting apex centre.

    Attributes
    ----------
    gamma_per_h : float
        Relative radial growth rate γ (1/h).
    omega_rad_per_h : float
        Rotation rate ω of the specimen in image coordinates (rad/h; positive turns x towards
        +y, i.e. clockwise on the displayed image).
    centre0 : complex
        Apex centre ``x + i·y`` (µm) at ``t_ref_h``.
    drift : complex
        Drift of the centre (µm/h).
    t_ref_h : float
    rim_radius_um : float
        Radius of the circle on which new primordia appear (NaN when not fitted).
    rms_um : float
        Root-mean-square position residual of the fit.
    centre_sd_um : float
        Standard error of the centre (per axis) from the fit.
    n_tracks, n_new : int
        Tracks used and new primordia in the rim constraint.
    """

    gamma_per_h: float
    omega_rad_per_h: float
    centre0: complex
    drift: complex
    t_ref_h: float
    rim_radius_um: float = math.nan
    rms_um: float = math.nan
    centre_sd_um: float = math.nan
    n_tracks: int = 0
    n_new: int = 0
    offsets: dict = field(default_factory=dict, repr=False)

    def centre(self, t_h) -> np.ndarray:
        """Complex centre ``x + i·y`` at time(s) ``t_h``."""
        return self.centre0 + self.drift * (np.asarray(t_h, float) - self.t_ref_h)

    def predict(self, x, y, t_from_h, t_to_h) -> tuple[np.ndarray, np.ndarray]:
        """Where primordia at ``(x, y)`` at ``t_from_h`` are at ``t_to_h``."""
        z = np.asarray(x, float) + 1j * np.asarray(y, float)
        lam = self.gamma_per_h + 1j * self.omega_rad_per_h
        dt = np.asarray(t_to_h, float) - np.asarray(t_from_h, float)
        zn = self.centre(t_to_h) + np.exp(lam * dt) * (z - self.centre(t_from_h))
        return zn.real, zn.imag

    def centres_table(self, frames, times_h) -> pd.DataFrame:
        """Centre per frame: ``frame``, ``time_h``, ``x_um``, ``y_um``, ``centre_sd_um``."""
        c = self.centre(np.asarray(times_h, float))
        return pd.DataFrame({"frame": np.asarray(frames, np.int64), "time_h": np.asarray(times_h, float),
                             "x_um": c.real, "y_um": c.imag,
                             "centre_sd_um": np.full(len(c), self.centre_sd_um)})

    def to_dict(self) -> dict:
        """Plain summary (JSON-able)."""
        return {"growth_rate_per_h": self.gamma_per_h, "rotation_deg_per_h": math.degrees(-self.omega_rad_per_h),
                "centre_x_um": self.centre0.real, "centre_y_um": self.centre0.imag,
                "drift_x_um_per_h": self.drift.real, "drift_y_um_per_h": self.drift.imag,
                "t_ref_h": self.t_ref_h, "rim_radius_um": self.rim_radius_um, "rms_um": self.rms_um,
                "centre_sd_um": self.centre_sd_um, "n_tracks": self.n_tracks, "n_new": self.n_new}


def _profiled_fit(t, z, tid, n, t_ref, gamma, omega):
    """Linear least squares of z = c0 + d·(t − t_ref) + exp(λ(t − t_ref))·a_k for fixed λ."""
    e = np.exp((gamma + 1j * omega) * (t - t_ref))
    a = np.zeros((len(t), 2 + n), complex)
    a[:, 0] = 1.0
    a[:, 1] = t - t_ref
    a[np.arange(len(t)), 2 + tid] = e
    coef, *_ = np.linalg.lstsq(a, z, rcond=None)
    res = z - a @ coef
    return coef, float(np.sum(np.abs(res) ** 2))


def fit_motion(tracks: pd.DataFrame, min_frames: int = 3, max_rate_per_h: float = 1.0,
               rim: bool = True) -> MotionModel | None:
    """Fit the spiral-similarity motion of the primordia (growth, rotation, drift, centre).

    Parameters
    ----------
    tracks : DataFrame
        ``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um``.
    min_frames : int
        Tracks with fewer detections do not enter the motion fit.
    max_rate_per_h : float
        Largest |γ| and |ω| considered.
    rim : bool
        Add the constraint that new primordia (first seen after the first frame, innermost in
        their frame) appear on a circle about the centre.

    Returns
    -------
    MotionModel or None
        None when fewer than 3 tracks have ``min_frames`` detections or the fit has no
        outward growth.

    Examples
    --------
    >>> t = np.repeat(np.arange(5) * 2.0, 3)
    >>> k = np.tile(np.arange(3), 5)
    >>> a = 20 * np.exp(2j * np.pi * k / 3)
    >>> z = 50 + 50j + np.exp(0.05 * t) * a
    >>> df = pd.DataFrame({"track_id": k, "frame": (t / 2).astype(int), "time_h": t,
    ...                    "x_um": z.real, "y_um": z.imag})
    >>> m = fit_motion(df, rim=False)
    >>> round(m.gamma_per_h, 4), round(m.centre0.real, 2), round(m.centre0.imag, 2)
    (0.05, 50.0, 50.0)
    """
    from scipy.optimize import least_squares, minimize

    if tracks.empty:
        return None
    groups = [g for _, g in tracks.groupby("track_id", sort=True) if g["time_h"].nunique() >= min_frames]
    if len(groups) < 3:
        return None
    times = np.sort(tracks["time_h"].unique())
    dt = float(np.median(np.diff(times))) if len(times) > 1 else 1.0
    span = max(float(times[-1] - times[0]), dt)

    def prepare(gs):
        tid = np.concatenate([np.full(len(g), i) for i, g in enumerate(gs)])
        t = np.concatenate([g["time_h"].to_numpy(float) for g in gs])
        z = np.concatenate([g["x_um"].to_numpy(float) + 1j * g["y_um"].to_numpy(float) for g in gs])
        return tid, t, z, float(np.mean(t))

    def fit_lambda(tid, t, z, t_ref, n):
        def sse(p):
            if abs(p[0]) > max_rate_per_h or abs(p[1]) > max_rate_per_h:
                return 1e300
            return _profiled_fit(t, z, tid, n, t_ref, p[0], p[1])[1]

        best = None
        for growth_per_frame in (1.01, 1.04, 1.10):
            r = minimize(sse, x0=[math.log(growth_per_frame) / dt, 0.0], method="Nelder-Mead",
                         options={"xatol": 1e-8 / span, "fatol": 1e-12, "maxiter": 2000})
            if best is None or r.fun < best.fun:
                best = r
        return float(best.x[0]), float(best.x[1])

    # a robust start: detections far off the model (a wrong link, a blob cut by the image
    # border) are left out and the fit is repeated
    tid_all, t_all, z_all, _ = prepare(groups)
    ids_all = np.array([g["track_id"].iloc[0] for g in groups])
    keep = np.ones(len(t_all), bool)
    for _ in range(4):
        codes, uniq = pd.factorize(tid_all[keep], sort=True)
        tid, t, z = codes, t_all[keep], z_all[keep]
        n, t_ref = len(uniq), float(np.mean(t_all[keep]))
        gamma, omega = fit_lambda(tid, t, z, t_ref, n)
        coef, s = _profiled_fit(t, z, tid, n, t_ref, gamma, omega)
        # residuals of every detection (also the ones left out) from the fitted model
        pos = np.searchsorted(uniq, tid_all)
        known = (pos < n) & (uniq[np.minimum(pos, n - 1)] == tid_all)
        zm = coef[0] + coef[1] * (t_all - t_ref) + np.exp((gamma + 1j * omega) * (t_all - t_ref)) \
            * np.where(known, coef[2 + np.minimum(pos, n - 1)], np.nan)
        res = np.abs(z_all - zm)
        limit = max(4.0 * float(np.nanmedian(res[keep])), 0.5)
        new_keep = np.nan_to_num(res, nan=np.inf) <= limit
        counts = np.bincount(tid_all[new_keep], minlength=len(groups))
        new_keep &= counts[tid_all] >= min(min_frames, 3)
        if np.array_equal(new_keep, keep) or len(np.unique(tid_all[new_keep])) < 3:
            break
        keep = new_keep
    groups = [groups[i] for i in uniq]
    ids_all = ids_all[uniq]
    ids = list(ids_all)
    if not gamma > 0:
        return None
    rms = math.sqrt(s / max(len(t) - 2 - n - 2, 1) / 2)
    model = MotionModel(gamma, omega, complex(coef[0]), complex(coef[1]), t_ref, rms_um=rms, n_tracks=n,
                        offsets={k: complex(a) for k, a in zip(ids, coef[2:])})
    cov_c = _centre_sd_profiled(t, tid, n, t_ref, gamma, omega, rms)
    model.centre_sd_um = cov_c
    if not rim:
        return model

    # rim constraint: the innermost primordia that appear after the first frame
    first = tracks.sort_values(["track_id", "frame"], kind="stable").drop_duplicates("track_id")
    f0 = int(tracks["frame"].min())
    sigma_m = max(rms, 0.05)
    inside = _inside_hull_of_frame(tracks, first)
    for it in range(4):
        cen = model.centre(tracks["time_h"].to_numpy(float))
        r_all = np.abs(tracks["x_um"].to_numpy(float) + 1j * tracks["y_um"].to_numpy(float) - cen)
        r_min = pd.Series(r_all, index=tracks.index).groupby(tracks["frame"]).min()
        rf = np.abs(first["x_um"].to_numpy(float) + 1j * first["y_um"].to_numpy(float)
                    - model.centre(first["time_h"].to_numpy(float)))
        near_rim = rf <= r_min.reindex(first["frame"]).to_numpy() * math.exp(model.gamma_per_h * dt * 1.5)
        # first round: the centre may still be far off, so a birth is recognised as a track
        # starting after the first frame inside the other primordia of its frame (tracks
        # entering the field of view start on the outside)
        new = (first["frame"].to_numpy() > f0) & (inside if it == 0 else near_rim)
        if new.sum() < 3:
            return model
        zn = first["x_um"].to_numpy(float)[new] + 1j * first["y_um"].to_numpy(float)[new]
        tn = first["time_h"].to_numpy(float)[new]
        # the first sighting falls anywhere in the interval after emergence: r spreads by exp(γΔt)
        sigma_r = max(float(np.median(rf[new])) * gamma * dt / math.sqrt(12.0), sigma_m)
        a0 = np.array([model.offsets[k] for k in ids])
        p0 = np.concatenate([[model.gamma_per_h, model.omega_rad_per_h, model.centre0.real, model.centre0.imag,
                              model.drift.real, model.drift.imag, float(np.median(rf[new]))],
                             np.column_stack([a0.real, a0.imag]).ravel()])

        def resid(p):
            c0 = p[2] + 1j * p[3]
            d = p[4] + 1j * p[5]
            a = p[7::2] + 1j * p[8::2]
            zm = c0 + d * (t - t_ref) + np.exp((p[0] + 1j * p[1]) * (t - t_ref)) * a[tid]
            rm = (z - zm) / sigma_m
            rr = (np.abs(zn - c0 - d * (tn - t_ref)) - p[6]) / sigma_r
            return np.concatenate([rm.real, rm.imag, rr])

        sol = least_squares(resid, p0, loss="soft_l1", f_scale=3.0, x_scale="jac")
        p = sol.x
        if not p[0] > 0:
            return model
        dof = max(len(sol.fun) - len(p), 1)
        scale = float(np.sum(sol.fun ** 2) / dof)
        try:
            cov = np.linalg.pinv(sol.jac.T @ sol.jac) * scale
            csd = float(np.sqrt(max((cov[2, 2] + cov[3, 3]) / 2.0, 0.0)))
        except np.linalg.LinAlgError:
            csd = math.nan
        res_m = sol.fun[: 2 * len(t)] * sigma_m
        model = MotionModel(float(p[0]), float(p[1]), complex(p[2], p[3]), complex(p[4], p[5]), t_ref,
                            rim_radius_um=float(p[6]),
                            rms_um=float(np.sqrt(np.sum(res_m ** 2) / max(len(t), 1) / 2)),
                            centre_sd_um=csd, n_tracks=n, n_new=int(new.sum()),
                            offsets={k: complex(p[7 + 2 * i], p[8 + 2 * i]) for i, k in enumerate(ids)})
    return model


def _inside_hull_of_frame(tracks: pd.DataFrame, first: pd.DataFrame) -> np.ndarray:
    """For the first detection of each track: does it lie inside the convex hull of the
    other detections of its frame?"""
    from scipy.spatial import Delaunay, QhullError

    out = np.zeros(len(first), bool)
    by_frame = {f: g for f, g in tracks.groupby("frame")}
    for i, (idx, row) in enumerate(first.iterrows()):
        others = by_frame[row["frame"]]
        others = others[others.index != idx][["x_um", "y_um"]].to_numpy(float)
        if len(others) < 3:
            continue
        try:
            out[i] = Delaunay(others).find_simplex([[row["x_um"], row["y_um"]]])[0] >= 0
        except QhullError:
            out[i] = False
    return out


def _centre_sd_profiled(t, tid, n, t_ref, gamma, omega, rms) -> float:
    """Standard error of c0 (per axis) of the linear fit at fixed λ."""
    e = np.exp((gamma + 1j * omega) * (t - t_ref))
    a = np.zeros((len(t), 2 + n), complex)
    a[:, 0] = 1.0
    a[:, 1] = t - t_ref
    a[np.arange(len(t)), 2 + tid] = e
    try:
        cov = np.linalg.pinv(a.conj().T @ a)
    except np.linalg.LinAlgError:
        return math.nan
    return float(rms * np.sqrt(abs(cov[0, 0])))


# ----------------------------------------------------------------------------- linking


def _quiet_trackpy():
    import trackpy

    trackpy.quiet(suppress=True)
    logging.getLogger("trackpy").setLevel(logging.WARNING)
    return trackpy


def _motion_predictor(model: MotionModel, frame_time: dict):
    """A trackpy predictor (``f(t1, particles) -> positions``) moving each particle along the
    motion model from the frame it was last seen to frame ``t1``; positions are ``(y, x)``."""

    def predict(t1, particles):
        out = []
        t_to = frame_time[int(t1)]
        for p in particles:
            y, x = float(p.pos[0]), float(p.pos[1])
            xn, yn = model.predict(x, y, frame_time[int(p.t)], t_to)
            out.append(np.array([float(yn), float(xn)]))
        return out

    return predict


def link_detections(detections: pd.DataFrame, search_range_um: float, memory: int = 2,
                    motion: MotionModel | None = None) -> pd.DataFrame:
    """Link detections frame to frame; returns the detections with an integer ``track_id``.

    Uses :func:`trackpy.link` on the µm positions, so a primordium may move at most
    ``search_range_um`` (from where it is predicted to be) between frames and be missed in up
    to ``memory`` frames. With a ``motion`` model each primordium is predicted to move along
    it (growth outward from the centre, rotation, drift); without, it is expected to stay put
    (nearest-neighbour linking). Track ids are renumbered from 0 in order of first appearance
    (frame, then y, then x), so the same input always gives the same ids.
    """
    trackpy = _quiet_trackpy()
    if detections.empty:
        out = detections.copy()
        out["track_id"] = pd.Series(dtype=np.int64)
        return out
    df = detections.reset_index(drop=True).copy()
    df["_row"] = np.arange(len(df))
    kw = {}
    if motion is not None:
        frame_time = df.groupby("frame")["time_h"].first().to_dict()
        kw["predictor"] = _motion_predictor(motion, {int(k): float(v) for k, v in frame_time.items()})
    linked = trackpy.link(df, search_range=float(search_range_um), memory=int(memory),
                          pos_columns=["y_um", "x_um"], t_column="frame",
                          adaptive_stop=0.2 * float(search_range_um), adaptive_step=0.9, **kw)
    linked = linked.sort_values("_row", kind="stable")
    df["track_id"] = linked["particle"].to_numpy()
    return renumber_tracks(df).drop(columns="_row")


def step_residuals(tracks: pd.DataFrame, motion: MotionModel | None = None) -> np.ndarray:
    """Distance (µm) between each detection and where the previous detection of its track
    predicts it (NaN for the first detection of a track). Without a motion model the
    prediction is the previous position. Rows in the order of ``tracks``."""
    tr = tracks
    order = np.lexsort((tr["frame"].to_numpy(), tr["track_id"].to_numpy()))
    x = tr["x_um"].to_numpy(float)[order]
    y = tr["y_um"].to_numpy(float)[order]
    t = tr["time_h"].to_numpy(float)[order]
    tid = tr["track_id"].to_numpy()[order]
    res = np.full(len(tr), np.nan)
    if len(tr) > 1:
        same = tid[1:] == tid[:-1]
        if motion is not None:
            px, py = motion.predict(x[:-1], y[:-1], t[:-1], t[1:])
        else:
            px, py = x[:-1], y[:-1]
        d = np.hypot(x[1:] - px, y[1:] - py)
        r = np.full(len(tr), np.nan)
        r[1:] = np.where(same, d, np.nan)
        res[order] = r
    return res


def split_jumps(tracks: pd.DataFrame, motion: MotionModel | None, jump_um: float) -> tuple[pd.DataFrame, int]:
    """Cut tracks where a detection lies farther than ``jump_um`` from where the previous one
    predicts it; the part after the cut becomes a new track. Returns the tracks (renumbered,
    with a boolean ``_split`` column marking tracks that came out of a cut) and the number
    of cuts."""
    tr = tracks.copy()
    res = step_residuals(tr, motion)
    tr["_split"] = False
    jump = np.nan_to_num(res, nan=0.0) > jump_um
    if not jump.any():
        return tr, 0
    order = np.lexsort((tr["frame"].to_numpy(), tr["track_id"].to_numpy()))
    tid = tr["track_id"].to_numpy()[order]
    cut = jump[order]
    # a new id after every cut: (old id, number of cuts so far within the track)
    seg = pd.Series(cut.astype(int)).groupby(tid).cumsum().to_numpy()
    key = pd.Series(list(zip(tid, seg)))
    codes = pd.factorize(key)[0]
    new_id = np.empty(len(tr), np.int64)
    new_id[order] = codes
    split_flag = np.empty(len(tr), bool)
    involved = pd.Series(cut).groupby(tid).transform("any").to_numpy()
    split_flag[order] = involved
    tr["track_id"] = new_id
    tr["_split"] = split_flag
    return renumber_tracks(tr), int(cut.sum())


def track_quality(tracks: pd.DataFrame, motion: MotionModel | None = None, min_track_frames: int = 2,
                  split: np.ndarray | None = None) -> pd.DataFrame:
    """Add the per-track quality columns :data:`QUALITY_COLUMNS` (the same value on every row
    of a track): number of detections, missed frames inside the track, mean SNR, RMS distance
    of the detections from the motion prediction, and flags (``short``: fewer than
    ``min_track_frames`` detections; ``split``: cut off at a jump or the rest of a cut track;
    ``poor_fit``: motion residual over 3× the typical one). Tracks are marked, never dropped."""
    out = tracks.copy()
    if out.empty:
        for c in QUALITY_COLUMNS:
            out[c] = pd.Series(dtype=object if c == "track_flags" else float)
        return out
    frames = np.sort(out["frame"].unique())
    frame_pos = {f: i for i, f in enumerate(frames)}
    pos = out["frame"].map(frame_pos)
    g = out.groupby("track_id", sort=False)
    n = g["frame"].transform("size").astype(np.int64)
    span = pos.groupby(out["track_id"]).transform("max") - pos.groupby(out["track_id"]).transform("min") + 1
    out["track_n_frames"] = n
    out["track_gaps"] = (span - n).astype(np.int64)
    if "snr" in out:
        out["track_mean_snr"] = g["snr"].transform("mean").astype(float)
    else:
        out["track_mean_snr"] = np.nan
    res = step_residuals(out, motion)
    sq = pd.Series(res ** 2, index=out.index)
    out["track_motion_residual_um"] = np.sqrt(sq.groupby(out["track_id"]).transform("mean")).astype(float)
    typical = float(np.nanmedian(res)) if np.isfinite(res).any() else math.nan
    flags = []
    split = np.zeros(len(out), bool) if split is None else np.asarray(split, bool)
    for nn, rr, sp in zip(out["track_n_frames"].to_numpy(), out["track_motion_residual_um"].to_numpy(), split):
        f = []
        if nn < min_track_frames:
            f.append("short")
        if sp:
            f.append("split")
        if math.isfinite(typical) and typical > 0 and np.isfinite(rr) and rr > 3 * max(typical, 0.1):
            f.append("poor_fit")
        flags.append(";".join(f))
    out["track_flags"] = pd.Series(flags, index=out.index, dtype=object)
    return out


def link_tracks(detections: pd.DataFrame, search_range_um: float, memory: int = 2, *,
                jump_um: float | None = None, min_track_frames: int = 2,
                growth_aware: bool = True) -> tuple[pd.DataFrame, dict]:
    """Link detections into tracks, growth-aware, with jump splitting and quality columns.

    1. Nearest-neighbour linking (:func:`link_detections` without a model).
    2. :func:`fit_motion` on those tracks (growth rate, rotation, drift, centre).
    3. Linking again with the motion predictor; the model is refitted on the new tracks.
       When the model cannot be fitted the nearest-neighbour tracks are kept.
    4. Tracks are cut where a detection lies more than ``jump_um`` (default half the search
       range) from its prediction (:func:`split_jumps`).
    5. Quality columns are added (:func:`track_quality`).

    Parameters
    ----------
    detections : DataFrame
        ``frame``, ``time_h``, ``x_um``, ``y_um`` (and ``snr``, ``radius_um`` …).
    search_range_um : float
        Largest distance between a detection and its predicted position.
    memory : int
        Frames a primordium may be missed.
    jump_um : float, optional
        Largest distance from the prediction kept inside one track.
    min_track_frames : int
        Tracks with fewer detections are flagged ``short``.
    growth_aware : bool
        False: nearest-neighbour linking only.

    Returns
    -------
    tracks : DataFrame
        The detections with ``track_id`` and the quality columns.
    info : dict
        ``method``, the motion model (:meth:`MotionModel.to_dict`) and ``n_jumps_split``;
        the model itself under ``"model"`` (not JSON; removed by the pipeline).
    """
    jump = 0.5 * float(search_range_um) if jump_um is None else float(jump_um)
    tracks = link_detections(detections, search_range_um, memory)
    info: dict = {"method": "nearest neighbour", "search_range_um": float(search_range_um),
                  "memory": int(memory), "jump_um": jump}
    model = None
    if growth_aware and not tracks.empty:
        model = fit_motion(tracks)
        if model is not None:
            tracks2 = link_detections(detections, search_range_um, memory, motion=model)
            model2 = fit_motion(tracks2)
            tracks = tracks2
            model = model2 if model2 is not None else model
            info["method"] = "growth-aware prediction (spiral similarity about a drifting centre)"
        else:
            info["note"] = "fewer than 3 tracks of 3 frames: the motion could not be fitted"
    tracks, n_cut = split_jumps(tracks, model, jump) if not tracks.empty else (tracks.assign(_split=False), 0)
    info["n_jumps_split"] = n_cut
    split = tracks.pop("_split").to_numpy(bool) if "_split" in tracks else None
    tracks = track_quality(tracks, model, min_track_frames, split)
    info["n_tracks"] = int(tracks["track_id"].nunique()) if not tracks.empty else 0
    if model is not None:
        info["motion"] = model.to_dict()
    info["model"] = model
    return tracks, info


def renumber_tracks(df: pd.DataFrame) -> pd.DataFrame:
    """Renumber ``track_id`` 0, 1, 2 … by first frame, then y, then x of the first detection."""
    first = (df.sort_values(["frame", "y_um", "x_um"], kind="stable")
             .drop_duplicates("track_id")["track_id"].tolist())
    mapping = {old: new for new, old in enumerate(first)}
    out = df.copy()
    out["track_id"] = out["track_id"].map(mapping).astype(np.int64)
    return out.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)


def add_polar(tracks: pd.DataFrame, centres: pd.DataFrame) -> pd.DataFrame:
    """Add ``r_um`` and ``theta_deg`` about the apex centre of each row's frame.

    ``centres`` has columns ``frame``, ``x_um``, ``y_um``. When it also carries a dome fit
    (``tilt_deg`` …, from the image stage), r and θ are measured in the plane perpendicular to
    the fitted dome axis (:func:`apextrack.apex.polar_about_centres`).
    """
    if "tilt_deg" in centres.columns and not tracks.empty:
        from .apex import polar_about_centres

        out = tracks.copy()
        out["r_um"], out["theta_deg"] = polar_about_centres(tracks, centres)
        return out
    c = centres.set_index("frame")
    xc = tracks["frame"].map(c["x_um"]).to_numpy(float)
    yc = tracks["frame"].map(c["y_um"]).to_numpy(float)
    out = tracks.copy()
    dx = out["x_um"].to_numpy(float) - xc
    dy = out["y_um"].to_numpy(float) - yc
    out["r_um"] = np.hypot(dx, dy)
    out["theta_deg"] = azimuth_deg(out["x_um"].to_numpy(float), out["y_um"].to_numpy(float), xc, yc)
    return out
