"""Drift and rotation correction between timepoints.

The specimen may move and turn between timepoints. A rigid motion of frame ``t`` relative to
frame ``t − 1`` is written as a rotation by ``rotation_deg`` (counter-clockwise on the
displayed image) about the centre ``f`` of the field of view followed by a shift::

    x_t = f + R(φ)·(x_{t−1} − f) + shift

Estimation (streaming: only the previous frame's Fourier transform and detections are kept):

1. **Translation guess** — phase correlation of the two top views (scikit-image
   ``phase_cross_correlation``, on a 2× binned copy for large frames).
2. **Rotation and refined shift from the primordia** — the detections of the two frames are
   matched (search over rotations, then mutual nearest neighbours) and a similarity transform
   ``x_t = s·R·x_{t−1} + T`` is fitted by least squares (Umeyama 1991, IEEE TPAMI 13:376). The
   scale ``s`` absorbs the growth of the pattern about the apex centre ``c`` (primordia drift
   outward homothetically); the rigid shift is recovered as
   ``shift = T − (I − R)·f − (1 − s)·R·c``.
   When fewer than three primordia can be matched, the phase-correlation shift is used alone
   (no rotation) if it explains the detections better than no shift at all (few primordia of
   an expanding pattern can make the correlation align a primordium with its neighbour), and
   the row says so; a frame with fewer than three detections is taken as unmoved and the next
   frame is registered to it; a frame without detections is left out.

The transforms are applied to detection coordinates, not to the images: every detection is
mapped exactly into the frame of reference of the first frame (no resampling, no
interpolation blur); the top views written to the results stay as acquired.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

REGISTRATION_COLUMNS = ["frame", "shift_x_um", "shift_y_um", "rotation_deg", "cum_shift_x_um",
                        "cum_shift_y_um", "cum_rotation_deg", "scale", "n_matched", "rms_um", "method"]


def _rot(phi_deg: float) -> np.ndarray:
    """Rotation matrix acting on image (x, y) that turns counter-clockwise on the display."""
    p = math.radians(phi_deg)
    c, s = math.cos(p), math.sin(p)
    # rows run downward: a counter-clockwise turn on screen is clockwise in (x, y) maths axes
    return np.array([[c, s], [-s, c]])


def rigid_matrix(rotation_deg: float, shift_xy, centre_xy) -> np.ndarray:
    """3×3 homogeneous matrix of ``x ↦ f + R(x − f) + shift`` (image x, y)."""
    r = _rot(rotation_deg)
    f = np.asarray(centre_xy, float)
    m = np.eye(3)
    m[:2, :2] = r
    m[:2, 2] = f - r @ f + np.asarray(shift_xy, float)
    return m


def decompose(matrix: np.ndarray, centre_xy) -> tuple[float, np.ndarray]:
    """Rotation (deg) and shift about ``centre_xy`` of a rigid 3×3 matrix."""
    r = matrix[:2, :2]
    phi = math.degrees(math.atan2(r[0, 1], r[0, 0]))
    f = np.asarray(centre_xy, float)
    return phi, matrix[:2, 2] - f + r @ f


def phase_shift(reference: np.ndarray, moving: np.ndarray, upsample: int = 4) -> np.ndarray:
    """Shift ``(dx, dy)`` in pixels that moves ``reference`` onto ``moving`` (phase correlation).

    Examples
    --------
    >>> yy, xx = np.mgrid[:64, :64]
    >>> a = np.exp(-((xx - 30) ** 2 + (yy - 25) ** 2) / 20.0)
    >>> b = np.exp(-((xx - 33.5) ** 2 + (yy - 23) ** 2) / 20.0)
    >>> [round(float(v), 1) for v in phase_shift(a, b)]
    [3.5, -2.0]
    """
    from skimage.registration import phase_cross_correlation

    a = np.asarray(reference, np.float32)
    b = np.asarray(moving, np.float32)
    bin_ = 2 if min(a.shape) >= 256 else 1
    if bin_ > 1:
        ny, nx = (a.shape[0] // 2) * 2, (a.shape[1] // 2) * 2
        a = a[:ny, :nx].reshape(ny // 2, 2, nx // 2, 2).mean(axis=(1, 3))
        b = b[:ny, :nx].reshape(ny // 2, 2, nx // 2, 2).mean(axis=(1, 3))
    a = a - a.mean()
    b = b - b.mean()
    shift, _, _ = phase_cross_correlation(a, b, upsample_factor=upsample, normalization=None)
    # skimage returns the shift that registers moving onto reference: reverse it
    return -np.array([shift[1], shift[0]], float) * bin_


def fit_similarity(src: np.ndarray, dst: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Least-squares similarity ``dst ≈ s·R·src + T`` (Umeyama 1991). Returns ``(s, R, T)``."""
    src = np.asarray(src, float)
    dst = np.asarray(dst, float)
    ms, md = src.mean(axis=0), dst.mean(axis=0)
    a, b = src - ms, dst - md
    cov = b.T @ a / len(src)
    u, d, vt = np.linalg.svd(cov)
    sgn = np.eye(2)
    if np.linalg.det(u) * np.linalg.det(vt) < 0:
        sgn[1, 1] = -1
    r = u @ sgn @ vt
    var = (a ** 2).sum() / len(src)
    s = float(np.trace(np.diag(d) @ sgn) / var) if var > 0 else 1.0
    return s, r, md - s * r @ ms


