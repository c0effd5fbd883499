"""The apex centre (and, with 3D data, the tilt of the dome) per timepoint."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd


def azimuth_deg(x, y, xc, yc) -> np.ndarray:
    """Azimuth about ``(xc, yc)``, counter-clockwise as seen on the displayed image, in [0, 360).

    Image rows run downward, so ``theta = atan2(-(y - yc), x - xc)``.

    Examples
    --------
    >>> float(azimuth_deg(0.0, -1.0, 0.0, 0.0))  # a point above the centre on screen
    90.0
    """
    theta = np.degrees(np.arctan2(-(np.asarray(y, float) - yc), np.asarray(x, float) - xc))
    theta = np.mod(theta, 360.0)
    return np.where(theta >= 360.0, 0.0, theta)[()]  # np.mod gives 360.0 for tiny negative angles


def centre_from_tracks(tracks: "pd.DataFrame", min_frames: int = 3, drift: bool = True,
                       max_rate_per_h: float = 1.0) -> dict | None:
    """Fit the apex centre from the way primordia move away from it.

    Primordia drift outward from the centre at fixed azimuths with a common relative growth
    rate γ (r ∝ exp(γt), Richards 1951), so their positions expand homothetically about the
    centre, which may itself drift linearly: ``p_i(t) = c0 + d·t + a_i·exp(γt)``. For a given γ
    the model is linear in ``c0``, ``d`` and the per-track offsets ``a_i``; γ is found by a
    bounded one-dimensional search on the residual (for each γ the offsets are eliminated track
    by track, leaving a least-squares problem in ``c0`` and ``d`` alone). The centre is thus
    where the velocity field of the primordia extrapolates to zero.

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

    n_times = tracks.groupby("track_id")["time_h"].transform("nunique").to_numpy()
    rows = np.flatnonzero(n_times >= min_frames)
    # the rows track by track (in order of track id, each track's rows in their given order)
    rows = rows[np.argsort(tracks["track_id"].to_numpy()[rows], kind="stable")]
    tid, ids = pd.factorize(tracks["track_id"].to_numpy()[rows], sort=True)
    n = len(ids)
    if n < 3:
        return None
    first = np.flatnonzero(np.r_[True, tid[1:] != tid[:-1]])
    t = tracks["time_h"].to_numpy(float)[rows]
    xy = np.column_stack([tracks["x_um"].to_numpy(float)[rows], tracks["y_um"].to_numpy(float)[rows]])
    t_mid = float(np.mean(t))
    base = np.column_stack([np.ones_like(t), t] if drift else [np.ones_like(t)])

    def solve(gamma):
        # An offset's column is nonzero only on its own track's rows, so for any centre terms
        # the best offsets follow track by track: a_k = Σ_k e·(p − base·coef) / Σ_k e². Putting
        # them back leaves the least squares of each column with its projection on e removed
        # within every track, one or two columns instead of 2 + n: O(N) per γ, no dense solve
        # of the whole design.
        e = np.exp(gamma * (t - t_mid))
        ee = np.add.reduceat(e * e, first)

        def within(v):
            return v - e[:, None] * (np.add.reduceat(e[:, None] * v, first) / ee[:, None])[tid]

        pb, pxy = within(base), within(xy)
        coef, *_ = np.linalg.lstsq(pb, pxy, rcond=None)
        res = pxy - pb @ coef
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


# ----------------------------------------------------------------------------------------------
# the dome: paraboloid fit, tilt, level (tilt-corrected) coordinates
# ----------------------------------------------------------------------------------------------
DOME_KEYS = ["x_um", "y_um", "z_um", "curvature_um", "tilt_deg", "tilt_direction_deg", "up", "rms_um", "n"]


def _tilt_vector(tilt_deg: float, tilt_direction_deg: float) -> np.ndarray:
    """Horizontal image (x, y) components of the unit dome axis."""
    b, p = math.radians(tilt_deg), math.radians(tilt_direction_deg)
    return math.sin(b) * np.array([math.cos(p), -math.sin(p)])


# at most this many surface points enter a dome fit: an even, deterministic subsample of the
# points in the order given (a height map's cells, row by row) when there are more
_DOME_FIT_POINTS = 1000
# axis tilts (degrees) tried as starts, each in four directions, besides the untilted axis
_DOME_START_TILTS = (15.0,)


