"""Primordium detection: multi-scale, scale-normalised Laplacian of Gaussian (LoG).

Pipeline of :func:`detect_blobs` (2D top view):

1. **Pyramid LoG.** For every scale σ the image is smoothed and decimated by the largest power
   of two ``f`` that keeps at least 1.6 coarse pixels per σ, and the scale-normalised negative
   LoG ``-σ²∇²G`` is computed on the coarse grid with the remaining scale
   ``√(σ² − σ_aa²)/f`` (Gaussian semigroup: the total smoothing is exactly σ). The coarse scales
   thus cost a fraction of the full-resolution filter; this is what makes the detector many
   times faster than evaluating every scale at full resolution (see ``benchmarks/bench_image.py``).
2. **Candidates.** Local maxima in space on each scale's grid, above an adaptive threshold
   (``k`` × the robust standard deviation of that frame's response at that scale), which are
   also maxima across the neighbouring scales.
3. **Scale and radius.** The selected scale is refined by a parabola in log σ through the
   responses at the neighbouring scales. For a Gaussian profile of standard deviation ``s`` the
   scale-normalised LoG peaks at σ = ``s`` (Lindeberg 1998, IJCV 30); the reported radius is
   ``radius = √2·σ`` in 2D, which is the radius of a flat disc whose LoG response peaks at σ
   (scikit-image ``blob_log`` convention) — so a Gaussian blob of standard deviation ``s`` is
   reported with ``sigma_px = s`` and ``radius_px = √2·s``.
4. **Subpixel position.** A least-squares fit of a 2D Gaussian plus constant background
   (Gauss–Newton, all blobs at once) on a window of ±2.5σ at full resolution; a candidate the
   fit cannot turn into a plausible blob (an edge or a ridge) is dropped. With ``fit=False`` the
   parabola peak of the LoG response is kept instead.
5. **Photometry.** Local background (median of an annulus 2r–3r), its noise (robust SD),
   peak above background, integrated intensity within r and SNR = peak / noise. Blobs under
   ``min_snr`` are dropped. Both thresholds are relative to the frame's own noise, so a frame
   that bleached to a fraction of the first frame's brightness is thresholded alike.
6. **Apex region.** Optionally, blobs farther than ``region_factor`` × the apex region radius
   from its centre are rejected (see :func:`apex_region`).

:func:`detect_blobs_3d` is the optional volumetric detector (anisotropic scale-normalised LoG,
radius = √3·σ in 3D).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

DETECTION_COLUMNS = ["x_px", "y_px", "radius_px", "sigma_px", "intensity", "background", "noise",
                     "snr", "integrated_intensity", "response"]

#: Fewest coarse pixels per σ kept when a scale is evaluated on a decimated grid.
MIN_COARSE_SIGMA = 1.6
#: Smoothing (in fine pixels, × the decimation factor) applied before decimating.
ANTIALIAS_PER_FACTOR = 0.8


def scales_px(diameter_min_um: float, diameter_max_um: float, pixel_size_um: float, n_scales: int) -> np.ndarray:
    """Gaussian σ (pixels) covering a primordium diameter range (µm), geometric spacing.

    A blob of diameter ``D`` has radius ``D/2 = √2·σ``, so σ = D / (2√2) / pixel size.

    Examples
    --------
    >>> [round(float(v), 3) for v in scales_px(4, 8, 1.0, 2)]
    [1.414, 2.828]
    """
    smin = max(diameter_min_um / 2.0 / math.sqrt(2.0) / pixel_size_um, 0.7)
    smax = max(diameter_max_um / 2.0 / math.sqrt(2.0) / pixel_size_um, smin)
    if n_scales <= 1 or smax <= smin * 1.0001:
        return np.array([math.sqrt(smin * smax)])
    return np.geomspace(smin, smax, n_scales)


def log_scale_space(image: np.ndarray, sigmas) -> np.ndarray:
    """Scale-normalised negative Laplacian of Gaussian, ``-σ²∇²G_σ * I``, stacked over σ
    (full resolution; the reference the pyramid is checked against)."""
    img = np.asarray(image, dtype=np.float32)
    return np.stack([-(s ** 2) * ndi.gaussian_laplace(img, s, mode="nearest") for s in sigmas])


def _robust_sd(values: np.ndarray) -> float:
    v = np.asarray(values).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0
    med = np.median(v)
    return float(1.4826 * np.median(np.abs(v - med)))


def _decimation(sigma: float, max_factor: int = 8) -> int:
    f = 1
    while f * 2 <= max_factor and sigma / (f * 2) >= MIN_COARSE_SIGMA:
        f *= 2
    return f


class _Pyramid:
    """Smoothed and decimated copies of one image, made on demand."""

    def __init__(self, img: np.ndarray):
        self.img = img
        self.levels: dict[int, np.ndarray] = {1: img}

    def level(self, f: int) -> np.ndarray:
        if f not in self.levels:
            prev = self.level(f // 2)
            # smoothing from the previous level's ANTIALIAS·(f/2) to ANTIALIAS·f (fine px)
            a_prev = 0.0 if f == 2 else ANTIALIAS_PER_FACTOR * f / 2
            extra = math.sqrt((ANTIALIAS_PER_FACTOR * f) ** 2 - a_prev ** 2) / (f // 2)
            self.levels[f] = ndi.gaussian_filter(prev, extra, mode="nearest")[::2, ::2]
        return self.levels[f]

    @staticmethod
    def antialias(f: int) -> float:
        return 0.0 if f == 1 else ANTIALIAS_PER_FACTOR * f


def pyramid_log(image: np.ndarray, sigmas) -> list[tuple[int, np.ndarray]]:
    """Scale-normalised negative LoG at every σ, each on its own decimated grid.

    Returns a list of ``(factor, response)``: ``response[i, j]`` is the response at fine pixel
    ``(i·factor, j·factor)``. With ``factor == 1`` this equals :func:`log_scale_space`.
    """
    img = np.asarray(image, dtype=np.float32)
    pyr = _Pyramid(img)
    out = []
    for s in np.atleast_1d(sigmas):
        f = _decimation(float(s))
        base = pyr.level(f)
        sc = math.sqrt(max(float(s) ** 2 - pyr.antialias(f) ** 2, 0.25)) / f
        out.append((f, -(float(s) / f) ** 2 * ndi.gaussian_laplace(base, sc, mode="nearest")))
    return out


def _parabola_offset(a, b, c):
    """Offset of the vertex of the parabola through (-1, a), (0, b), (1, c), clipped to ±0.5."""
    den = a - 2 * b + c
    with np.errstate(invalid="ignore", divide="ignore"):
        off = np.where(den < 0, 0.5 * (a - c) / den, 0.0)
    return np.clip(np.nan_to_num(off), -0.5, 0.5)


def _sample(resp: np.ndarray, f: int, y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Bilinear sample of a response on grid ``f`` at fine positions (y, x)."""
    return ndi.map_coordinates(resp, [y / f, x / f], order=1, mode="nearest")