def _mutual_nn(a: np.ndarray, b: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    from scipy.spatial import cKDTree

    if len(a) == 0 or len(b) == 0:
        return np.zeros(0, int), np.zeros(0, int)
    if len(a) * len(b) <= 4096:
        # a few dozen primordia: the full distance matrix is cheaper than two k-d trees
        d = np.hypot(a[:, None, 0] - b[None, :, 0], a[:, None, 1] - b[None, :, 1])
        iab, iba = np.argmin(d, axis=1), np.argmin(d, axis=0)
        ia = np.nonzero(d[np.arange(len(a)), iab] < tol)[0]
        ib = iab[ia]
        ok = (iba[ib] == ia) & (d[ia, ib] < tol)
        return ia[ok], ib[ok]
    ta, tb = cKDTree(a), cKDTree(b)
    dab, iab = tb.query(a, distance_upper_bound=tol)
    dba, iba = ta.query(b, distance_upper_bound=tol)
    ia = np.nonzero(np.isfinite(dab))[0]
    ib = iab[ia]
    ok = iba[ib] == ia
    return ia[ok], ib[ok]


def _best_turn(prev_xy: np.ndarray, cur_xy: np.ndarray, pivot: np.ndarray, shift: np.ndarray,
               angles: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray] | None:
    """The trial turn about ``pivot`` (then ``shift``) that matches the most points mutually
    nearest within ``tol``, ties going to the smaller summed distance, then the first angle.
    Returns the matched indices ``(ia, ib)`` of that turn, or None when no turn matches any.

    A few dozen primordia: every turn is tried at once on full distance matrices; larger sets
    go turn by turn through :func:`_mutual_nn`'s k-d trees.
    """
    best_score, best = None, None
    if len(prev_xy) * len(cur_xy) > 4096:
        for ang in angles:
            r = _rot(ang)
            pred = pivot + (prev_xy - pivot) @ r.T + shift
            ia, ib = _mutual_nn(pred, cur_xy, tol)
            if ia.size:
                score = (ia.size, -float(np.sum(np.hypot(*(pred[ia] - cur_xy[ib]).T))))
                if best_score is None or score > best_score:
                    best_score, best = score, (ia, ib)
        return best
    rel = prev_xy - pivot
    pred = np.stack([pivot + rel @ _rot(a).T + shift for a in angles])  # (A, n, 2)
    d = np.hypot(pred[:, :, None, 0] - cur_xy[None, None, :, 0],
                 pred[:, :, None, 1] - cur_xy[None, None, :, 1])     # (A, n, m)
    iab, iba = np.argmin(d, axis=2), np.argmin(d, axis=1)            # (A, n), (A, m)
    dmin = np.take_along_axis(d, iab[:, :, None], axis=2)[:, :, 0]
    rows = np.arange(len(prev_xy))
    # a point pair is matched when each is the other's nearest and they lie within tol
    matched = (dmin < tol) & (np.take_along_axis(iba, iab, axis=1) == rows)
    counts = matched.sum(axis=1)
    if not counts.max():
        return None
    for k in np.nonzero(counts == counts.max())[0]:
        ia = np.nonzero(matched[k])[0]
        ib = iab[k][ia]
        score = -float(np.sum(np.hypot(*(pred[k][ia] - cur_xy[ib]).T)))
        if best_score is None or score > best_score:
            best_score, best = score, (ia, ib)
    return best


def match_points(prev_xy: np.ndarray, cur_xy: np.ndarray, shift_guess, tol: float,
                 max_rotation_deg: float = 15.0, pivot=None) -> dict | None:
    """Match two point sets related by a small rotation, shift and growth; fit a similarity.

    Returns ``{"scale", "R", "T", "n", "rms", "src", "dst"}`` (pixels) or None with fewer than
    three matches or matches nearly on one line.
    """
    prev_xy = np.asarray(prev_xy, float).reshape(-1, 2)
    cur_xy = np.asarray(cur_xy, float).reshape(-1, 2)
    if len(prev_xy) < 3 or len(cur_xy) < 3:
        return None
    pivot = prev_xy.mean(axis=0) if pivot is None else np.asarray(pivot, float)
    angles = np.arange(-max_rotation_deg, max_rotation_deg + 1e-9, 1.0)
    best = _best_turn(prev_xy, cur_xy, pivot, np.asarray(shift_guess, float), angles, tol)
    if best is None or best[0].size < 3:
        return None
    ia, ib = best
    for _ in range(4):
        s, r, t = fit_similarity(prev_xy[ia], cur_xy[ib])
        pred = s * prev_xy @ r.T + t
        res = np.hypot(*(pred[ia] - cur_xy[ib]).T)
        cut = max(3.0 * 1.4826 * float(np.median(res)), 0.25 * tol)
        ia2, ib2 = _mutual_nn(pred, cur_xy, min(tol, max(cut, 1.0)))
        if ia2.size < 3:
            break
        if ia2.size == ia.size and np.array_equal(ia2, ia) and np.array_equal(ib2, ib):
            break
        ia, ib = ia2, ib2
    # primordia all on one line (e.g. two opposite rows) cannot tell a shift along the line from
    # growth about the centre: such a fit is not used
    spread = np.linalg.svd(prev_xy[ia] - prev_xy[ia].mean(axis=0), compute_uv=False)
    if spread.size < 2 or spread[1] < 0.2 * spread[0]:
        return None
    s, r, t = fit_similarity(prev_xy[ia], cur_xy[ib])
    pred = s * prev_xy[ia] @ r.T + t
    rms = float(np.sqrt(np.mean(np.sum((pred - cur_xy[ib]) ** 2, axis=1))))
    return {"scale": s, "R": r, "T": t, "n": int(ia.size), "rms": rms, "src": ia, "dst": ib}


@dataclass
class Registrar:
    """Streaming registration of a time-lapse, one frame at a time.

    Parameters
    ----------
    shape_yx : (int, int)
        Frame size in pixels (the rotation centre is the field centre).
    pixel_size_um : float
    match_tol_px : float
        Largest distance between a primordium's predicted and detected position when matching.
    max_rotation_deg : float
        Largest rotation between two consecutive frames that is searched for.
    enabled : bool
        False: every frame keeps its own coordinates (rows still written, method ``off``).

    Examples
    --------
    >>> reg = Registrar((64, 64), 1.0)
    >>> row = reg.update(0, np.zeros((64, 64)), np.zeros((0, 2)))
    >>> row["method"], row["cum_rotation_deg"]
    ('reference', 0.0)
    """

    shape_yx: tuple[int, int]
    pixel_size_um: float
    match_tol_px: float = 8.0
    max_rotation_deg: float = 15.0
    enabled: bool = True
    min_points: int = 3
    rows: list = field(default_factory=list)

    def __post_init__(self):
        ny, nx = self.shape_yx
        self.field_centre = np.array([(nx - 1) / 2.0, (ny - 1) / 2.0])
        self._prev_view = None
        self._prev_pts = None
        self._prev_centre = None
        self._cum = np.eye(3)       # frame t → frame 0 is inv(self._cum)
        self._growth = 1.0          # last scale between frames measured from the primordia
        self._ref_cum = np.eye(3)
        self._last_shift = None     # last shift measured from the primordia (pixels)

    def update(self, t: int, view: np.ndarray, points_xy_px: np.ndarray, apex_xy_px=None) -> dict:
        """Register frame ``t`` to the last registered frame; returns its registration row.

        ``points_xy_px``: detections ``(x, y)`` of this frame in its own pixels; ``apex_xy_px``:
        the apex centre of this frame (pixels) used to tell growth from drift.
        """
        pts = np.asarray(points_xy_px, float).reshape(-1, 2)
        apex = self.field_centre if apex_xy_px is None else np.asarray(apex_xy_px, float)
        ny, nx = self.shape_yx
        if not (np.isfinite(apex).all() and 0 <= apex[0] < nx and 0 <= apex[1] < ny):
            apex = self.field_centre  # an apex estimate outside the field cannot be right
        px = self.pixel_size_um
        step = np.eye(3)
        method, n, rms, scale = "reference", 0, math.nan, math.nan
        if not self.enabled:
            method = "off"
        elif self._prev_view is None:
            if len(pts):
                self._store(view, pts, apex)
        elif len(pts) < self.min_points:
            method = "skipped (too few detections)"
            if len(pts):
                # the next frame is compared with this one (the nearer in time), taken as unmoved
                self._store(view, pts, apex)
        else:
            shift, fit, phi, s, guess = None, None, 0.0, 1.0, None
            if self._last_shift is not None:
                # first the primordia alone, with the last measured shift as the guess (drift
                # changes slowly); the phase correlation is computed only when this fails
                fit = match_points(self._prev_pts, pts, self._last_shift, self.match_tol_px,
                                   self.max_rotation_deg, pivot=self._prev_centre)
                shift, phi, s = self._checked_shift(fit)
                # most primordia of both frames must be matched for the guess to be trusted
                if shift is not None and fit["n"] < max(self.min_points, 0.6 * min(len(self._prev_pts), len(pts))):
                    shift = None
            if shift is None:
                guess = phase_shift(self._prev_view, view)
                fit = match_points(self._prev_pts, pts, guess, self.match_tol_px, self.max_rotation_deg,
                                   pivot=self._prev_centre)
                shift, phi, s = self._checked_shift(fit)
            f = self.field_centre
            self._last_shift = None
            if shift is not None:
                self._last_shift = np.asarray(shift, float)
                step = rigid_matrix(phi, shift, f)
                method, n, rms, scale = "primordia", fit["n"], fit["rms"] * px, s
                self._growth = float(s)
            elif float(np.hypot(*guess)) > self.match_tol_px:
                method = "skipped (no consistent motion found)"
            elif not self._explains(pts, guess):
                # few primordia in an expanding pattern can make the correlation align one
                # primordium with its neighbour: a shift the detections do not bear out is not used
                method = "skipped (correlation shift not borne out by the primordia)"
            else:
                step = rigid_matrix(0.0, guess, self.field_centre)
                method = "phase correlation (translation only)"
            self._cum = step @ self._ref_cum
            self._store(view, pts, apex)
        if method.startswith("skipped") or method == "off":
            cum = self._ref_cum if method != "off" else np.eye(3)
        else:
            cum = self._cum
        self._current = cum
        phi, shift = decompose(step, self.field_centre)
        cphi, cshift = decompose(cum, self.field_centre)
        row = {"frame": int(t), "shift_x_um": float(shift[0] * px), "shift_y_um": float(shift[1] * px),
               "rotation_deg": float(phi), "cum_shift_x_um": float(cshift[0] * px),
               "cum_shift_y_um": float(cshift[1] * px), "cum_rotation_deg": float(cphi),
               "scale": float(scale), "n_matched": int(n), "rms_um": float(rms), "method": method}
        self.rows.append(row)
        return row

    def _checked_shift(self, fit):
        """Rigid shift (pixels), rotation (deg) and scale of a :func:`match_points` fit, or
        ``(None, 0, 1)`` when the fit fails the plausibility guards."""
        if fit is None:
            return None, 0.0, 1.0
        r, s, tvec = fit["R"], fit["scale"], fit["T"]
        phi = math.degrees(math.atan2(r[0, 1], r[0, 0]))
        f = self.field_centre
        shift = tvec - (np.eye(2) - r) @ f - (1.0 - s) * (r @ self._prev_centre)
        # a specimen does not jump farther than a primordium may move between frames:
        # a larger step means the few matched primordia did not constrain the fit
        if float(np.hypot(*shift)) > self.match_tol_px:
            return None, 0.0, 1.0
        # matched primordia that a similarity leaves far apart were matched wrongly
        if fit["rms"] > max(1.0, 0.15 * self.match_tol_px):
            return None, 0.0, 1.0
        return shift, phi, s

    def _explains(self, pts: np.ndarray, shift) -> bool:
        """Do the detections follow the previous frame's better with ``shift`` than without?

        The previous detections are moved outward about the apex centre by one frame's growth
        (the last scale measured from the primordia, else none) and shifted; the score is the
        mean distance from each detection to the nearest moved one and back, capped at the
        matching tolerance."""
        from scipy.spatial import cKDTree

        if self._prev_pts is None or not len(self._prev_pts) or not len(pts):
            return True
        c = self._prev_centre
        base = c + self._growth * (self._prev_pts - c)
        tol = self.match_tol_px

        def score(v):
            pred = base + np.asarray(v, float)
            d1 = cKDTree(pred).query(pts)[0]
            d2 = cKDTree(pts).query(pred)[0]
            return float(np.mean(np.minimum(d1, tol)) + np.mean(np.minimum(d2, tol)))

        return score(shift) < score((0.0, 0.0))

    def _store(self, view, pts, apex):
        self._prev_view = np.asarray(view, np.float32).copy()
        self._prev_pts = pts.copy()
        self._prev_centre = np.asarray(apex, float)
        self._ref_cum = self._cum.copy()

    def to_reference(self, x_px, y_px) -> tuple[np.ndarray, np.ndarray]:
        """Map pixel positions of the frame last passed to :meth:`update` into frame 0."""
        inv = np.linalg.inv(self._current)
        x = np.asarray(x_px, float)
        y = np.asarray(y_px, float)
        return inv[0, 0] * x + inv[0, 1] * y + inv[0, 2], inv[1, 0] * x + inv[1, 1] * y + inv[1, 2]

    def from_reference(self, x_px, y_px) -> tuple[np.ndarray, np.ndarray]:
        """Map frame-0 pixel positions into the pixels of the frame last passed to :meth:`update`
        (the inverse of :meth:`to_reference`; the identity before the first frame)."""
        m = getattr(self, "_current", np.eye(3))
        x = np.asarray(x_px, float)
        y = np.asarray(y_px, float)
        return m[0, 0] * x + m[0, 1] * y + m[0, 2], m[1, 0] * x + m[1, 1] * y + m[1, 2]

    @property
    def current_matrix(self) -> np.ndarray:
        """3×3 matrix of the frame last passed to :meth:`update`: frame-0 ``(x, y, 1)`` → its own."""
        return np.array(getattr(self, "_current", np.eye(3)), float)

    def warp_to_reference(self, view: np.ndarray, order: int = 1) -> np.ndarray:
        """Resample the frame last passed to :meth:`update` into frame 0's frame of reference,
        so that it lines up with the registered coordinates (``x_um``, ``y_um``); see
        :func:`warp_view`."""
        return warp_view(view, self._current, order)

    @property
    def current_rotation_deg(self) -> float:
        """Cumulative rotation of the frame last passed to :meth:`update` (deg)."""
        return decompose(self._current, self.field_centre)[0]

    def table(self) -> pd.DataFrame:
        """The ``registration`` table (one row per frame)."""
        return pd.DataFrame(self.rows, columns=REGISTRATION_COLUMNS)


def warp_view(view: np.ndarray, matrix: np.ndarray, order: int = 1) -> np.ndarray:
    """Resample a frame's top view into frame 0's frame of reference: ``out[y, x]`` is the view
    at ``matrix @ (x, y, 1)`` (``matrix``: frame-0 ``(x, y, 1)`` → the frame's own, e.g.
    :attr:`Registrar.current_matrix`). Pixels that come from outside the frame take the frame's
    lowest value. ``order`` 1 is bilinear, done here in float32 with numpy array operations
    (which release the interpreter lock, so the warp can run beside frames being measured in
    other threads): the values of ``scipy.ndimage.affine_transform`` with ``order=1`` to
    rounding. Other orders use scipy."""
    view = np.asarray(view, np.float32)
    m = np.asarray(matrix, float)
    if np.allclose(m, np.eye(3)):
        return view
    cval = float(view.min()) if view.size else 0.0
    if order == 1 and view.ndim == 2 and min(view.shape) >= 2:
        return _warp_bilinear(view, m, cval)
    from scipy import ndimage as ndi

    # ndimage works in (row, col) = (y, x) order
    mat = np.array([[m[1, 1], m[1, 0]], [m[0, 1], m[0, 0]]])
    offset = np.array([m[1, 2], m[0, 2]])
    return ndi.affine_transform(view, mat, offset=offset, order=order, mode="constant", cval=cval)


#: rows of the output warped at a time: the work arrays of a block stay in the processor's
#: cache (the whole frame's took 3× as long on a 512 × 512 view, measured)
_WARP_ROWS = 64


def _warp_bilinear(view: np.ndarray, m: np.ndarray, cval: float) -> np.ndarray:
    """``out[y, x] = view`` sampled bilinearly at ``m @ (x, y, 1)``; ``cval`` where that point
    lies outside the frame (float32). Done :data:`_WARP_ROWS` output rows at a time."""
    ny, nx = view.shape
    f = np.float32
    out = np.empty((ny, nx), f)
    xx = np.arange(nx, dtype=f)[None, :]
    flat = view.ravel()
    for r0 in range(0, ny, _WARP_ROWS):
        yy = np.arange(r0, min(r0 + _WARP_ROWS, ny), dtype=f)[:, None]
        sx = f(m[0, 0]) * xx + (f(m[0, 1]) * yy + f(m[0, 2]))
        sy = f(m[1, 0]) * xx + (f(m[1, 1]) * yy + f(m[1, 2]))
        x0, y0 = np.floor(sx), np.floor(sy)
        fx, fy = sx - x0, sy - y0
        # a point on the last row or column is inside (its right/lower neighbour has weight 0)
        inside = (sx >= 0) & (sx <= nx - 1) & (sy >= 0) & (sy <= ny - 1)
        xi = np.clip(x0, 0, nx - 2).astype(np.intp)
        yi = np.clip(y0, 0, ny - 2).astype(np.intp)
        fx += x0 - xi  # 1 on the last column
        fy += y0 - yi
        i = yi * nx + xi
        a, b, c, d = flat[i], flat[i + 1], flat[i + nx], flat[i + nx + 1]
        top = a + fx * (b - a)
        block = top + fy * ((c + fx * (d - c)) - top)
        block[~inside] = f(cval)
        out[r0:r0 + len(block)] = block
    return out