def _axis_frame(qx, qy, qz, ax, ay):
    """Coordinates about the axis ``(ax, ay, √(1 − ax² − ay²))``: ``W`` along it and ``(U, V)``
    across it, after the smallest rotation that takes the z axis onto it (the turn of
    :func:`level_offsets`). Also returns ``pa = ax·qx + ay·qy``, ``s`` (``U = qx − ax·s``) and the
    axis' z component. ``ax``, ``ay`` may be scalars or ``(K, 1)`` columns (K axes at once)."""
    cb = np.sqrt(1.0 - ax * ax - ay * ay)
    pa = ax * qx + ay * qy
    s = pa / (1.0 + cb) + qz
    return qx - ax * s, qy - ay * s, pa + cb * qz, pa, s, cb


def _dome_residual(p, q):
    """Distance along the axis from the paraboloid ``W = c0 + c1·U + c2·V + c3·(U² + V²)``.

    ``p = (c0, c1, c2, c3, ax, ay)``: for a fixed axis the residual is linear in ``c``; a cap
    has ``c3 = −1/(2·Rc) < 0``, its summit at ``(U, V) = −(c1, c2)/(2·c3)``.
    """
    c0, c1, c2, c3, ax, ay = p
    u, v, w, *_ = _axis_frame(q[0], q[1], q[2], ax, ay)
    return w - c0 - c1 * u - c2 * v - c3 * (u * u + v * v)


def _dome_derivatives(p, q):
    """Residuals, their Jacobian ``(6, n)`` and second derivatives.

    Only the axis enters non-linearly: the second derivatives are returned as
    ``(d²r/da², d²r/da_x·da_y, d²r/da_y², d²r/dc·da)`` with the last of shape ``(6, n)`` holding
    ``d²r/dc1·dax, d²r/dc1·day, d²r/dc2·dax, d²r/dc2·day, d²r/dc3·dax, d²r/dc3·day``.
    """
    c0, c1, c2, c3, ax, ay = p
    qx, qy, qz = q
    u, v, w, pa, s, cb = _axis_frame(qx, qy, qz, ax, ay)
    rho2 = u * u + v * v
    r = w - c0 - c1 * u - c2 * v - c3 * rho2
    m = 1.0 + cb
    m2 = m * m
    bx, by = -ax / cb, -ay / cb                        # d cb / d(ax, ay)
    cb3 = cb ** 3
    bxx, bxy, byy = -1.0 / cb - ax * ax / cb3, -ax * ay / cb3, -1.0 / cb - ay * ay / cb3
    sx = qx / m - (pa * bx / m2)
    sy = qy / m - (pa * by / m2)
    ux, uy, vx, vy = -s - ax * sx, -ax * sy, -ay * sx, -s - ay * sy
    gu = c1 + 2.0 * c3 * u
    gv = c2 + 2.0 * c3 * v
    jac = np.empty((6, len(r)))
    jac[0] = -1.0
    jac[1] = -u
    jac[2] = -v
    jac[3] = -rho2
    jac[4] = qx + bx * qz - gu * ux - gv * vx
    jac[5] = qy + by * qz - gu * uy - gv * vy
    pm = pa / (m2 * m)
    sxx = (-2.0 / m2) * bx * qx + pm * (2.0 * bx * bx - m * bxx)
    sxy = (-1.0 / m2) * (by * qx + bx * qy) + pm * (2.0 * bx * by - m * bxy)
    syy = (-2.0 / m2) * by * qy + pm * (2.0 * by * by - m * byy)
    # U_xx = −2 s_x − ax s_xx, U_xy = −s_y − ax s_xy, U_yy = −ax s_yy; V likewise with ay
    c32 = 2.0 * c3
    gs = gu * ax + gv * ay
    rxx = bxx * qz + gs * sxx + 2.0 * gu * sx - c32 * (ux * ux + vx * vx)
    rxy = bxy * qz + gs * sxy + gu * sy + gv * sx - c32 * (ux * uy + vx * vy)
    ryy = byy * qz + gs * syy + 2.0 * gv * sy - c32 * (uy * uy + vy * vy)
    cross = np.empty((6, len(r)))
    cross[0], cross[1], cross[2], cross[3] = -ux, -uy, -vx, -vy
    cross[4] = -2.0 * (u * ux + v * vx)
    cross[5] = -2.0 * (u * uy + v * vy)
    return r, jac, (rxx, rxy, ryy, cross)


def _soft_l1(r, f):
    """Σ f²·(√(1 + (r/f)²) − 1): the ``cost`` of ``scipy.optimize.least_squares`` with
    ``loss="soft_l1"`` and ``f_scale=f``."""
    return float(f * f * np.sum(np.sqrt(1.0 + (r / f) ** 2) - 1.0))