def _gauss_fit(img: np.ndarray, y0: np.ndarray, x0: np.ndarray, s0: np.ndarray, half: int,
               n_iter: int = 12):
    """Least-squares fit of ``B + A·exp(-((x-x0)²+(y-y0)²)/(2s²))`` to windows of ±``half`` px
    around each start point, all blobs at once (damped Gauss–Newton).

    Returns arrays ``x, y, s, A, B, ok``.
    """
    k = len(y0)
    ny, nx = img.shape
    off = np.arange(-half, half + 1)
    cy = np.rint(y0).astype(int)
    cx = np.rint(x0).astype(int)
    rows = np.clip(cy[:, None] + off[None, :], 0, ny - 1)
    cols = np.clip(cx[:, None] + off[None, :], 0, nx - 1)
    win = img[rows[:, :, None], cols[:, None, :]].astype(np.float64).reshape(k, -1)
    gy = np.repeat(rows.astype(float), len(off), axis=1)  # (k, w*w) row coordinate
    gx = np.tile(cols.astype(float), (1, len(off)))
    bg = np.percentile(win, 20, axis=1)
    amp = np.maximum(win.max(axis=1) - bg, 1e-6)
    p = np.column_stack([amp, x0.astype(float), y0.astype(float), s0.astype(float), bg])
    lam = np.full(k, 1e-3)
    eye = np.eye(5)

    def model(p):
        dx = gx - p[:, 1:2]
        dy = gy - p[:, 2:3]
        s2 = p[:, 3:4] ** 2
        e = np.exp(-(dx ** 2 + dy ** 2) / (2 * s2))
        return e, dx, dy, s2

    e, dx, dy, s2 = model(p)
    res = win - (p[:, 4:5] + p[:, 0:1] * e)
    cost = (res ** 2).sum(axis=1)
    for _ in range(n_iter):
        a = p[:, 0:1]
        jac = np.stack([e, a * e * dx / s2, a * e * dy / s2, a * e * (dx ** 2 + dy ** 2) / (s2 * p[:, 3:4]),
                        np.ones_like(e)], axis=2)
        jt = jac.transpose(0, 2, 1)
        jtj = jt @ jac
        jtr = (jt @ res[:, :, None])[:, :, 0]
        damp = jtj + lam[:, None, None] * np.diagonal(jtj, axis1=1, axis2=2)[:, :, None] * eye
        try:
            step = np.linalg.solve(damp, jtr[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            break
        pn = p + step
        pn[:, 3] = np.abs(pn[:, 3]) + 1e-6
        en, dxn, dyn, s2n = model(pn)
        resn = win - (pn[:, 4:5] + pn[:, 0:1] * en)
        costn = (resn ** 2).sum(axis=1)
        better = costn < cost
        p = np.where(better[:, None], pn, p)
        e = np.where(better[:, None], en, e)
        dx = np.where(better[:, None], dxn, dx)
        dy = np.where(better[:, None], dyn, dy)
        s2 = np.where(better[:, None], s2n, s2)
        res = np.where(better[:, None], resn, res)
        cost = np.where(better, costn, cost)
        lam = np.where(better, lam * 0.3, lam * 10.0)
        if np.all(np.abs(step[:, 1:3]) < 2e-3) and better.all():
            break
    ok = (np.isfinite(p).all(axis=1) & (p[:, 0] > 0) & (np.abs(p[:, 1] - x0) < np.maximum(s0, 1.0))
          & (np.abs(p[:, 2] - y0) < np.maximum(s0, 1.0)) & (p[:, 3] > 0.4 * s0) & (p[:, 3] < 2.5 * s0))
    return p[:, 1], p[:, 2], p[:, 3], p[:, 0], p[:, 4], ok


def apex_region(view: np.ndarray, smooth_px: float = 3.0, close_px: float = 0.0) -> tuple[float, float, float]:
    """The apex region of a top view: centre ``(x, y)`` and equivalent radius (pixels).

    The region is the largest connected part of the view (after smoothing and hole filling)
    above a quarter of the way from the background (2nd percentile) to Otsu's threshold; its
    radius is the 95th percentile of the distances of its pixels from its centroid (so that
    primordia on the flanks, which make the region irregular, lie within it). ``close_px`` (e.g. twice the largest primordium
    radius) first joins bright pieces closer than that into one region.

    Examples
    --------
    >>> yy, xx = np.mgrid[:80, :80]
    >>> img = (np.hypot(xx - 40, yy - 30) < 20).astype(float)
    >>> [round(v) for v in apex_region(img, smooth_px=1)]
    [40, 30, 21]
    """
    from skimage.filters import threshold_otsu

    small = np.asarray(view, np.float32)
    f = max(1, int(min(small.shape) // 128))
    if f > 1:
        small = small[::f, ::f]
    img = ndi.gaussian_filter(small, max(smooth_px / f, 0.5))
    ny, nx = img.shape
    if not np.isfinite(img).all() or img.max() <= img.min():
        return (nx - 1) / 2.0 * f, (ny - 1) / 2.0 * f, math.hypot(nx, ny) / 2.0 * f
    # a low threshold (a quarter of the way from the background to Otsu's level) keeps the
    # faint tissue of the dome, not only the bright primordia
    bg = float(np.percentile(img, 2))
    mask = img > bg + 0.25 * (threshold_otsu(img) - bg)
    if close_px > 0:
        # join the primordia into one piece of tissue (where the dome itself is too faint)
        rad = max(1.0, close_px / f)
        padded = np.pad(mask, int(math.ceil(rad)) + 1)
        grown = ndi.distance_transform_edt(~padded) <= rad          # dilation by a disc
        closed = ndi.distance_transform_edt(grown) > rad            # then erosion
        p = int(math.ceil(rad)) + 1
        mask = closed[p:-p, p:-p] | mask
    mask = ndi.binary_fill_holes(mask)
    labels, n = ndi.label(mask)
    if n > 1:
        sizes = ndi.sum(mask, labels, index=np.arange(1, n + 1))
        mask = labels == (1 + int(np.argmax(sizes)))
    yy, xx = np.nonzero(mask)
    cx, cy = float(xx.mean()), float(yy.mean())
    radius = float(np.percentile(np.hypot(xx - cx, yy - cy), 95)) + 0.5
    return cx * f, cy * f, radius * f


def _empty() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=float) for c in DETECTION_COLUMNS})


def detect_blobs(image: np.ndarray, sigmas, min_snr: float = 4.0, border_px: int = 1,
                 overlap: float = 0.5, threshold_sd: float = 3.0, region=None,
                 region_factor: float | None = None, fit: bool = True) -> pd.DataFrame:
    """Find bright blobs in a 2D image with a multi-scale, scale-normalised LoG.

    Parameters
    ----------
    image : (Y, X) array
        Top view.
    sigmas : sequence of float
        Gaussian scales in pixels (see :func:`scales_px`).
    min_snr : float
        Keep blobs whose peak above the local background exceeds ``min_snr`` × background noise.
    border_px : int
        Ignore maxima this close to the image edge.
    overlap : float
        Of two blobs closer than ``overlap`` × the sum of their radii, the weaker is dropped.
    threshold_sd : float
        Candidate threshold: response above ``threshold_sd`` × the robust SD of this frame's
        response at the same scale (adaptive per frame, insensitive to overall brightness).
    region : (x, y, radius) in pixels, optional
        The apex region (see :func:`apex_region`); with ``region_factor``, blobs farther than
        ``region_factor × radius`` from ``(x, y)`` are rejected.
    region_factor : float, optional
    fit : bool
        Refine positions by a least-squares Gaussian fit (else: parabola on the LoG response).

    Returns
    -------
    DataFrame
        One row per blob with columns :data:`DETECTION_COLUMNS` (pixels, intensities in the
        image's units), sorted by y then x.

    Examples
    --------
    >>> yy, xx = np.mgrid[:64, :64]
    >>> img = 100 * np.exp(-((xx - 30.3) ** 2 + (yy - 20.0) ** 2) / (2 * 3.0 ** 2)) + 10
    >>> img = img + np.random.default_rng(0).normal(0, 1, img.shape)
    >>> df = detect_blobs(img, scales_px(6, 14, 1.0, 5))
    >>> len(df), round(float(df.x_px[0]), 1), round(float(df.y_px[0]), 1)
    (1, 30.3, 20.0)
    """
    img = np.asarray(image, dtype=np.float32)
    sigmas = np.atleast_1d(np.asarray(sigmas, dtype=float))
    ny, nx = img.shape
    if img.size == 0 or not np.isfinite(img).all():
        return _empty()
    resps = pyramid_log(img, sigmas)
    nk = len(sigmas)
    cand_k, cand_y, cand_x, cand_v = [], [], [], []
    # responses below 1 % of the frame's strongest are never blobs (guards noise-free images)
    floor = 0.01 * max(float(r.max()) for _, r in resps)
    for k, (f, r) in enumerate(resps):
        sub = r[:: max(1, r.shape[0] // 128), :: max(1, r.shape[1] // 128)]
        thr = max(threshold_sd * _robust_sd(sub), floor)
        peaks = (r == ndi.maximum_filter(r, size=3, mode="nearest")) & (r > max(thr, 0.0))
        ys, xs = np.nonzero(peaks)
        if ys.size == 0:
            continue
        # subpixel on the coarse grid
        yi = np.clip(ys, 1, r.shape[0] - 2)
        xi = np.clip(xs, 1, r.shape[1] - 2)
        dy = _parabola_offset(r[yi - 1, xs], r[ys, xs], r[yi + 1, xs]) * ((ys > 0) & (ys < r.shape[0] - 1))
        dx = _parabola_offset(r[ys, xi - 1], r[ys, xs], r[ys, xi + 1]) * ((xs > 0) & (xs < r.shape[1] - 1))
        fy, fx = (ys + dy) * f, (xs + dx) * f
        inside = ((fy >= border_px) & (fy <= ny - 1 - border_px) & (fx >= border_px) & (fx <= nx - 1 - border_px))
        fy, fx, v = fy[inside], fx[inside], r[ys, xs][inside]
        # maximum across the neighbouring scales
        keep = np.ones(len(v), bool)
        for kk in (k - 1, k + 1):
            if 0 <= kk < nk:
                f2, r2 = resps[kk]
                keep &= v >= _sample(r2, f2, fy, fx)
        cand_k.append(np.full(keep.sum(), k))
        cand_y.append(fy[keep])
        cand_x.append(fx[keep])
        cand_v.append(v[keep])
    if not cand_k or sum(len(c) for c in cand_k) == 0:
        return _empty()
    ks = np.concatenate(cand_k)
    ys = np.concatenate(cand_y)
    xs = np.concatenate(cand_x)
    resp = np.concatenate(cand_v)
    # refine the scale: parabola in log σ through the neighbouring scales' responses
    logs = np.log(sigmas)
    sig = sigmas[ks].copy()
    if nk >= 3:
        inner = (ks > 0) & (ks < nk - 1)
        if inner.any():
            ii = np.nonzero(inner)[0]
            lo = np.array([_sample(resps[k - 1][1], resps[k - 1][0], ys[i:i + 1], xs[i:i + 1])[0] for i, k in zip(ii, ks[ii])])
            hi = np.array([_sample(resps[k + 1][1], resps[k + 1][0], ys[i:i + 1], xs[i:i + 1])[0] for i, k in zip(ii, ks[ii])])
            off = _parabola_offset(lo, resp[ii], hi)
            step = logs[1] - logs[0]
            sig[ii] = np.exp(logs[ks[ii]] + off * step)
    # non-maximum suppression in space (strongest first)
    order = np.argsort(-resp, kind="stable")
    ks, ys, xs, resp, sig = ks[order], ys[order], xs[order], resp[order], sig[order]
    radii = math.sqrt(2.0) * sig
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([ys, xs]))
    suppressed = np.zeros(len(ys), bool)
    keep = []
    rmax = float(radii.max())
    for i in range(len(ys)):
        if suppressed[i]:
            continue
        keep.append(i)
        for j in tree.query_ball_point((ys[i], xs[i]), overlap * (radii[i] + rmax)):
            if j != i and not suppressed[j] and math.hypot(ys[i] - ys[j], xs[i] - xs[j]) < overlap * (radii[i] + radii[j]):
                suppressed[j] = True
    keep = np.asarray(keep, dtype=int)
    ys, xs, resp, sig, radii = ys[keep], xs[keep], resp[keep], sig[keep], radii[keep]
    if region is not None and region_factor is not None:
        rx, ry, rr = region
        inside = np.hypot(xs - rx, ys - ry) <= region_factor * rr
        ys, xs, resp, sig, radii = ys[inside], xs[inside], resp[inside], sig[inside], radii[inside]
    if len(ys) == 0:
        return _empty()
    # a first, cheap peak estimate: at the matching scale the normalised LoG response at the
    # centre of a Gaussian blob is half its amplitude; with the frame's pixel noise (from
    # neighbour differences) it drops clear non-blobs before the per-blob photometry and fit
    pix_noise = _robust_sd((img[1::2, :] [: img.shape[0] // 2] - img[0::2, :][: img.shape[0] // 2]).ravel()[::7]) / math.sqrt(2.0)
    if pix_noise > 0:
        pre = 2.0 * resp / pix_noise >= 0.5 * min_snr
        ys, xs, resp, sig, radii = ys[pre], xs[pre], resp[pre], sig[pre], radii[pre]
        if len(ys) == 0:
            return _empty()
    # photometry at the LoG position: local background (annulus 2r–3r), its noise, and the
    # peak estimate; clear non-blobs are dropped before the (costlier) fit
    n = len(ys)
    bgs, noises, peaks = np.empty(n), np.empty(n), np.empty(n)
    for i in range(n):
        r = float(radii[i])
        y, x = float(ys[i]), float(xs[i])
        lo_y, hi_y = max(0, int(y - 3 * r - 1)), min(ny, int(y + 3 * r + 2))
        lo_x, hi_x = max(0, int(x - 3 * r - 1)), min(nx, int(x + 3 * r + 2))
        sub = img[lo_y:hi_y, lo_x:hi_x]
        gy, gx = np.ogrid[lo_y:hi_y, lo_x:hi_x]
        d = np.hypot(gy - y, gx - x)
        ring = sub[(d >= 2 * r) & (d <= 3 * r)]
        if ring.size < 8:
            ring = sub[d > r]
        bgs[i] = float(np.median(ring)) if ring.size else float(np.median(img))
        noise = _robust_sd(ring) if ring.size >= 8 else _robust_sd(img)
        noises[i] = max(noise, 1e-6 * max(abs(bgs[i]), 1.0), 1e-12)
        peaks[i] = 2.0 * float(resp[i])
    pre = peaks / noises >= 0.5 * min_snr
    ys, xs, resp, sig, radii = ys[pre], xs[pre], resp[pre], sig[pre], radii[pre]
    bgs, noises, peaks = bgs[pre], noises[pre], peaks[pre]
    if len(ys) == 0:
        return _empty()
    # subpixel refinement by a Gaussian fit, grouped by window size
    yr, xr = ys.copy(), xs.copy()
    fitted = np.ones(len(ys), bool)
    if fit:
        fitted[:] = False
        # windows of ±2.5σ, rounded up to a few sizes so that blobs are fitted in few batches
        sizes = np.array([3, 4, 6, 8, 11, 16, 23, 32, 45, 64])
        want = np.ceil(2.5 * sig)
        halves = np.where(want <= sizes[-1], sizes[np.searchsorted(sizes, np.minimum(want, sizes[-1]))], want).astype(int)
        for h in np.unique(halves):
            idx = np.nonzero(halves == h)[0]
            fx_, fy_, fs_, fa_, fb_, ok = _gauss_fit(img, ys[idx], xs[idx], sig[idx], int(h))
            ok &= (fx_ >= 0) & (fx_ <= nx - 1) & (fy_ >= 0) & (fy_ <= ny - 1)
            yr[idx[ok]], xr[idx[ok]] = fy_[ok], fx_[ok]
            # the fitted amplitude is the peak above the fitted local background
            peaks[idx[ok]] = fa_[ok] + fb_[ok] - bgs[idx[ok]]
            fitted[idx[ok]] = True
    snr = peaks / noises
    # a candidate that no Gaussian blob fits (an edge, a ridge) is not a primordium
    keep = (snr >= min_snr) & fitted
    rows = []
    for i in np.nonzero(keep)[0]:
        r = float(radii[i])
        y, x = float(yr[i]), float(xr[i])
        lo_y, hi_y = max(0, int(y - r - 1)), min(ny, int(y + r + 2))
        lo_x, hi_x = max(0, int(x - r - 1)), min(nx, int(x + r + 2))
        gy, gx = np.ogrid[lo_y:hi_y, lo_x:hi_x]
        inner = img[lo_y:hi_y, lo_x:hi_x][np.hypot(gy - y, gx - x) <= r]
        rows.append((x, y, r, float(sig[i]), float(peaks[i]), float(bgs[i]), float(noises[i]), float(snr[i]),
                     float(np.clip(inner - bgs[i], 0, None).sum()), float(resp[i])))
    df = pd.DataFrame(rows, columns=DETECTION_COLUMNS)
    if df.empty:
        return _empty()
    return df.sort_values(["y_px", "x_px"], kind="stable").reset_index(drop=True)


DETECTION_COLUMNS_3D = ["x_px", "y_px", "z_px", "radius_px", "sigma_px", "intensity", "background",
                        "noise", "snr", "response"]


def detect_blobs_3d(volume: np.ndarray, sigmas, z_ratio: float, min_snr: float = 4.0,
                    threshold_sd: float = 3.0, overlap: float = 0.5) -> pd.DataFrame:
    """Find bright blobs in a ``(Z, Y, X)`` volume with an anisotropic scale-normalised LoG.

    Parameters
    ----------
    volume : (Z, Y, X) array
    sigmas : sequence of float
        Scales in x/y pixels.
    z_ratio : float
        z step / x-y pixel size (the scale along z is ``σ / z_ratio`` slices).

    Returns
    -------
    DataFrame
        Columns :data:`DETECTION_COLUMNS_3D`; ``radius_px = √3·σ`` (the 3D convention of
        Lindeberg 1998), positions refined by a parabola on each axis.

    Examples
    --------
    >>> zz, yy, xx = np.mgrid[:12, :40, :40]
    >>> v = 100 * np.exp(-((xx - 20.2) ** 2 + (yy - 18) ** 2 + ((zz - 6) * 2) ** 2) / 18) + 5
    >>> df = detect_blobs_3d(v, [2.0, 3.0, 4.5], z_ratio=2.0)
    >>> len(df), round(float(df.z_px[0]), 1)
    (1, 6.0)
    """
    vol = np.asarray(volume, dtype=np.float32)
    sigmas = np.atleast_1d(np.asarray(sigmas, float))
    cube = []
    for s in sigmas:
        sv = (s / z_ratio, s, s)
        lap = (ndi.gaussian_filter(vol, sv, order=(2, 0, 0), mode="nearest") / z_ratio ** 2
               + ndi.gaussian_filter(vol, sv, order=(0, 2, 0), mode="nearest")
               + ndi.gaussian_filter(vol, sv, order=(0, 0, 2), mode="nearest"))
        cube.append(-(s ** 2) * lap)
    cube = np.stack(cube)
    thr = np.array([threshold_sd * _robust_sd(c[::2, ::2, ::2]) for c in cube])
    peaks = (cube == ndi.maximum_filter(cube, size=3, mode="nearest")) & (cube > thr[:, None, None, None])
    ks, zs, ys, xs = np.nonzero(peaks)
    if ks.size == 0:
        return pd.DataFrame({c: pd.Series(dtype=float) for c in DETECTION_COLUMNS_3D})
    resp = cube[ks, zs, ys, xs]
    order = np.argsort(-resp, kind="stable")
    ks, zs, ys, xs, resp = ks[order], zs[order], ys[order], xs[order], resp[order]
    nz, ny, nx = vol.shape
    keep: list[int] = []
    for i in range(len(ks)):
        ri = math.sqrt(3) * sigmas[ks[i]]
        if all(math.hypot(ys[i] - ys[j], xs[i] - xs[j], (zs[i] - zs[j]) * z_ratio)
               >= overlap * (ri + math.sqrt(3) * sigmas[ks[j]]) for j in keep):
            keep.append(i)
    rows = []
    for i in keep:
        k, z, y, x = int(ks[i]), int(zs[i]), int(ys[i]), int(xs[i])
        c = cube[k]
        pos = []
        for axis, (v, n) in enumerate(((z, nz), (y, ny), (x, nx))):
            if 0 < v < n - 1:
                idx_lo, idx_hi = [z, y, x], [z, y, x]
                idx_lo[axis] -= 1
                idx_hi[axis] += 1
                pos.append(v + float(_parabola_offset(c[tuple(idx_lo)], c[z, y, x], c[tuple(idx_hi)])))
            else:
                pos.append(float(v))
        s = float(sigmas[k])
        r = math.sqrt(3) * s
        zl, zh = max(0, int(z - 3 * r / z_ratio) - 1), min(nz, int(z + 3 * r / z_ratio) + 2)
        yl, yh = max(0, int(y - 3 * r) - 1), min(ny, int(y + 3 * r) + 2)
        xl, xh = max(0, int(x - 3 * r) - 1), min(nx, int(x + 3 * r) + 2)
        sub = vol[zl:zh, yl:yh, xl:xh]
        gz, gy, gx = np.ogrid[zl:zh, yl:yh, xl:xh]
        d = np.sqrt((gy - pos[1]) ** 2 + (gx - pos[2]) ** 2 + ((gz - pos[0]) * z_ratio) ** 2)
        ring = sub[(d >= 2 * r) & (d <= 3 * r)]
        if ring.size < 8:
            ring = sub[d > r]
        background = float(np.median(ring)) if ring.size else float(np.median(vol))
        noise = max(_robust_sd(ring) if ring.size >= 8 else _robust_sd(vol), 1e-12)
        peak = float(vol[z, y, x]) - background
        if peak / noise < min_snr:
            continue
        rows.append((pos[2], pos[1], pos[0], r, s, peak, background, noise, peak / noise, float(resp[i])))
    df = pd.DataFrame(rows, columns=DETECTION_COLUMNS_3D)
    return df.sort_values(["z_px", "y_px", "x_px"], kind="stable").reset_index(drop=True)


def detections_to_um(df: pd.DataFrame, frame: int, time_h: float, pixel_size_um: float) -> pd.DataFrame:
    """Add ``frame``, ``time_h`` and the µm columns of the detections table to a pixel table."""
    out = pd.DataFrame({
        "frame": np.full(len(df), frame, dtype=np.int64),
        "time_h": np.full(len(df), time_h, dtype=float),
        "x_um": df["x_px"].to_numpy(float) * pixel_size_um,
        "y_um": df["y_px"].to_numpy(float) * pixel_size_um,
        "radius_um": df["radius_px"].to_numpy(float) * pixel_size_um,
        "intensity": df["intensity"].to_numpy(float),
        "snr": df["snr"].to_numpy(float),
        "background": df["background"].to_numpy(float),
        "integrated_intensity": df["integrated_intensity"].to_numpy(float) if "integrated_intensity" in df else np.nan,
        "x_px": df["x_px"].to_numpy(float),
        "y_px": df["y_px"].to_numpy(float),
    })
    if "z_px" in df:
        out["z_px"] = df["z_px"].to_numpy(float)
    return out
