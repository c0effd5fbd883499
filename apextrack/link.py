"""Linking detections into tracks (one track per primordium).

Primordia do not wander: after birth on the rim of the apex they drift outward from the apex
centre at a fixed azimuth as r(t) = R·exp(γ(t − τ)) (Richards 1951; Douady & Couder 1992),
while the specimen as a whole may drift and rotate under the objective. In image coordinates
(complex notation z = x + i·y) every primordium then follows

    z_k(t) = c(t) + exp(λ·(t − t_ref))·a_k,      λ = γ + i·ω,     c(t) = c0 + d·(t − t_ref),

a spiral similarity about a linearly drifting centre c(t): γ is the relative radial growth
rate, ω the rotation rate of the specimen and a_k the primordium's offset from the centre at
``t_ref``. :func:`fit_motion` fits this model to a first set of tracks; :func:`link_tracks`
links in two passes (plain nearest-neighbour linking → motion fit → linking again with a
predictor that moves every primordium along the model, ``z(t + Δt) = c(t + Δt) +
exp(λΔt)·(z(t) − c(t))``), falls back to nearest-neighbour linking when the motion cannot be
fitted, splits off tracks that jump, and adds per-track quality columns.

With a linear drift the centre is only weakly fixed by the outward motion alone (a shift of
the centre is almost the same as a change of drift); newly born primordia, which appear on a
circle of radius R about the centre, pin it down. The fit therefore adds that rim constraint
whenever three or more new primordia are seen.
"""

from __future__ import annotations

import functools
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
    """Spiral-similarity motion of the primordia about a moving apex centre.

    Attributes
    ----------
    gamma_per_h : float
        Relative radial growth rate γ (1/h).
    omega_rad_per_h : float
        Rotation rate ω of the specimen in image coordinates (rad/h; positive turns x towards
        +y, i.e. clockwise on the displayed image).
    frame_times_h : ndarray
        Times of the frames.
    frame_centres : ndarray of complex
        Apex centre ``x + i·y`` (µm) in each frame (between frames: linear interpolation).
    t_ref_h : float
        Reference time of the offsets.
    rim_radius_um : float
        Radius of the circle on which new primordia appear (NaN when not fitted).
    rms_um : float
        Root-mean-square position residual of the fit (per axis).
    centre_sd_um : float
        Standard error of the centre (per axis, median over frames).
    n_tracks, n_new : int
        Tracks used and new primordia in the rim constraint.
    anchor : str
        What fixed the common vector of the centres: ``"rim+pattern"`` (births on the rim and
        the regular turn between successive primordia), ``"pattern"``, ``"hint"`` or ``""``.
    offsets : dict
        Offset of each track from the centre at ``t_ref_h`` (complex µm).
    """

    gamma_per_h: float
    omega_rad_per_h: float
    frame_times_h: np.ndarray
    frame_centres: np.ndarray
    t_ref_h: float
    rim_radius_um: float = math.nan
    rms_um: float = math.nan
    centre_sd_um: float = math.nan
    n_tracks: int = 0
    n_new: int = 0
    anchor: str = ""
    offsets: dict = field(default_factory=dict, repr=False)

    def centre(self, t_h) -> np.ndarray:
        """Complex centre ``x + i·y`` at time(s) ``t_h`` (interpolated between frames)."""
        t = np.asarray(t_h, float)
        ft, fc = self.frame_times_h, self.frame_centres
        if len(ft) == 1:
            return np.full(t.shape, fc[0], complex)[()]
        return (np.interp(t, ft, fc.real) + 1j * np.interp(t, ft, fc.imag))[()]

    def predict(self, x, y, t_from_h, t_to_h) -> tuple[np.ndarray, np.ndarray]:
        """Where primordia at ``(x, y)`` at ``t_from_h`` are at ``t_to_h``."""
        z = np.asarray(x, float) + 1j * np.asarray(y, float)
        lam = self.gamma_per_h + 1j * self.omega_rad_per_h
        dt = np.asarray(t_to_h, float) - np.asarray(t_from_h, float)
        zn = self.centre(t_to_h) + np.exp(lam * dt) * (z - self.centre(t_from_h))
        return zn.real, zn.imag

    def centres_table(self, frames, times_h) -> pd.DataFrame:
        """Centre per frame: ``frame``, ``time_h``, ``x_um``, ``y_um``, ``centre_sd_um``."""
        c = np.atleast_1d(self.centre(np.asarray(times_h, float)))
        return pd.DataFrame({"frame": np.asarray(frames, np.int64), "time_h": np.asarray(times_h, float),
                             "x_um": c.real, "y_um": c.imag,
                             "centre_sd_um": np.full(len(c), self.centre_sd_um)})

    def to_dict(self) -> dict:
        """Plain summary (JSON-able): centre in the first frame and mean drift of the centre."""
        ft, fc = self.frame_times_h, self.frame_centres
        drift = complex(np.polyfit(ft, fc.real, 1)[0], np.polyfit(ft, fc.imag, 1)[0]) if len(ft) > 1 else 0j
        return {"growth_rate_per_h": self.gamma_per_h, "rotation_deg_per_h": math.degrees(-self.omega_rad_per_h),
                "centre_x_um": float(fc[0].real), "centre_y_um": float(fc[0].imag),
                "drift_x_um_per_h": drift.real, "drift_y_um_per_h": drift.imag,
                "rim_radius_um": self.rim_radius_um, "rms_um": self.rms_um,
                "centre_sd_um": self.centre_sd_um, "n_tracks": self.n_tracks, "n_new": self.n_new,
                "anchor": self.anchor}


#: Scatter of the second difference of the apex centre between frames (µm) that the motion fit
#: allows for: the centre left by registration moves smoothly, and a frame with one or two
#: primordia cannot place its centre alone (common practice, no source).
CENTRE_STEP_SD_UM = 0.5