def _dome_starts(q, tilts, f):
    """For each trial axis (rows of ``tilts``), the linear fit of ``c`` (one robust reweighting)
    and its soft-L1 cost, all axes at once; None when the points do not determine ``c``."""
    ax, ay = tilts[:, :1], tilts[:, 1:]
    u, v, w, *_ = _axis_frame(q[0], q[1], q[2], ax, ay)
    feat = np.empty((len(tilts), 5, q.shape[1]))
    feat[:, 0] = 1.0
    feat[:, 1] = u
    feat[:, 2] = v
    feat[:, 3] = u * u + v * v
    feat[:, 4] = w
    ft = feat.transpose(0, 2, 1)
    wt = None
    for _ in range(2):
        mom = np.matmul(feat if wt is None else feat * wt[:, None, :], ft)   # weighted moments
        try:
            c = np.linalg.solve(mom[:, :4, :4], mom[:, :4, 4:])[..., 0]
        except np.linalg.LinAlgError:  # the points do not span the surface (e.g. one line)
            return None
        r = w - np.matmul(c[:, None, :], feat[:, :4])[:, 0]
        wt = 1.0 / np.sqrt(1.0 + (r / f) ** 2)
    return c, f * f * np.sum(1.0 / wt - 1.0, axis=1)


def _dome_cost_derivatives(p, q, f):
    """Soft-L1 cost of :func:`_dome_residual` at ``p``, its gradient, its exact Hessian (the
    loss' Gauss–Newton term plus the residuals' own curvature) and the Gauss–Newton term alone;
    also the residuals."""
    r, jac, (rxx, rxy, ryy, cross) = _dome_derivatives(p, q)
    t = 1.0 + (r / f) ** 2
    wt = 1.0 / np.sqrt(t)
    wr = wt * r                           # d cost / d r
    g = jac @ wr
    gn = (jac * (wt / t)) @ jac.T         # d² cost / d r² = wt³
    h = gn.copy()
    h[4, 4] += wr @ rxx
    h[4, 5] += wr @ rxy
    h[5, 5] += wr @ ryy
    h[5, 4] = h[4, 5]
    cw = cross @ wr
    h[1:4, 4] += cw[0::2]
    h[1:4, 5] += cw[1::2]
    h[4, 1:4] = h[1:4, 4]
    h[5, 1:4] = h[1:4, 5]
    return f * f * float(np.sum(1.0 / wt - 1.0)), g, h, gn, r


def _dome_newton(p, q, f, max_iter: int = 50):
    """Minimise the soft-L1 cost of :func:`_dome_residual` from ``p``: Newton steps with the exact
    Hessian, damped by the Levenberg–Marquardt rule (``H + λ·diag(H_Gauss–Newton)``, λ raised
    until that is positive definite and the step lowers the cost). Returns ``p`` and the
    residuals."""
    cost, g, h, gn, r = _dome_cost_derivatives(p, q, f)
    lam = 1e-6
    for _ in range(max_iter):
        damp = np.diag(np.diag(gn) + 1e-300)
        while True:
            a = h + lam * damp
            try:
                np.linalg.cholesky(a)  # positive definite: a descent step
                pn = p - np.linalg.solve(a, g)
            except np.linalg.LinAlgError:
                pn = None
            if pn is not None and pn[4] ** 2 + pn[5] ** 2 < 0.98:
                rn = _dome_residual(pn, q)
                cn = _soft_l1(rn, f)
                if cn <= cost:
                    break
            lam *= 10.0
            if lam > 1e10:
                return p, r
        if cost - cn <= 1e-8 * cost:
            # the steps shrink quadratically: what is left after this one is far below that
            return pn, rn
        p = pn
        cost, g, h, gn, r = _dome_cost_derivatives(p, q, f)
        lam = max(lam * 0.1, 1e-9)
    return p, r


