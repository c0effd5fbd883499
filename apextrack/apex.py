"""The apex centre (and, with 3D data, the tilt of the dome) per timepoint."""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi


def centre_from_view(view: np.ndarray, smooth_px: float = 3.0) -> tuple[float, float]:
    """Intensity-weighted centre of the apex in a top view, in pixels ``(x, y)``.

    The view is smoothed, the foreground separated from the background by Otsu's threshold and
    the largest connected foreground region kept; its intensity-weighted centroid is the centre.

    Examples
    --------
    >>> img = np.zeros((64, 64), np.float32); img[20:40, 30:50] = 1
    >>> [round(v, 1) for v in centre_from_view(img, smooth_px=1)]
    [39.5, 29.5]
    """
    from skimage.filters import threshold_otsu

    img = ndi.gaussian_filter(np.asarray(view, dtype=np.float32), smooth_px)
    if not np.isfinite(img).all() or img.max() <= img.min():
        ny, nx = img.shape
        return (nx - 1) / 2.0, (ny - 1) / 2.0
    thr = threshold_otsu(img)
    mask = img > thr
    labels, n = ndi.label(mask)
    if n > 1:
        sizes = ndi.sum(mask, labels, index=np.arange(1, n + 1))
        mask = labels == (1 + int(np.argmax(sizes)))
    w = np.where(mask, img - thr, 0.0)
    total = w.sum()
    if total <= 0:
        ny, nx = img.shape
        return (nx - 1) / 2.0, (ny - 1) / 2.0
    yy, xx = np.indices(img.shape)
    return float((w * xx).sum() / total), float((w * yy).sum() / total)


def azimuth_deg(x, y, xc, yc) -> np.ndarray:
    """Azimuth about ``(xc, yc)``, counter-clockwise as seen on the displayed image, in [0, 360).

    Image rows run downward, so ``theta = atan2(-(y - yc), x - xc)``.

    Examples
    --------
    >>> float(azimuth_deg(0.0, -1.0, 0.0, 0.0))  # a point above the centre on screen
    90.0
    """
    theta = np.degrees(np.arctan2(-(np.asarray(y, float) - yc), np.asarray(x, float) - xc))
    return np.mod(theta, 360.0)


def centre_from_tracks(tracks: "pd.DataFrame", min_frames: int = 3, drift: bool = True,
                       max_rate_per_h: float = 1.0) -> dict | None:
    """Fit the apex centre from the way primordia move away from it.

    Primordia drift outward from the centre at fixed azimuths with a common relative growth
    rate γ (r ∝ exp(γt), Richards 1951), so their positions expand homothetically about the
    centre, which may itself drift linearly: ``p_i(t) = c0 + d·t + a_i·exp(γt)``. For a given γ
    the model is linear in ``c0``, ``d`` and the per-track offsets ``a_i``; γ is found by a
    bounded one-dimensional search on the residual. The centre is thus where the velocity field
    of the primordia extrapolates to zero.

    Parameters
    ----------
    tracks : DataFrame
        ``track_id``, ``time_h``, ``x_um``, ``y_um``.
    min_frames : int
        Tracks with fewer detections are not used.
    drift : bool
        Fit a linear drift of the centre as well.
    max_rate_per_h : float
        Upper bound of γ in the search.

    Returns
    -------
    dict or None
        ``x_um``, ``y_um`` (centre at time 0), ``drift_x_um_per_h``, ``drift_y_um_per_h``,
        ``growth_rate_per_h`` (γ), ``rms_um`` (residual), ``n_tracks``; None when fewer than 3
        tracks of ``min_frames`` detections.
    """
    from scipy.optimize import minimize_scalar

    groups = [g for _, g in tracks.groupby("track_id", sort=True) if g["time_h"].nunique() >= min_frames]
    if len(groups) < 3:
        return None
    tid = np.concatenate([np.full(len(g), i) for i, g in enumerate(groups)])
    t = np.concatenate([g["time_h"].to_numpy(float) for g in groups])
    t = t - 0.0
    xy = np.column_stack([np.concatenate([g["x_um"].to_numpy(float) for g in groups]),
                          np.concatenate([g["y_um"].to_numpy(float) for g in groups])])
    n = len(groups)
    t_mid = float(np.mean(t))

    def design(gamma):
        cols = [np.ones_like(t)]
        if drift:
            cols.append(t)
        base = np.column_stack(cols)
        e = np.exp(gamma * (t - t_mid))
        per_track = np.zeros((len(t), n))
        per_track[np.arange(len(t)), tid] = e
        return np.hstack([base, per_track])

    def solve(gamma):
        a = design(gamma)
        coef, *_ = np.linalg.lstsq(a, xy, rcond=None)
        res = xy - a @ coef
        return coef, float((res ** 2).sum())

    fit = minimize_scalar(lambda g: solve(g)[1], bounds=(1e-5, max_rate_per_h), method="bounded",
                          options={"xatol": 1e-7})
    gamma = float(fit.x)
    coef, sse = solve(gamma)
    k = 2 if drift else 1
    return {"x_um": float(coef[0, 0]), "y_um": float(coef[0, 1]),
            "drift_x_um_per_h": float(coef[1, 0]) if drift else 0.0,
            "drift_y_um_per_h": float(coef[1, 1]) if drift else 0.0,
            "growth_rate_per_h": gamma,
            "rms_um": float(np.sqrt(sse / max(len(t) - k - n, 1))), "n_tracks": n}


def choose_centres(tracks: "pd.DataFrame", dome_centres: "pd.DataFrame", method: str = "auto",
                   user_centre_um=None) -> tuple["pd.DataFrame", dict]:
    """The apex centre of every frame, by the chosen method.

    ``user``: the given point in every frame. ``dome``: the per-frame centre of the dome in the
    top view (``dome_centres``). ``motion``: :func:`centre_from_tracks` (drifting linearly).
    ``auto``: ``motion`` when at least three tracks allow it, else ``dome``.

    Returns the centres table (``frame``, ``time_h``, ``x_um``, ``y_um``, ``method``) and a dict
    describing the fit.
    """
    import pandas as pd

    out = dome_centres[["frame", "time_h"]].copy()
    info: dict = {"requested": method}
    if user_centre_um is not None:
        out["x_um"], out["y_um"], out["method"] = float(user_centre_um[0]), float(user_centre_um[1]), "user"
        info["used"] = "user"
        return out, info
    fit = None
    if method in ("auto", "motion"):
        fit = centre_from_tracks(tracks)
        if fit is not None:
            out["x_um"] = fit["x_um"] + fit["drift_x_um_per_h"] * out["time_h"]
            out["y_um"] = fit["y_um"] + fit["drift_y_um_per_h"] * out["time_h"]
            out["method"] = "motion"
            info.update({"used": "motion", **{f"motion_{k}": v for k, v in fit.items()}})
            return out, info
        info["motion_note"] = "fewer than 3 tracks of 3 frames: the centre could not be fitted from motion"
    out["x_um"] = dome_centres["x_um"].to_numpy(float)
    out["y_um"] = dome_centres["y_um"].to_numpy(float)
    out["method"] = "dome"
    info["used"] = "dome"
    return pd.DataFrame(out), info