class _ProfiledSolver:
    """Least squares of the centres and offsets for a fixed λ = γ + iω, for one set of
    detections (built once, called for every λ the search tries), and the search for λ itself.

    The model ``z_i = c_{f_i} + exp(λ(t_i − t_ref))·a_{k_i}`` (plus the prior rows
    ``smooth·(c_{f−1} − 2c_f + c_{f+1}) = 0``, ``smooth`` in units of the position error) is
    linear in the centres c and offsets a. Its normal equations have a diagonal offset block,
    so the offsets are eliminated; what is left for the centres (the Schur complement) is
    Hermitian and banded, since a track couples only the frames it spans. It is assembled from
    the pairs of detections of each track and factorised by banded Cholesky (LAPACK ``zpbtrf``
    through :func:`scipy.linalg.cholesky_banded`; least squares when not positive definite). The
    cost grows with the number of detections (times the frames a primordium stays in view), not
    with the square of the number of frames as a dense solve of the whole design matrix did.

    The residual left for each λ (the profiled SSE) is minimised over (γ, ω) by
    :meth:`minimise`, damped Newton steps on the exact gradient and Hessian of the profiled SSE
    (:meth:`derivatives`; variable projection, Golub & Pereyra 1973).
    """

    def __init__(self, t, z, fidx, tid, n_frames: int, n: int, t_ref: float, smooth: float = 0.0):
        self.tau = np.asarray(t, float) - t_ref
        self.z = np.asarray(z, complex)
        self.fidx = np.asarray(fidx, np.int64)
        self.tid = np.asarray(tid, np.int64)
        self.n_f, self.n = int(n_frames), int(n)
        self.smooth = float(smooth) if (smooth > 0 and n_frames > 2) else 0.0
        self.cnt = np.bincount(self.fidx, minlength=self.n_f).astype(float)
        self.rf = self._sum_by(self.fidx, self.z, self.n_f)
        # pairs (i, j) of detections of one track with f_i ≤ f_j: entries of the upper band
        order = np.lexsort((self.fidx, self.tid))
        bounds = np.flatnonzero(np.diff(self.tid[order])) + 1
        pi, pj = [], []
        for idx in np.split(order, bounds):
            ii, jj = np.meshgrid(idx, idx, indexing="ij")
            keep = self.fidx[ii] <= self.fidx[jj]
            pi.append(ii[keep])
            pj.append(jj[keep])
        self.pi = np.concatenate(pi) if pi else np.zeros(0, np.int64)
        self.pj = np.concatenate(pj) if pj else np.zeros(0, np.int64)
        d = self.fidx[self.pj] - self.fidx[self.pi]
        self.u = max(int(d.max()) if d.size else 0, 2 if self.smooth else 0)
        self.band_pos = (self.u - d) * self.n_f + self.fidx[self.pj]
        self.pair_k = self.tid[self.pi]
        if self.smooth:
            # DᵀD of the second difference, upper band: diagonal, first and second off-diagonal
            d0 = np.full(self.n_f, 6.0)
            d0[[0, -1]] = 1.0
            if self.n_f > 3:
                d0[[1, -2]] = 5.0
            else:
                d0[1] = 4.0
            d1 = np.full(self.n_f - 1, -4.0)
            d1[[0, -1]] = -2.0
            d2 = np.ones(self.n_f - 2)
            sband = np.zeros((self.u + 1, self.n_f))
            sband[self.u] = d0
            sband[self.u - 1, 1:] = d1
            sband[self.u - 2, 2:] = d2
            self.sband = self.smooth ** 2 * sband

    @staticmethod
    def _sum_by(idx: np.ndarray, w: np.ndarray, size: int) -> np.ndarray:
        """Sums of the complex ``w`` over the groups ``idx`` (0 … size − 1); ``w`` 1-D or one column
        per quantity."""
        if w.ndim == 1:
            return (np.bincount(idx, weights=w.real, minlength=size)
                    + 1j * np.bincount(idx, weights=w.imag, minlength=size))
        return np.column_stack([_ProfiledSolver._sum_by(idx, w[:, j], size) for j in range(w.shape[1])])

    @staticmethod
    def _newton_step(hess: np.ndarray, grad: np.ndarray, damping: float) -> np.ndarray | None:
        """``−(H + damping·I)⁻¹·g`` for the 2 × 2 Hessian ``H``; None when that is not positive
        definite (the step would not descend)."""
        h = hess + damping * np.eye(2)
        det = h[0, 0] * h[1, 1] - h[0, 1] * h[1, 0]
        if not (h[0, 0] > 0 and det > 0):
            return None
        return -np.array([h[1, 1] * grad[0] - h[0, 1] * grad[1], h[0, 0] * grad[1] - h[1, 0] * grad[0]]) / det

    def _normal_solver(self, e: np.ndarray):
        """Solver of the normal equations for ``e = exp(λτ)``: ``solve(u, v) -> (c, a)`` with
        ``[u; v]`` the right-hand side (centre part ``u``, offset part ``v``; 1-D, or one column
        per right-hand side), factorised once for all the right-hand sides of one λ."""
        from scipy.linalg import cho_solve_banded, cholesky_banded

        n_f, n, fidx, tid = self.n_f, self.n, self.fidx, self.tid
        dk = np.maximum(np.bincount(tid, weights=e.real ** 2 + e.imag ** 2, minlength=n), 1e-300)
        # Schur complement M = diag(count) + smooth²·DᵀD − Σ_k b_k b_kᴴ / d_k (upper band)
        v = e[self.pi] * np.conj(e[self.pj]) / dk[self.pair_k]
        band = -self._sum_by(self.band_pos, v, (self.u + 1) * n_f).reshape(self.u + 1, n_f)
        band[self.u] += self.cnt
        if self.smooth:
            band += self.sband
        try:
            chol = cholesky_banded(band, lower=False, check_finite=False)
        except (np.linalg.LinAlgError, ValueError):
            chol = None
        dense = None

        def solve_centres(rhs):
            nonlocal dense
            if chol is not None:
                c = cho_solve_banded((chol, False), rhs, check_finite=False)
                if np.all(np.isfinite(c)):
                    return c
            if dense is None:
                dense = _band_to_dense(band)
            return np.linalg.lstsq(dense, rhs, rcond=None)[0]

        def solve(u, v):
            col = (slice(None),) + (None,) * (np.ndim(v) - 1)  # e and d_k along the rows of v
            c = solve_centres(u - self._sum_by(fidx, e[col] * (v / dk[col])[tid], n_f))
            a = (v - self._sum_by(tid, np.conj(e)[col] * c[fidx], n)) / dk[col]
            return c, a

        return solve

    def _residuals(self, e, c, a) -> tuple[np.ndarray, float]:
        """Position residuals and the SSE (with the prior's) of the coefficients ``c``, ``a``."""
        res = self.z - c[self.fidx] - e * a[self.tid]
        sse = float(np.sum(res.real ** 2 + res.imag ** 2))
        if self.smooth:
            d2 = c[:-2] - 2.0 * c[1:-1] + c[2:]
            sse += self.smooth ** 2 * float(np.sum(d2.real ** 2 + d2.imag ** 2))
        return res, sse

    def _fit(self, gamma: float, omega: float):
        """``e = exp(λτ)``, the normal equations' solver for it and the least-squares
        coefficients ``c``, ``a`` at ``λ = gamma + i·omega``."""
        e = np.exp((gamma + 1j * omega) * self.tau)
        solve = self._normal_solver(e)
        c, a = solve(self.rf, self._sum_by(self.tid, np.conj(e) * self.z, self.n))
        return e, solve, c, a

    def __call__(self, gamma: float, omega: float) -> tuple[np.ndarray, float]:
        """Coefficients ``[c_0 … c_{F−1}, a_0 … a_{n−1}]`` and the residual sum of squares."""
        e, _, c, a = self._fit(gamma, omega)
        return np.concatenate([c, a]), self._residuals(e, c, a)[1]

    def derivatives(self, gamma: float, omega: float) -> tuple[float, np.ndarray, np.ndarray]:
        """The profiled SSE S(γ, ω) (least squares over c and a), its gradient and its Hessian.

        With ``F(θ, x)`` the SSE of the coefficients ``x = (c, a)`` at ``θ = (γ, ω)``, and
        ``x̂(θ)`` its minimiser, ``S = F(θ, x̂)``. The gradient is ``∂F/∂θ`` at ``x̂`` (``∂F/∂x``
        vanishes there). The Hessian is ``∂²F/∂θ² − ∂²F/∂θ∂x · (∂²F/∂x²)⁻¹ · ∂²F/∂x∂θ``, the
        last term solving the normal equations for two more right-hand sides
        ``h_j = Aᴴ·(∂_j A)x̂ − (∂_j A)ᴴ·r`` (``A`` the design, ``r`` the residuals) with the
        factorisation already made: it costs little more than one call.
        """
        tau, tid, fidx, n = self.tau, self.tid, self.fidx, self.n
        e, solve, c, a = self._fit(gamma, omega)
        r, sse = self._residuals(e, c, a)
        ea = e * a[tid]
        dm = tau * ea                          # ∂ model / ∂γ at fixed c, a (∂/∂ω: i·dm)
        w = np.vdot(r, dm)
        p = np.vdot(r, tau * dm)               # ⟨r, ∂²model/∂γ²⟩
        q = float(np.vdot(dm, dm).real)
        grad = np.array([-2.0 * w.real, 2.0 * w.imag])
        hess = np.array([[2.0 * q - 2.0 * p.real, 2.0 * p.imag],
                         [2.0 * p.imag, 2.0 * q + 2.0 * p.real]])
        tce = tau * np.conj(e)
        hc = self._sum_by(fidx, dm, self.n_f)
        h_c = np.column_stack([hc, 1j * hc])
        h_a = np.column_stack([self._sum_by(tid, tce * (ea - r), n),
                               1j * self._sum_by(tid, tce * (ea + r), n)])
        y_c, y_a = solve(h_c, h_a)
        hess -= 2.0 * (np.conj(h_c).T @ y_c + np.conj(h_a).T @ y_a).real
        return sse, grad, 0.5 * (hess + hess.T)

    def minimise(self, gamma: float, omega: float, bound: float, span: float,
                 max_iter: int = 100) -> tuple[float, float, float]:
        """The (γ, ω) of least profiled SSE reached from ``(gamma, omega)`` inside
        ``|γ|, |ω| ≤ bound``, and that SSE.

        Newton steps with the exact Hessian (:meth:`derivatives`), damped by the
        Levenberg–Marquardt rule (``H + μ·s·I``, ``s = |H_γγ| + |H_ωω|`` the Hessian's scale; μ
        raised until that is positive definite, the step stays in the bounds and lowers the
        SSE). It stops when the undamped Newton step is predicted to lower the SSE by at most
        1e-12 of it, or moves ``λ·(t − t_ref)`` by at most 1e-10 over the ``span`` of the record:
        the SSE itself can no longer tell such steps apart (its rounding is not far below), while
        the exact gradient still points the way. The steps shrink quadratically, so that last
        one is taken without evaluating it: it lands on the minimum to within rounding. A start
        out of bounds is moved onto them.
        """
        theta = np.clip([gamma, omega], -bound, bound)
        sse, grad, hess = self.derivatives(*theta)
        if not np.isfinite(sse):
            return float(theta[0]), float(theta[1]), math.inf
        mu = 0.0
        for _ in range(max_iter):
            step = self._newton_step(hess, grad, 0.0)
            if (step is not None and np.all(np.abs(theta + step) <= bound)
                    and (-0.5 * float(grad @ step) <= 1e-12 * sse or np.max(np.abs(step)) * span <= 1e-10)):
                theta = theta + step
                break
            scale = abs(hess[0, 0]) + abs(hess[1, 1])
            while True:
                step = self._newton_step(hess, grad, mu * scale)
                if step is not None and np.all(np.abs(theta + step) <= bound):
                    sse_new, grad_new, hess_new = self.derivatives(*(theta + step))
                    if sse_new <= sse:
                        break
                mu = max(10.0 * mu, 1e-6)
                if mu > 1e10:
                    return float(theta[0]), float(theta[1]), sse
            theta, sse, grad, hess = theta + step, sse_new, grad_new, hess_new
            mu = 0.1 * mu if mu > 1e-6 else 0.0
        return float(theta[0]), float(theta[1]), sse