def fit_dome(x_um, y_um, z_um, up: int = 1, init: dict | None = None, robust_um: float = 1.0) -> dict | None:
    """Fit a tilted paraboloid of revolution to points of the dome surface.

    The dome is ``z' = −ρ²/(2·Rc)`` in its own frame (summit at the origin, axis along z'),
    tilted by ``tilt_deg`` so that its axis leans towards the azimuth ``tilt_direction_deg``
    (counter-clockwise on the displayed image) and placed with its summit at ``(x, y, z)``.
    The residual is the algebraic distance along the dome axis; a robust (soft-L1) loss with
    scale ``robust_um`` keeps primordia bulges out of the fit.

    For a given axis the paraboloid is linear in its other four parameters (axial offset, the
    two linear terms across the axis, the curvature term), so every start is the linear fit
    for one trial axis (untilted, and 15° in four directions; ``init``'s axis as well), one
    robust reweighting, and the start of least cost is refined by damped Newton steps with the
    exact Hessian. ``init`` only adds its axis to the trial ones: the refinement reaches the
    same minimum from any of them, so a fit does not depend on whether (or which) previous fit
    is passed. At most ``_DOME_FIT_POINTS`` points are used: an even subsample in the given
    order (deterministic).

    Parameters
    ----------
    x_um, y_um, z_um : arrays
        Surface points (e.g. :meth:`apextrack.projection.HeightMap.points_px` × pixel size).
    up : {1, -1}
        Side the dome faces along z.
    init : dict, optional
        A previous fit (same keys as the result): its axis is one more trial start.

    Returns
    -------
    dict or None
        :data:`DOME_KEYS`: summit ``x_um, y_um, z_um``, ``curvature_um`` (radius of curvature
        at the summit), ``tilt_deg``, ``tilt_direction_deg``, ``up``, ``rms_um`` (robust scatter
        of the residuals), ``n`` (points used); None with fewer than 12 points or when the best
        fit is no cap (flat or curving away from ``up``).

    Examples
    --------
    >>> yy, xx = np.mgrid[-30:31:3, -30:31:3].astype(float)
    >>> zz = 50 - (xx ** 2 + yy ** 2) / (2 * 40.0)
    >>> d = fit_dome(xx.ravel() + 5, yy.ravel(), zz.ravel())
    >>> round(d["x_um"], 2), round(d["curvature_um"], 1), round(d["tilt_deg"], 2)
    (5.0, 40.0, 0.0)
    """
    x = np.asarray(x_um, float).ravel()
    y = np.asarray(y_um, float).ravel()
    z = np.asarray(z_um, float).ravel()
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(z)
    if not ok.all():
        x, y, z = x[ok], y[ok], z[ok]
    if len(x) < 12:
        return None
    if len(x) > _DOME_FIT_POINTS:
        sel = np.linspace(0, len(x) - 1, _DOME_FIT_POINTS).astype(int)
        x, y, z = x[sel], y[sel], z[sel]
    up = 1 if up >= 0 else -1
    # centred coordinates, z turned so that the dome faces +z
    mx, my, mz = float(x.mean()), float(y.mean()), float(z.mean())
    q = np.stack([x - mx, y - my, up * (z - mz)])
    tilts = [np.zeros(2)] + [_tilt_vector(b, psi) for b in _DOME_START_TILTS for psi in (0.0, 90.0, 180.0, 270.0)]
    if init is not None and np.isfinite(init.get("tilt_deg", np.nan)) and 0 <= init["tilt_deg"] < 80:
        tilts.append(_tilt_vector(init["tilt_deg"], init.get("tilt_direction_deg", 0.0)))
    tilts = np.array(tilts)
    starts = _dome_starts(q, tilts, robust_um)
    if starts is None:
        return None
    c, cost = starts
    k = int(np.argmin(np.where(np.isfinite(cost), cost, np.inf)))
    p, r = _dome_newton(np.concatenate([c[k], tilts[k]]), q, robust_um)
    c0, c1, c2, c3, ax, ay = (float(v) for v in p)
    if not (np.all(np.isfinite(p)) and c3 < 0):
        return None
    # summit: (U, V) = −(c1, c2)/(2·c3), W = c0 − (c1² + c2²)/(4·c3), back to image axes
    us, vs = -c1 / (2 * c3), -c2 / (2 * c3)
    ws = c0 - (c1 * c1 + c2 * c2) / (4 * c3)
    cb = math.sqrt(1.0 - ax * ax - ay * ay)
    k1 = (ax * us + ay * vs) / (1.0 + cb)
    sx = us - ax * k1 + ws * ax
    sy = vs - ay * k1 + ws * ay
    sz = cb * ws - (ax * us + ay * vs)
    sb = min(math.hypot(ax, ay), 0.99)
    mad = 1.4826 * float(np.median(np.abs(r - np.median(r))))
    return {"x_um": mx + sx, "y_um": my + sy, "z_um": mz + up * sz, "curvature_um": -1.0 / (2 * c3),
            "tilt_deg": float(math.degrees(math.asin(sb))),
            "tilt_direction_deg": float(np.mod(math.degrees(math.atan2(-ay, ax)), 360.0)) if sb > 0 else 0.0,
            "up": int(up), "rms_um": mad, "n": int(len(x))}


def dome_is_plausible(dome: dict | None, field_xy_um) -> bool:
    """Can a dome fit be used for the apex centre and the tilt?

    A fit whose summit lies outside the field of view, or whose radius of curvature exceeds
    four times the field's width (the surface points then lie on a plane or a saddle, e.g. a
    dome cut by a few slices), does not locate a summit.

    Examples
    --------
    >>> dome_is_plausible({"x_um": 50.0, "y_um": 40.0, "curvature_um": 45.0}, (100.0, 100.0))
    True
    >>> dome_is_plausible({"x_um": -400.0, "y_um": 40.0, "curvature_um": 3e11}, (100.0, 100.0))
    False
    """
    if dome is None:
        return False
    w, h = float(field_xy_um[0]), float(field_xy_um[1])
    vals = (dome["x_um"], dome["y_um"], dome["curvature_um"])
    if not all(np.isfinite(vals)):
        return False
    return bool(0 <= dome["x_um"] <= w and 0 <= dome["y_um"] <= h and 0 < dome["curvature_um"] <= 4 * max(w, h))


def dome_height(x_um, y_um, dome: dict) -> np.ndarray:
    """Height (µm) of the fitted dome surface above image points (NaN where none)."""
    x = np.asarray(x_um, float)
    y = np.asarray(y_um, float)
    a = _tilt_vector(dome["tilt_deg"], dome["tilt_direction_deg"])
    a2 = float(a @ a)
    cb = math.sqrt(1 - a2)
    rc = dome["curvature_um"]
    px, py = x - dome["x_um"], y - dome["y_um"]
    pa = px * a[0] + py * a[1]
    qa = a2 / (2 * rc)
    qb = cb * (1.0 - pa / rc)
    qc = pa + (px * px + py * py - pa * pa) / (2 * rc)
    disc = qb * qb - 4 * qa * qc
    with np.errstate(invalid="ignore", divide="ignore"):
        pz = np.where(disc >= 0, -2 * qc / (qb + np.sqrt(np.maximum(disc, 0))), np.nan)
    return dome["z_um"] + dome.get("up", 1) * pz


def level_offsets(dx, dy, dz, tilt_deg: float, tilt_direction_deg: float, up: int = 1):
    """Project 3D offsets onto the plane perpendicular to the dome axis.

    The offsets ``(dx, dy, dz)`` (µm, image axes; ``dz`` along the slice axis) are turned by
    the smallest rotation that makes the fitted dome axis vertical; the returned ``(u, v)`` are
    their components in the image's x and y directions. Azimuths computed from ``(u, v)`` with
    the usual ``atan2(−v, u)`` are measured in the plane perpendicular to the dome axis.

    Examples
    --------
    >>> u, v = level_offsets(10.0, 0.0, 0.0, 0.0, 0.0)
    >>> float(u), float(v)
    (10.0, 0.0)
    """
    a = _tilt_vector(tilt_deg, tilt_direction_deg)
    sb2 = float(a @ a)
    cb = math.sqrt(1.0 - sb2)
    k = (cb - 1.0) / sb2 if sb2 > 1e-12 else -0.5
    dx = np.asarray(dx, float)
    dy = np.asarray(dy, float)
    pz = up * np.asarray(dz, float)
    pa = dx * a[0] + dy * a[1]
    return dx + (k * pa - pz) * a[0], dy + (k * pa - pz) * a[1]


def _dome_of(row) -> dict | None:
    keys = ("dome_x_um", "dome_y_um", "dome_z_um", "curvature_um", "tilt_deg", "tilt_direction_deg")
    try:
        vals = [float(row[k]) for k in keys]
    except (KeyError, TypeError, ValueError):
        return None
    if not all(np.isfinite(vals)) or vals[3] <= 0:
        return None
    up = int(row["dome_up"]) if "dome_up" in row and np.isfinite(row["dome_up"]) else 1
    return {"x_um": vals[0], "y_um": vals[1], "z_um": vals[2], "curvature_um": vals[3], "tilt_deg": vals[4],
            "tilt_direction_deg": vals[5], "up": up}