def _band_to_dense(band: np.ndarray) -> np.ndarray:
    """Full Hermitian matrix from its upper band (LAPACK layout: ``band[u + i − j, j] = M[i, j]``)."""
    u1, n = band.shape
    u = u1 - 1
    m = np.zeros((n, n), band.dtype)
    for k in range(u1):
        off = u - k
        if off >= n:
            continue
        idx = np.arange(off, n)
        m[idx - off, idx] = band[k, off:]
        if off:
            m[idx, idx - off] = np.conj(band[k, off:])
    return m


def _single_blas_thread(func):
    """Run ``func`` with BLAS/LAPACK on one thread: the linking's matrices are small (frames ×
    frames at most), and on a busy machine a multi-threaded BLAS spends far longer waiting for
    its threads than computing (a 50 × 50 pseudo-inverse took 0.2 s instead of 0.5 ms)."""
    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        from threadpoolctl import threadpool_limits

        with threadpool_limits(limits=1, user_api="blas"):
            return func(*args, **kwargs)

    return wrapper


def _fill_centres(centres: np.ndarray, has_data: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Frames without a fitted centre get one interpolated from the others."""
    if has_data.all() or not has_data.any():
        return centres
    out = centres.copy()
    t_ok = times[has_data]
    out[~has_data] = (np.interp(times[~has_data], t_ok, centres[has_data].real)
                      + 1j * np.interp(times[~has_data], t_ok, centres[has_data].imag))
    return out


@_single_blas_thread
def fit_motion(tracks: pd.DataFrame, min_frames: int = 3, max_rate_per_h: float = 1.0,
               rim: bool = True, centre_hint: pd.DataFrame | None = None,
               fixed_centre: bool = False) -> MotionModel | None:
    """Fit the spiral-similarity motion of the primordia (growth, rotation, centre per frame).

    Every detection of a track k in frame f is modelled as ``z = c_f + exp(λ(t_f − t_ref))·a_k``
    with λ = γ + iω common to all primordia: γ the relative radial growth rate, ω the rotation
    rate, c_f the apex centre in frame f (free per frame, so any drift, and any error left by
    registration, is absorbed). For a given λ the model is linear in the centres and offsets;
    λ is found by damped Newton steps on the residual left (its exact derivatives come from
    the same linear solve, :meth:`_ProfiledSolver.minimise`; three starts, from slow to fast
    growth), leaving out detections far off the model (a blob cut by the image border, a wrong
    link) and fitting again (from the previous λ). The motion fixes the centres only up to one
    common vector b (c_f + exp(λ(t_f − t_ref))·b with a_k − b fits as well); the primordia seen
    appearing, which are born on a circle of radius R about the centre, fix b (least squares
    with a soft-L1 loss on both terms).

    The cost grows linearly with the number of frames: the linear sub-problem is solved through
    a banded Schur complement (:class:`_ProfiledSolver`) and the rim fit uses an analytic sparse
    Jacobian with LSMR trust-region steps (:func:`_rim_problem`).

    Parameters
    ----------
    tracks : DataFrame
        ``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um``.
    min_frames : int
        Tracks with fewer detections do not enter the motion fit.
    max_rate_per_h : float
        Largest |γ| and |ω| considered.
    rim : bool
        Add the rim constraint (needs three primordia seen appearing).
    centre_hint : DataFrame, optional
        A rough centre per frame (``frame``, ``x_um``, ``y_um``, e.g. the dome seen in the
        image): used to recognise the primordia seen appearing, and to fix the common vector
        when the rim cannot be used.
    fixed_centre : bool
        One centre for the whole record (the tracks are registered to one frame of reference).
        The outward motion then fixes the centre by itself, without the rim: a free centre per
        frame (or a drifting one) trades off against the centre's position, since a drift d
        looks like a centre shift of d/γ.

    Returns
    -------
    MotionModel or None
        None when fewer than 3 tracks have ``min_frames`` detections or the fit has no
        outward growth.

    Examples
    --------
    >>> t = np.repeat(np.arange(5) * 2.0, 3)
    >>> k = np.tile(np.arange(3), 5)
    >>> z = 50 + 50j + np.exp(0.05 * t) * 20 * np.exp(2j * np.pi * k / 3)
    >>> df = pd.DataFrame({"track_id": k, "frame": (t / 2).astype(int), "time_h": t,
    ...                    "x_um": z.real, "y_um": z.imag})
    >>> round(fit_motion(df, rim=False).gamma_per_h, 4)
    0.05
    """
    from scipy.optimize import least_squares

    if tracks.empty:
        return None
    groups = [g for _, g in tracks.groupby("track_id", sort=True) if g["time_h"].nunique() >= min_frames]
    if len(groups) < 3:
        return None
    if fixed_centre:
        frames = np.sort(tracks["frame"].unique())
        times = tracks.groupby("frame")["time_h"].first().reindex(frames).to_numpy(float)
        # every detection assigned to one pseudo-frame: the per-frame centres become one centre
        one = fit_motion(tracks.assign(frame=int(frames[0])), min_frames, max_rate_per_h, rim=False)
        if one is None:
            return None
        return MotionModel(one.gamma_per_h, one.omega_rad_per_h, times,
                           np.full(len(times), one.frame_centres[0], dtype=complex), one.t_ref_h,
                           rms_um=one.rms_um, n_tracks=one.n_tracks, offsets=one.offsets)
    frame_list = np.sort(tracks["frame"].unique())
    frame_time = tracks.groupby("frame")["time_h"].first().reindex(frame_list).to_numpy(float)
    n_f = len(frame_list)
    dt = float(np.median(np.diff(frame_time))) if n_f > 1 else 1.0
    span = max(float(frame_time[-1] - frame_time[0]), dt)
    t_ref = float(np.mean(frame_time))

    tid_all = np.concatenate([np.full(len(g), i) for i, g in enumerate(groups)])
    t_all = np.concatenate([g["time_h"].to_numpy(float) for g in groups])
    f_all = np.searchsorted(frame_list, np.concatenate([g["frame"].to_numpy() for g in groups]))
    z_all = np.concatenate([g["x_um"].to_numpy(float) + 1j * g["y_um"].to_numpy(float) for g in groups])
    ids_all = np.array([g["track_id"].iloc[0] for g in groups])

    def fit_lambda(solver, start=None):
        # a refit after dropping a few outliers: the optimum moves little, one search from the
        # previous one finds it (the three starts below cost three times as much)
        if start is not None:
            gamma, omega, s = solver.minimise(*start, max_rate_per_h, span)
            if np.isfinite(s):
                return gamma, omega
        # else three starts, from slow to fast growth, the least residual kept
        best = min((solver.minimise(math.log(growth_per_frame) / dt, 0.0, max_rate_per_h, span)
                    for growth_per_frame in (1.01, 1.04, 1.10)), key=lambda r: r[2])
        return best[0], best[1]

    # the centre smoothness prior, weighted against a typical detection error of 0.1 µm
    smooth = 0.1 / CENTRE_STEP_SD_UM
    # a robust start: detections far off the model are left out and the fit is repeated
    keep = np.ones(len(t_all), bool)
    start = None
    for it in range(5):
        codes, uniq = pd.factorize(tid_all[keep], sort=True)
        tid, t, z, fidx, n = codes, t_all[keep], z_all[keep], f_all[keep], len(uniq)
        solver = _ProfiledSolver(t, z, fidx, tid, n_f, n, t_ref, smooth)
        gamma, omega = fit_lambda(solver, start)
        start = (gamma, omega)
        coef, s = solver(gamma, omega)
        pos = np.searchsorted(uniq, tid_all)
        known = (pos < n) & (uniq[np.minimum(pos, n - 1)] == tid_all)
        zm = coef[f_all] + np.exp((gamma + 1j * omega) * (t_all - t_ref)) \
            * np.where(known, coef[n_f + np.minimum(pos, n - 1)], np.nan)
        res = np.abs(z_all - zm)
        limit = max(4.0 * float(np.nanmedian(res[keep])), 0.5)
        new_keep = np.nan_to_num(res, nan=np.inf) <= limit
        counts = np.bincount(tid_all[new_keep], minlength=len(groups))
        new_keep &= counts[tid_all] >= min(min_frames, 3)
        if np.array_equal(new_keep, keep) or len(np.unique(tid_all[new_keep])) < 3 or it == 4:
            break
        keep = new_keep
    ids = list(ids_all[uniq])
    if not gamma > 0:
        return None
    has_data = np.bincount(fidx, minlength=n_f) > 0
    n_par = int(has_data.sum()) + n - 1 + 2
    rms = math.sqrt(s / max(len(t) - n_par, 1) / 2)
    model = MotionModel(gamma, omega, frame_time, _fill_centres(coef[:n_f], has_data, frame_time), t_ref,
                        rms_um=rms, n_tracks=n, offsets={k: complex(a) for k, a in zip(ids, coef[n_f:])})
    hinted = None
    if centre_hint is not None and len(centre_hint):
        h = centre_hint.set_index("frame").reindex(frame_list)
        hz = h["x_um"].to_numpy(float) + 1j * h["y_um"].to_numpy(float)
        ok = np.isfinite(hz)
        if ok.any():
            # the common vector b that brings the motion centres closest to the hint
            e = np.exp((gamma + 1j * omega) * (frame_time - t_ref))
            b = complex(np.sum(np.conj(e[ok]) * (hz[ok] - model.frame_centres[ok])) / np.sum(np.abs(e[ok]) ** 2))
            a_all = np.array(list(model.offsets.values()))
            if abs(b - a_all.mean()) > np.max(np.abs(a_all - a_all.mean())):
                ok[:] = False  # a hint outside the primordia cannot be the centre: not used
        if ok.any():
            hinted = MotionModel(gamma, omega, frame_time, model.frame_centres + e * b, t_ref, rms_um=rms,
                                 n_tracks=n, offsets={k: a - b for k, a in model.offsets.items()}, anchor="hint")
            model = hinted
    if not rim:
        return model
    # the common vector b, first from the regularity of the pattern: successive primordia turn
    # by a common angle about the true centre only (an offset δ at radius r turns an azimuth by
    # about (δ/r)·sin(θ − ψ), Okabe, arXiv:1212.3377). This is what fixes the centre across the
    # line of a distichous pattern, where the rim (births at two opposite azimuths) cannot.
    b = _regular_turn_shift(np.array(list(model.offsets.values())), hinted is not None)
    if b is not None:
        e = np.exp((gamma + 1j * omega) * (frame_time - t_ref))
        model = MotionModel(gamma, omega, frame_time, model.frame_centres + e * b, t_ref, rms_um=rms,
                            n_tracks=n, offsets={k: a - b for k, a in model.offsets.items()}, anchor="pattern")
        hinted = model

    # rim constraint from the primordia seen appearing
    first = tracks.sort_values(["track_id", "frame"], kind="stable").drop_duplicates("track_id")
    f0 = int(frame_list[0])
    sigma_m = max(rms, 0.05)
    inside = _inside_hull_of_frame(tracks, first) if hinted is None else None
    ff_idx = np.searchsorted(frame_list, first["frame"].to_numpy())
    n_seen = tracks.groupby("track_id").size().reindex(first["track_id"]).to_numpy()
    zf = first["x_um"].to_numpy(float) + 1j * first["y_um"].to_numpy(float)
    for it in range(4):
        cen = model.centre(tracks["time_h"].to_numpy(float))
        r_all = np.abs(tracks["x_um"].to_numpy(float) + 1j * tracks["y_um"].to_numpy(float) - cen)
        r_min = pd.Series(r_all, index=tracks.index).groupby(tracks["frame"]).min()
        rf = np.abs(zf - model.frame_centres[ff_idx])
        near_rim = rf <= r_min.reindex(first["frame"]).to_numpy() * math.exp(model.gamma_per_h * dt * 1.5)
        # first round: the centre may still be far off, so a birth is recognised as a track
        # starting after the first frame inside the other primordia of its frame (tracks
        # entering the field of view start on the outside)
        new = (first["frame"].to_numpy() > f0) & (inside if (it == 0 and hinted is None) else near_rim)
        # a blob seen once is too often noise to pin the rim, unless it appears in the last frame
        new &= (n_seen > 1) | (ff_idx == n_f - 1)
        if new.sum() < 3:
            return model
        zn, fn = zf[new], ff_idx[new]
        # the first sighting falls anywhere in the interval after emergence: r spreads by exp(γΔt)
        sigma_r = max(float(np.median(rf[new])) * model.gamma_per_h * dt / math.sqrt(12.0), sigma_m)
        a0 = np.array([model.offsets[k] for k in ids])
        c0 = model.frame_centres
        # successive primordia (older = farther from the centre) and their common turn α
        pa, pb = _successive_pairs(a0)
        turn0 = _turns(a0, pa, pb)
        alpha0 = float(np.angle(np.mean(turn0))) if len(pa) else 0.0
        p0 = np.concatenate([[model.gamma_per_h, model.omega_rad_per_h, float(np.median(rf[new]))],
                             np.column_stack([c0.real, c0.imag]).ravel(),
                             np.column_stack([a0.real, a0.imag]).ravel(), [alpha0]])
        k0 = 3 + 2 * n_f
        resid, jac = _rim_problem(t - t_ref, z, fidx, tid, n_f, n, zn, fn, pa, pb, sigma_m, sigma_r)
        # analytic sparse Jacobian: the trust-region steps are solved by LSMR on it, so a step
        # costs about the number of detections (a dense numerical Jacobian and its SVD grew
        # with the cube of the record length)
        sol = least_squares(resid, p0, jac=jac, loss="soft_l1", f_scale=3.0, x_scale="jac", tr_solver="lsmr")
        p = sol.x
        if not p[0] > 0:
            return model
        dof = max(len(sol.fun) - len(p), 1)
        scale = float(np.sum(sol.fun ** 2) / dof)
        try:
            dvar = _covariance_diagonal(sol.jac, np.arange(3, k0)) * scale
            var_c = (dvar[0::2] + dvar[1::2]) / 2.0
            csd = float(np.sqrt(max(float(np.median(var_c[has_data])), 0.0)))
        except np.linalg.LinAlgError:
            csd = math.nan
        centres = p[3:k0:2] + 1j * p[4:k0:2]
        r_med = float(np.median(np.abs(z - centres[fidx])))
        if not (0 < p[2] < r_med):
            # the circle found is not an inner rim: keep the model without it
            return model
        res_m = sol.fun[: 2 * len(t)] * sigma_m
        model = MotionModel(float(p[0]), float(p[1]), frame_time, _fill_centres(centres, has_data, frame_time),
                            t_ref, rim_radius_um=float(p[2]),
                            rms_um=float(np.sqrt(np.sum(res_m ** 2) / max(len(t), 1) / 2)),
                            centre_sd_um=csd, n_tracks=n, n_new=int(new.sum()), anchor="rim+pattern",
                            offsets={k: complex(p[k0 + 2 * i], p[k0 + 1 + 2 * i]) for i, k in enumerate(ids)})
    return model


def _rim_problem(tau, z, fidx, tid, n_f, n, zn, fn, pa, pb, sigma_m, sigma_r):
    """Residuals and their analytic (sparse) Jacobian for the motion fit with the rim and
    turn-regularity terms.

    Parameters ``p = [γ, ω, R, Re c_0, Im c_0, …, Re a_0, Im a_0, …, α]``; residuals, in this
    order: the positions ``(z − c_f − exp(λτ)·a_k)/σ_m`` (real parts, then imaginary parts), the
    rim ``(|z_new − c_f| − R)/σ_r``, the turns between successive primordia against the common
    one ``(u_j − exp(iα))/TURN_SD_RAD`` (real, imaginary) and the centre smoothness prior
    ``(c_{f−1} − 2c_f + c_{f+1})/CENTRE_STEP_SD_UM`` (real, imaginary). Every row depends on at
    most seven parameters.
    """
    from scipy import sparse

    k0 = 3 + 2 * n_f
    k1 = k0 + 2 * n
    n_par = k1 + 1
    nd, nn, npair, ns = len(z), len(zn), len(pa), max(n_f - 2, 0)
    n_res = 2 * nd + nn + 2 * npair + 2 * ns

    def unpack(p):
        return p[3:k0:2] + 1j * p[4:k0:2], p[k0:k1:2] + 1j * p[k0 + 1:k1:2]

    def resid(p):
        c, a = unpack(p)
        zm = c[fidx] + np.exp((p[0] + 1j * p[1]) * tau) * a[tid]
        rm = (z - zm) / sigma_m
        rr = (np.abs(zn - c[fn]) - p[2]) / sigma_r
        # chord between each turn and the common one: smooth, bounded for outliers
        rt = (_turns(a, pa, pb) - np.exp(1j * p[k1])) / TURN_SD_RAD
        rs = (c[:-2] - 2.0 * c[1:-1] + c[2:]) / CENTRE_STEP_SD_UM
        return np.concatenate([rm.real, rm.imag, rr, rt.real, rt.imag, rs.real, rs.imag])

    # fixed parts of the pattern
    i_m = np.arange(nd)
    cf_re, cf_im = 3 + 2 * fidx, 4 + 2 * fidx
    ak_re, ak_im = k0 + 2 * tid, k0 + 1 + 2 * tid
    i_r = 2 * nd + np.arange(nn)
    i_t = 2 * nd + nn + np.arange(npair)
    i_s = 2 * nd + nn + 2 * npair + np.arange(ns)
    fs = np.arange(ns)

    def jac(p):
        c, a = unpack(p)
        e = np.exp((p[0] + 1j * p[1]) * tau)
        ea = e * a[tid]
        rows, cols, vals = [], [], []

        def put(r, cc, v):
            r, cc, v = np.broadcast_arrays(r, cc, v)
            rows.append(r.ravel())
            cols.append(cc.ravel())
            vals.append(v.ravel())

        # positions: d zm = τ·e·a dγ + iτ·e·a dω + dc + e·da
        g = -tau * ea / sigma_m
        w = -1j * tau * ea / sigma_m
        for base, part in ((i_m, np.real), (i_m + nd, np.imag)):
            put(base, 0, part(g))
            put(base, 1, part(w))
            put(base, ak_re, part(-e / sigma_m))
            put(base, ak_im, part(-1j * e / sigma_m))
        put(i_m, cf_re, np.full(nd, -1.0 / sigma_m))
        put(i_m + nd, cf_im, np.full(nd, -1.0 / sigma_m))
        # rim: d|w| with w = z_new − c
        if nn:
            wv = zn - c[fn]
            aw = np.maximum(np.abs(wv), 1e-12)
            put(i_r, 3 + 2 * fn, -wv.real / aw / sigma_r)
            put(i_r, 4 + 2 * fn, -wv.imag / aw / sigma_r)
            put(i_r, 2, np.full(nn, -1.0 / sigma_r))
        # turns u = exp(i(arg a_b − arg a_a)): du = iu·(d arg a_b − d arg a_a)
        if npair:
            u = _turns(a, pa, pb)
            ab, aa = a[pb], a[pa]
            qb = np.maximum(np.abs(ab) ** 2, 1e-24)
            qa = np.maximum(np.abs(aa) ** 2, 1e-24)
            iu = 1j * u / TURN_SD_RAD
            parts = ((k0 + 2 * pb, iu * (-ab.imag / qb)), (k0 + 1 + 2 * pb, iu * (ab.real / qb)),
                     (k0 + 2 * pa, iu * (aa.imag / qa)), (k0 + 1 + 2 * pa, iu * (-aa.real / qa)))
            for cc, v in parts:
                put(i_t, cc, v.real)
                put(i_t + npair, cc, v.imag)
            da = -1j * np.exp(1j * p[k1]) / TURN_SD_RAD
            put(i_t, k1, np.full(npair, da.real))
            put(i_t + npair, k1, np.full(npair, da.imag))
        # centre smoothness prior
        if ns:
            for off, wgt in ((0, 1.0), (1, -2.0), (2, 1.0)):
                v = np.full(ns, wgt / CENTRE_STEP_SD_UM)
                put(i_s, 3 + 2 * (fs + off), v)
                put(i_s + ns, 4 + 2 * (fs + off), v)
        r = np.concatenate(rows).astype(np.int64)
        cc = np.concatenate(cols).astype(np.int64)
        v = np.concatenate(vals).astype(float)
        return sparse.csr_matrix((v, (r, cc)), shape=(n_res, n_par))

    return resid, jac


#: Largest ``JᵀJ`` (parameters) whose covariance diagonal is taken from a dense Cholesky factor:
#: up to this size that is cheaper than sparse LU solves, one per wanted entry (measured:
#: ~700 parameters, a record of 240 frames, 0.12 s sparse against 0.02 s dense).
_DENSE_COVARIANCE_MAX = 3000


def _covariance_diagonal(jac, idx: np.ndarray) -> np.ndarray:
    """Diagonal entries ``idx`` of ``(JᵀJ)⁻¹`` (the Gauss–Newton covariance up to its scale).

    ``JᵀJ`` is sparse (a centre couples only with the offsets of the primordia seen in its
    frame and with the global parameters). Up to :data:`_DENSE_COVARIANCE_MAX` parameters it is
    factorised densely (Cholesky) and solved for the wanted columns; a larger one is factorised
    once by SuperLU and solved for the wanted columns only, instead of inverting the whole
    matrix. A singular ``JᵀJ`` falls back to the pseudo-inverse."""
    from scipy import sparse

    jj = (jac.T @ jac) if sparse.issparse(jac) else sparse.csr_matrix(np.asarray(jac).T @ np.asarray(jac))
    idx = np.asarray(idx, np.int64)
    cols = np.arange(len(idx))
    rhs = np.zeros((jj.shape[0], len(idx)))
    rhs[idx, cols] = 1.0
    d = None
    if jj.shape[0] <= _DENSE_COVARIANCE_MAX:
        from scipy.linalg import LinAlgError, cho_factor, cho_solve

        try:
            d = cho_solve(cho_factor(jj.toarray(), check_finite=False), rhs, check_finite=False)[idx, cols]
        except LinAlgError:  # not positive definite
            pass
    else:
        from scipy.sparse.linalg import splu

        try:
            d = splu(sparse.csc_matrix(jj)).solve(rhs)[idx, cols]
        except RuntimeError:  # exactly singular
            pass
    if d is not None and np.all(np.isfinite(d)):
        return d
    return np.diag(np.linalg.pinv(jj.toarray()))[idx]


#: Scatter of the turn between successive primordia about the common divergence angle that
#: the centre fit allows for (rad; common practice, no source: about 10°).
TURN_SD_RAD = 0.18


def _successive_pairs(offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices of successive primordia, ranked by distance from the centre (older = farther,
    since all are born on one rim and drift outward together). Pairs with nearly the same
    distance (co-initiated organs, or two pieces of one track) are left out: their order is
    not known."""
    r = np.abs(offsets)
    order = np.argsort(-r, kind="stable")
    if len(order) < 2:
        return np.zeros(0, int), np.zeros(0, int)
    dl = -np.diff(np.log(np.maximum(r[order], 1e-9)))
    ok = dl > 0.3 * float(np.median(dl)) if np.median(dl) > 0 else dl > 0
    return order[:-1][ok], order[1:][ok]


def _turns(offsets: np.ndarray, pa: np.ndarray, pb: np.ndarray) -> np.ndarray:
    """Unit complex turn from primordium ``pa`` to ``pb`` about the centre."""
    u = offsets[pb] * np.conj(offsets[pa])
    return u / np.maximum(np.abs(u), 1e-12)


def _regular_turn_shift(offsets: np.ndarray, near_start: bool) -> complex | None:
    """The shift b of the centre (offsets become ``offsets − b``) about which successive
    primordia turn most regularly (chordal least squares on the turns, common angle fitted).

    The search starts at the present centre when it is already a fair estimate
    (``near_start``), else at the centroid of the offsets (on the line of a distichous
    pattern); it is bounded to half the distance of the nearest primordium, so that the
    degenerate solution far away (every turn 0) cannot be reached. None with fewer than three
    pairs or when the fit does not converge inside the bound."""
    from scipy.optimize import least_squares

    a = np.asarray(offsets, complex)
    if len(a) < 4:
        return None
    start = 0j if near_start else complex(np.mean(a))
    bound = 0.5 * float(np.min(np.abs(a - start)))
    pa, pb = _successive_pairs(a - start)
    if len(pa) < 3 or not bound > 0:
        return None

    def resid(p):
        b = complex(p[0], p[1])
        d = _turns(a - b, pa, pb) - np.exp(1j * p[2])
        return np.concatenate([d.real, d.imag])

    alpha0 = float(np.angle(np.mean(_turns(a - start, pa, pb))))
    lo = [start.real - bound, start.imag - bound, -np.inf]
    hi = [start.real + bound, start.imag + bound, np.inf]
    try:
        sol = least_squares(resid, [start.real, start.imag, alpha0], bounds=(lo, hi), loss="soft_l1",
                            f_scale=2 * math.sin(TURN_SD_RAD))
    except ValueError:
        return None
    b = complex(sol.x[0], sol.x[1])
    if abs(b - start) >= 0.99 * bound:
        return None
    return b


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


# ----------------------------------------------------------------------------- linking


def _link_level(src: np.ndarray, dst: np.ndarray, search_range: float) -> np.ndarray:
    """One frame's links: for each source position (predicted to this frame) the index of the
    destination it continues into, or -1.

    The links minimise the summed squared distances over all sources, a source left unlinked
    costing ``search_range²`` and no link being longer than ``search_range`` (the criterion of
    Crocker & Grier 1996, solved exactly). Sources and destinations are split into the groups
    that lie within reach of each other, and each group is solved as a linear assignment with
    one "no link" column per source (scipy's ``linear_sum_assignment``; forbidden pairs cost ``inf``).
    """
    from scipy.optimize import linear_sum_assignment
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    k, m = len(src), len(dst)
    out = np.full(k, -1, np.int64)
    if not k or not m:
        return out
    pairs = cKDTree(src).sparse_distance_matrix(cKDTree(dst), search_range, output_type="ndarray")
    if not len(pairs):
        return out
    i, j, d = pairs["i"].astype(np.int64), pairs["j"].astype(np.int64), pairs["v"]
    # groups: connected components of the bipartite graph sources (0…k-1) + destinations (k…)
    graph = coo_matrix((np.ones(len(i)), (i, k + j)), shape=(k + m, k + m))
    _, label = connected_components(graph, directed=False)
    order = np.argsort(label[i], kind="stable")
    i, j, d = i[order], j[order], d[order]
    bounds = np.flatnonzero(np.diff(label[i])) + 1
    r2 = search_range * search_range
    for gi, gj, gd in zip(np.split(i, bounds), np.split(j, bounds), np.split(d, bounds)):
        if len(gi) == 1:  # one source within reach of one destination only
            out[gi[0]] = gj[0]
            continue
        us, ri = np.unique(gi, return_inverse=True)
        ud, cj = np.unique(gj, return_inverse=True)
        cost = np.full((len(us), len(ud) + len(us)), np.inf)
        cost[ri, cj] = gd * gd
        cost[np.arange(len(us)), len(ud) + np.arange(len(us))] = r2
        rows, cols = linear_sum_assignment(cost)
        linked = cols < len(ud)
        out[us[rows[linked]]] = ud[cols[linked]]
    return out


def _link_frames(frame: np.ndarray, x: np.ndarray, y: np.ndarray, search_range: float, memory: int,
                 predict=None) -> np.ndarray:
    """Track label of every detection, linked frame by frame.

    Each frame's detections continue the tracks seen in the previous frame or, up to
    ``memory`` frames back, missed since (frames are counted by their numbers, so a frame
    without detections counts as a missed one); the links of a frame are found by
    :func:`_link_level` from where each track's last detection is predicted to be:
    ``predict(x, y, from_frames, to_frame) -> (x, y)``, default unmoved.
    Detections that continue no track start one. Labels are numbered in order of appearance.
    """
    n = len(frame)
    label = np.full(n, -1, np.int64)
    if not n:
        return label
    order = np.lexsort((np.arange(n), frame))
    fs = frame[order]
    starts = np.flatnonzero(np.r_[True, fs[1:] != fs[:-1]])
    ends = np.r_[starts[1:], n]
    # open tracks: their label, last row, and the frame they were last seen in
    open_label = np.zeros(0, np.int64)
    open_row = np.zeros(0, np.int64)
    open_frame = np.zeros(0, np.int64)
    n_labels = 0
    for a, b in zip(starts, ends):
        rows = order[a:b]
        now = int(frame[rows[0]])
        keep = open_frame >= now - 1 - int(memory)
        open_label, open_row, open_frame = open_label[keep], open_row[keep], open_frame[keep]
        sx, sy = x[open_row], y[open_row]
        if predict is not None and len(open_row):
            sx, sy = predict(sx, sy, frame[open_row], now)
        link = _link_level(np.column_stack([sx, sy]), np.column_stack([x[rows], y[rows]]),
                           search_range)
        cont = link >= 0
        label[rows[link[cont]]] = open_label[cont]
        born = rows[label[rows] < 0]
        label[born] = np.arange(n_labels, n_labels + len(born))
        n_labels += len(born)
        # continued tracks move on to this frame's detections; new tracks open here
        moved = np.zeros(len(open_row), bool)
        moved[cont] = True
        open_row = np.r_[open_row[~moved], rows[link[cont]], born]
        open_label = np.r_[open_label[~moved], open_label[cont], label[born]]
        open_frame = np.r_[open_frame[~moved], np.full(int(cont.sum()) + len(born), now)]
    return label


def link_detections(detections: pd.DataFrame, search_range_um: float, memory: int = 2,
                    motion: MotionModel | None = None) -> pd.DataFrame:
    """Link detections frame to frame; returns the detections with an integer ``track_id``.

    A primordium may move at most ``search_range_um`` (from where it is predicted to be)
    between frames and be missed in up to ``memory`` frames; within those limits each frame's
    links minimise the summed squared distances (:func:`_link_level`). With a ``motion`` model
    each primordium is predicted to move along it (growth outward from the centre, rotation,
    drift); without, it is expected to stay put (nearest-neighbour linking). Track ids are
    renumbered from 0 in order of first appearance (frame, then y, then x), so the same input
    always gives the same ids.
    """
    if detections.empty:
        out = detections.copy()
        out["track_id"] = pd.Series(dtype=np.int64)
        return out
    df = detections.reset_index(drop=True).copy()
    predict = None if motion is None else _frame_predictor(motion, df)
    df["track_id"] = _link_frames(df["frame"].to_numpy(np.int64), df["x_um"].to_numpy(float),
                                  df["y_um"].to_numpy(float), float(search_range_um), int(memory), predict)
    return renumber_tracks(df)


def _frame_predictor(motion: MotionModel, detections: pd.DataFrame):
    """``predict(x, y, from_frames, to_frame) -> (x, y)`` moving positions along ``motion``
    between frames (their times taken from the detections' ``time_h``)."""
    ftime = detections.groupby("frame")["time_h"].first()
    times = dict(zip(ftime.index.to_numpy(np.int64).tolist(), ftime.to_numpy(float).tolist()))

    def predict(x, y, from_frames, to_frame):
        t_from = np.array([times[int(f)] for f in from_frames], float)
        return motion.predict(x, y, t_from, times[int(to_frame)])

    return predict


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


@_single_blas_thread
def link_tracks(detections: pd.DataFrame, search_range_um: float, memory: int = 2, *,
                jump_um: float | None = None, min_track_frames: int = 2,
                growth_aware: bool = True, centre_hint: pd.DataFrame | None = None,
                fixed_centre: bool = False) -> tuple[pd.DataFrame, dict]:
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
    centre_hint : DataFrame, optional
        Rough centre per frame for :func:`fit_motion`.
    fixed_centre : bool
        One apex centre for the whole record (registered detections); see :func:`fit_motion`.

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
        model = fit_motion(tracks, centre_hint=centre_hint, fixed_centre=fixed_centre)
        if model is not None:
            tracks2 = link_detections(detections, search_range_um, memory, motion=model)
            model2 = fit_motion(tracks2, centre_hint=centre_hint, fixed_centre=fixed_centre)
            tracks = tracks2
            model = model2 if model2 is not None else model
            info["method"] = "growth-aware prediction (spiral similarity about a drifting centre)"
        else:
            info["note"] = "fewer than 3 tracks of 3 frames: the motion could not be fitted"
    tracks, n_cut = split_jumps(tracks, model, jump) if not tracks.empty else (tracks.assign(_split=False), 0)
    info["n_jumps_split"] = n_cut
    split = tracks.pop("_split").to_numpy(bool) if "_split" in tracks else None
    tracks = track_quality(tracks, model, min_track_frames, split)
    if model is not None:
        tracks = flag_unconfirmed(tracks, model)
    info["n_tracks"] = int(tracks["track_id"].nunique()) if not tracks.empty else 0
    if model is not None:
        info["motion"] = model.to_dict()
    info["model"] = model
    return tracks, info


def flag_unconfirmed(tracks: pd.DataFrame, model: MotionModel) -> pd.DataFrame:
    """Add the flag ``unconfirmed`` to one-detection tracks at the ends of the record that the
    motion cannot explain.

    A primordium seen only in the first frame must have left the region where primordia are
    detected by the second: moved along the motion model it must lie farther from the centre
    than every primordium seen there. One seen only in the last frame must have just been born:
    it must lie on the rim (within one interval's growth of the rim radius, or of the nearest
    primordium of that frame when no rim was fitted). Anything else is most likely a blob of
    noise; it stays in the table, flagged, and is not taken for a primordium.
    """
    if tracks.empty or "track_flags" not in tracks:
        return tracks
    out = tracks.copy()
    frames = np.sort(out["frame"].unique())
    if len(frames) < 2:
        return out
    ftime = out.groupby("frame")["time_h"].first()
    n = out.groupby("track_id")["frame"].transform("size").to_numpy()
    z = out["x_um"].to_numpy(float) + 1j * out["y_um"].to_numpy(float)
    t = out["time_h"].to_numpy(float)
    r = np.abs(z - model.centre(t))
    f = out["frame"].to_numpy()
    bad = np.zeros(len(out), bool)
    # first frame: radius of the blob carried to the second frame vs the farthest there
    t0, t1 = float(ftime[frames[0]]), float(ftime[frames[1]])
    r_far = float(np.max(r[f == frames[1]])) if (f == frames[1]).any() else math.inf
    grow = math.exp(model.gamma_per_h * (t1 - t0))
    bad |= (n == 1) & (f == frames[0]) & (r * grow < r_far)
    # last frame: a newborn primordium sits on the rim
    tl, tp = float(ftime[frames[-1]]), float(ftime[frames[-2]])
    last = f == frames[-1]
    rim = model.rim_radius_um if np.isfinite(model.rim_radius_um) else float(np.min(r[last]))
    bad |= (n == 1) & last & (r > rim * math.exp(model.gamma_per_h * (tl - tp)) * 1.25)
    if bad.any():
        flags = out["track_flags"].astype(str).to_numpy().copy()
        flags[bad] = [";".join([x for x in fl.split(";") if x] + ["unconfirmed"]) for fl in flags[bad]]
        out["track_flags"] = pd.Series(flags, index=out.index, dtype=object)
    return out


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