def level_positions(df: "pd.DataFrame", centres: "pd.DataFrame", x="x_um", y="y_um") -> tuple[np.ndarray, np.ndarray]:
    """Tilt-corrected positions: each point's offset from its frame's dome summit, projected
    onto the plane perpendicular to the dome axis (z from the fitted dome surface), added back
    to the summit. Frames without a dome fit keep their image positions."""
    xs = df[x].to_numpy(float).copy()
    ys = df[y].to_numpy(float).copy()
    if "tilt_deg" not in centres.columns:
        return xs, ys
    frames = df["frame"].to_numpy()
    for _, row in centres.iterrows():
        dome = _dome_of(row)
        if dome is None:
            continue
        m = frames == int(row["frame"])
        if not m.any():
            continue
        z = dome_height(xs[m], ys[m], dome)
        z = np.where(np.isfinite(z), z, dome["z_um"])
        u, v = level_offsets(xs[m] - dome["x_um"], ys[m] - dome["y_um"], z - dome["z_um"], dome["tilt_deg"],
                             dome["tilt_direction_deg"], dome["up"])
        xs[m], ys[m] = dome["x_um"] + u, dome["y_um"] + v
    return xs, ys


def image_from_level(xl, yl, dome: dict, n_iter: int = 20) -> tuple[float, float]:
    """Image position on the dome whose tilt-corrected position is ``(xl, yl)`` (inverse of
    :func:`level_positions` for one frame, by fixed-point iteration)."""
    x, y = float(xl), float(yl)
    for _ in range(n_iter):
        z = float(dome_height(x, y, dome))
        if not np.isfinite(z):
            z = dome["z_um"]
        u, v = level_offsets(x - dome["x_um"], y - dome["y_um"], z - dome["z_um"], dome["tilt_deg"],
                             dome["tilt_direction_deg"], dome["up"])
        ex, ey = xl - (dome["x_um"] + float(u)), yl - (dome["y_um"] + float(v))
        x, y = x + ex, y + ey
        if math.hypot(ex, ey) < 1e-6:
            break
    return x, y


def polar_about_centres(tracks: "pd.DataFrame", centres: "pd.DataFrame") -> tuple[np.ndarray, np.ndarray]:
    """``r_um`` and ``theta_deg`` about each frame's centre, in the plane perpendicular to the
    fitted dome axis when the centres table carries a dome fit (else in the image plane)."""
    c = centres.set_index("frame")
    xc = tracks["frame"].map(c["x_um"]).to_numpy(float)
    yc = tracks["frame"].map(c["y_um"]).to_numpy(float)
    xs, ys = level_positions(tracks, centres)
    cdf = pd.DataFrame({"frame": tracks["frame"].to_numpy(), "x_um": xc, "y_um": yc})
    xcl, ycl = level_positions(cdf, centres)
    return np.hypot(xs - xcl, ys - ycl), azimuth_deg(xs, ys, xcl, ycl)


# ----------------------------------------------------------------------------------------------
# the centre that makes the pattern most regular
# ----------------------------------------------------------------------------------------------
def _wrap_rad(a):
    return (np.asarray(a) + np.pi) % (2 * np.pi) - np.pi


def centre_from_pattern(tracks: "pd.DataFrame", init_xy, min_primordia: int = 4,
                        robust: float = 0.15) -> dict | None:
    """Fit the centre about which successive primordia's azimuths advance most regularly and
    ln(r) falls most evenly with birth rank.

    An error δ of the centre at radius r biases an azimuth by about (δ/r)·sin(θ − ψ) (Okabe,
    arXiv:1212.3377) and ln r by about (δ/r)·cos(θ − ψ), so the errors show as irregularity of
    the successive differences. Birth order is taken from the tracks (first frame, then the
    farther primordium first); in every frame, for every two primordia of successive rank present
    in it, the residuals ``wrap(Δθ − α)`` and ``Δln r − m`` are formed; the centre (and the common
    angle α and log-ratio m) minimise them by robust (soft-L1) least squares.

    Parameters
    ----------
    tracks : DataFrame
        ``track_id``, ``frame``, ``x_um``, ``y_um`` (in one frame of reference).
    init_xy : (x, y)
        Starting centre (µm).

    Returns
    -------
    dict or None
        ``x_um``, ``y_um``, ``angle_deg`` (α), ``log_ratio`` (m), ``rms_rad``, ``n_pairs``.
    """
    from scipy.optimize import least_squares

    if tracks.empty:
        return None
    df0 = tracks[["track_id", "frame", "x_um", "y_um"]].dropna()
    first = df0.sort_values(["track_id", "frame"], kind="stable").drop_duplicates("track_id")

    def ranks_about(cx, cy):
        f = first.assign(_r=np.hypot(first["x_um"] - cx, first["y_um"] - cy).to_numpy())
        order = f.sort_values(["frame", "_r"], ascending=[True, False], kind="stable")["track_id"].to_numpy()
        return {int(t): i for i, t in enumerate(order)}

    def fit_with(rank, start):
        df = df0.assign(rank=df0["track_id"].map(rank).to_numpy())
        pairs_a, pairs_b = [], []
        for _, g in df.groupby("frame", sort=True):
            if len(g) < min_primordia:
                continue
            g = g.sort_values("rank", kind="stable")
            rk = g["rank"].to_numpy()
            idx = g.index.to_numpy()
            nxt = np.nonzero(np.diff(rk) == 1)[0]
            pairs_a.extend(idx[nxt])
            pairs_b.extend(idx[nxt + 1])
        if len(pairs_a) < 3:
            return None
        xa, ya = df.loc[pairs_a, "x_um"].to_numpy(float), df.loc[pairs_a, "y_um"].to_numpy(float)
        xb, yb = df.loc[pairs_b, "x_um"].to_numpy(float), df.loc[pairs_b, "y_um"].to_numpy(float)

        def diffs(cx, cy):
            ta = np.arctan2(-(ya - cy), xa - cx)
            tb = np.arctan2(-(yb - cy), xb - cx)
            ra = np.hypot(xa - cx, ya - cy)
            rb = np.hypot(xb - cx, yb - cy)
            return _wrap_rad(tb - ta), np.log(np.maximum(rb, 1e-6)) - np.log(np.maximum(ra, 1e-6))

        dth, dlr = diffs(*start)
        alpha0 = float(np.angle(np.mean(np.exp(1j * dth))))
        m0 = float(np.median(dlr))

        def resid(p):
            dt, dl = diffs(p[0], p[1])
            return np.concatenate([_wrap_rad(dt - p[2]), dl - p[3]])

        fit = least_squares(resid, [start[0], start[1], alpha0, m0], loss="soft_l1", f_scale=robust,
                            x_scale=[5.0, 5.0, 0.1, 0.05])
        res = resid(fit.x)
        return {"x_um": float(fit.x[0]), "y_um": float(fit.x[1]),
                "angle_deg": float(np.degrees(fit.x[2])), "log_ratio": float(fit.x[3]),
                "rms_rad": float(np.sqrt(np.mean(res ** 2))), "n_pairs": int(len(pairs_a))}

    # the birth order of primordia already present in the first frame depends on the centre
    # (farther = older): re-rank about each new centre until the order no longer changes
    start = (float(init_xy[0]), float(init_xy[1]))
    rank = ranks_about(*start)
    result = None
    for _ in range(6):
        result = fit_with(rank, start)
        if result is None:
            return None
        start = (result["x_um"], result["y_um"])
        new_rank = ranks_about(*start)
        if new_rank == rank:
            break
        rank = new_rank
    return result


def choose_centres(tracks: "pd.DataFrame", dome_centres: "pd.DataFrame", method: str = "auto",
                   user_centre_um=None) -> tuple["pd.DataFrame", dict]:
    """The apex centre of every frame, by the chosen method, with every estimate reported.

    Estimates (all in the tracks' frame of reference):

    - ``dome``: the summit of the paraboloid fitted to the dome surface of each frame (columns
      ``dome_x_um``/``dome_y_um`` of ``dome_centres``), or, for 2D stacks, the centre of the
      dome in the top view (``view_x_um``/``view_y_um``, also the fallback);
    - ``motion``: :func:`centre_from_tracks` (drifting linearly);
    - ``pattern``: :func:`centre_from_pattern`, independent of the first two;
    - ``user``: the given point in every frame.

    ``auto`` uses ``motion`` when at least three tracks allow it, else ``pattern``, else
    ``dome``. When ``dome_centres`` carries a dome fit (``tilt_deg`` …), motion and pattern are
    fitted on tilt-corrected positions (:func:`level_positions`) and mapped back to the image.

    Returns the centres table (``frame``, ``time_h``, ``x_um``, ``y_um``, ``method`` and the
    per-method columns ``dome_*``, ``view_*``, ``motion_*``, ``pattern_*``) and a dict
    describing the fits and which estimate was used.
    """
    import pandas as pd

    out = dome_centres.copy().reset_index(drop=True)
    if "view_x_um" not in out.columns:
        out["view_x_um"], out["view_y_um"] = out["x_um"].to_numpy(float), out["y_um"].to_numpy(float)
    has_dome = "dome_x_um" in out.columns and np.isfinite(out["dome_x_um"].to_numpy(float)).any()
    if has_dome:
        dx = out["dome_x_um"].to_numpy(float)
        dy = out["dome_y_um"].to_numpy(float)
        ok = np.isfinite(dx) & np.isfinite(dy)
        dome_x = np.where(ok, dx, out["view_x_um"].to_numpy(float))
        dome_y = np.where(ok, dy, out["view_y_um"].to_numpy(float))
    else:
        dome_x, dome_y = out["view_x_um"].to_numpy(float), out["view_y_um"].to_numpy(float)
    info: dict = {"requested": method, "tilt_corrected": bool(has_dome and "tilt_deg" in out.columns)}
    if has_dome:
        info["dome_tilt_deg_median"] = float(np.nanmedian(out["tilt_deg"]))
    # level (tilt-corrected) track positions
    lv = tracks.copy()
    if not lv.empty and info["tilt_corrected"]:
        lx, ly = level_positions(lv, out)
        lv["x_um"], lv["y_um"] = lx, ly
    domes = {int(r["frame"]): _dome_of(r) for _, r in out.iterrows()} if info["tilt_corrected"] else {}

    def to_image(frame, xl, yl):
        d = domes.get(int(frame))
        return image_from_level(xl, yl, d) if d is not None else (xl, yl)

    motion = centre_from_tracks(lv) if not lv.empty else None
    if motion is not None:
        mx = motion["x_um"] + motion["drift_x_um_per_h"] * out["time_h"].to_numpy(float)
        my = motion["y_um"] + motion["drift_y_um_per_h"] * out["time_h"].to_numpy(float)
        img = [to_image(f, a, b) for f, a, b in zip(out["frame"], mx, my)]
        out["motion_x_um"] = [p[0] for p in img]
        out["motion_y_um"] = [p[1] for p in img]
        info.update({f"motion_{k}": v for k, v in motion.items()})
    else:
        out["motion_x_um"] = out["motion_y_um"] = np.nan
        info["motion_note"] = "fewer than 3 tracks of 3 frames: the centre could not be fitted from motion"
    init = (motion["x_um"], motion["y_um"]) if motion is not None else (float(np.nanmedian(dome_x)), float(np.nanmedian(dome_y)))
    pattern = centre_from_pattern(lv, init) if not lv.empty else None
    if pattern is not None:
        img = [to_image(f, pattern["x_um"], pattern["y_um"]) for f in out["frame"]]
        out["pattern_x_um"] = [p[0] for p in img]
        out["pattern_y_um"] = [p[1] for p in img]
        info.update({f"pattern_{k}": v for k, v in pattern.items()})
    else:
        out["pattern_x_um"] = out["pattern_y_um"] = np.nan
        info["pattern_note"] = "too few primordia of successive rank seen together"
    out["dome_x_um"], out["dome_y_um"] = dome_x, dome_y
    if user_centre_um is not None:
        used = "user"
        out["x_um"], out["y_um"] = float(user_centre_um[0]), float(user_centre_um[1])
    else:
        used = {"auto": "motion" if motion is not None else ("pattern" if pattern is not None else "dome")}.get(method, method)
        if used == "motion" and motion is None:
            used = "dome"
        if used == "pattern" and pattern is None:
            used = "dome"
        if used == "view":
            out["x_um"], out["y_um"] = out["view_x_um"], out["view_y_um"]
        else:
            out["x_um"], out["y_um"] = out[f"{used}_x_um"], out[f"{used}_y_um"]
    out["method"] = used
    info["used"] = used
    # agreement between the estimates (mean distance over frames)
    for a, b in (("motion", "pattern"), ("motion", "dome"), ("pattern", "dome")):
        d = np.hypot(out[f"{a}_x_um"] - out[f"{b}_x_um"], out[f"{a}_y_um"] - out[f"{b}_y_um"])
        if np.isfinite(d).any():
            info[f"distance_{a}_{b}_um"] = float(np.nanmean(d))
    first = ["frame", "time_h", "x_um", "y_um", "method"]
    return pd.DataFrame(out[first + [c for c in out.columns if c not in first]]), info
