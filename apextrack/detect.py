"""Primordium detection: multi-scale, scale-normalised Laplacian of Gaussian (LoG).

Pipeline of :func:`detect_blobs` (2D top view):

0. **Apex region first.** With a region given, only its bounding box (plus a margin that holds
   the photometry annulus) is searched.
1. **Decimated LoG in the Fourier domain.** The image is padded and Fourier transformed once;
   every scale multiplies the spectrum by the exact transfer function of the scale-normalised
   negative LoG ``-σ²∇²G_σ`` and is transformed back on a grid decimated by the largest power
   of two ``f`` that keeps ≥ 1.25 coarse pixels per σ of the smallest scale (keeping only the
   band that grid holds is an ideal anti-alias filter; what it drops is under 1 % of the peak
   response). All scales share one grid, so comparing scales needs no interpolation. This and
   the steps below are what make the detector many times faster than evaluating every scale
   at full resolution (see ``benchmarks/bench_image.py``).
2. **Candidates.** Local maxima in space (3×3) above an adaptive threshold (``k`` × the robust
   standard deviation of that frame's response at that scale) and above a cheap peak test
   against the frame's pixel noise, which are also maxima across the neighbouring scales.
3. **Scale and radius.** The selected scale is refined by a parabola in log σ through the
   responses at the neighbouring scales. For a Gaussian profile of standard deviation ``s`` the
   scale-normalised LoG peaks at σ = ``s`` (Lindeberg 1998, IJCV 30); the reported radius is
   ``radius = √2·σ`` in 2D, which is the radius of a flat disc whose LoG response peaks at σ
   (scikit-image ``blob_log`` convention) — so a Gaussian blob of standard deviation ``s`` is
   reported with ``sigma_px = s`` and ``radius_px = √2·s``.
4. **Subpixel position.** A least-squares fit of a 2D Gaussian plus constant background
   (Levenberg–Marquardt, all blobs in one batch) on a window of ±2.5σ of the full-resolution
   image (wide windows averaged in small blocks, which keeps every pixel's signal; pixels
   beyond the image's edge left out); a candidate the fit cannot turn into a plausible blob (an
   edge or a ridge) is dropped. With ``fit=False`` the
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

import functools
import math

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

DETECTION_COLUMNS = ["x_px", "y_px", "radius_px", "sigma_px", "intensity", "background", "noise",
                     "snr", "integrated_intensity", "response"]

#: Fit windows at least this wide (±px, i.e. σ ≳ 6 px) are averaged in 2×2 blocks before the
#: Gaussian fit (see :func:`_gauss_fit`).
BIN_FIT_HALF = 16
#: Fewest coarse pixels per σ (of the smallest scale) kept when the LoG is evaluated on a
#: decimated grid: the part of the response the coarse grid cannot hold is then under 1 %.
MIN_COARSE_SIGMA = 1.25


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
    """Largest power of two ``f`` (≤ ``max_factor``) that keeps σ/f ≥ :data:`MIN_COARSE_SIGMA`."""
    f = 1
    while f * 2 <= max_factor and sigma / (f * 2) >= MIN_COARSE_SIGMA:
        f *= 2
    return f


def _fast_size(n: int, f: int) -> int:
    """A size ≥ ``n``, a multiple of ``f``, whose quotient by ``f`` is a fast FFT length."""
    from scipy import fft as sfft

    return f * sfft.next_fast_len(-(-n // f), real=True)


def log_stack(image: np.ndarray, sigmas, factor: int | None = None) -> tuple[int, np.ndarray]:
    """Scale-normalised negative LoG at every σ, all on one grid decimated by ``factor``.

    The image is padded (edge values, by more than 4σ of the largest scale) and Fourier
    transformed once; each scale multiplies the spectrum by the exact transfer function of
    ``-σ²∇²G_σ``, ``σ²|ω|²·exp(−σ²|ω|²/2)``, keeps the band the coarse grid can hold (an ideal
    low-pass, so no separate anti-alias smoothing is needed) and transforms back at the coarse
    size. ``factor`` (a power of two) defaults to the largest that keeps ≥ :data:`MIN_COARSE_SIGMA`
    coarse pixels per σ of the smallest scale; the response the coarse grid cannot hold is then
    below 1 % of the peak response.

    Returns ``(factor, cube)``: ``cube[k, i, j]`` is the response at scale ``sigmas[k]`` at fine
    pixel ``(i·factor, j·factor)``.
    """
    from scipy import fft as sfft

    img = np.asarray(image, dtype=np.float32)
    sig = np.atleast_1d(np.asarray(sigmas, dtype=float))
    f = _decimation(float(sig.min())) if factor is None else int(factor)
    ny, nx = img.shape
    m = f * int(math.ceil((4.0 * float(sig.max()) + 2.0) / f))  # margin, a multiple of f
    py, px = _fast_size(ny + 2 * m, f), _fast_size(nx + 2 * m, f)
    pad = np.pad(img, ((m, py - ny - m), (m, px - nx - m)), mode="edge")
    spec = sfft.rfft2(pad)
    my, mx = py // f, px // f
    if f > 1:
        spec = np.concatenate([spec[: my // 2, : mx // 2 + 1], spec[py - my // 2:, : mx // 2 + 1]])
    oy, ox = m // f, m // f
    cy, cx = -(-ny // f), -(-nx // f)
    cube = np.empty((len(sig), cy, cx), np.float32)
    for k, h in enumerate(_log_transfer(my, mx, f, tuple(float(v) for v in sig))):
        r = sfft.irfft2(spec * h, s=(my, mx))
        cube[k] = r[oy:oy + cy, ox:ox + cx]
    return f, cube


@functools.lru_cache(maxsize=8)
def _log_transfer(my: int, mx: int, f: int, sigmas: tuple) -> tuple:
    """Transfer functions of ``-σ²∇²G_σ`` on the half spectrum of an ``my × mx`` grid of spacing
    ``f`` (float32, read-only; cached, since every frame of a stack has the same size)."""
    from scipy import fft as sfft

    wy = (2 * np.pi * sfft.fftfreq(my, d=f)).astype(np.float32)
    wx = (2 * np.pi * sfft.rfftfreq(mx, d=f)).astype(np.float32)
    w2 = wy[:, None] ** 2 + wx[None, :] ** 2
    norm = np.float32(1.0 / (f * f))
    out = []
    for s in sigmas:
        sw = np.float32(s * s) * w2
        h = norm * sw * np.exp(-0.5 * sw)
        h.setflags(write=False)
        out.append(h)
    return tuple(out)


def pyramid_log(image: np.ndarray, sigmas) -> list[tuple[int, np.ndarray]]:
    """Scale-normalised negative LoG at every σ on a decimated grid (see :func:`log_stack`).

    Returns a list of ``(factor, response)``: ``response[i, j]`` is the response at fine pixel
    ``(i·factor, j·factor)``. It matches :func:`log_scale_space` (the full-resolution filter) to
    within the sampling of that filter's kernels.
    """
    f, cube = log_stack(image, sigmas)
    return [(f, r) for r in cube]


def _parabola_offset(a, b, c):
    """Offset of the vertex of the parabola through (-1, a), (0, b), (1, c), clipped to ±0.5."""
    den = a - 2 * b + c
    with np.errstate(invalid="ignore", divide="ignore"):
        off = np.where(den < 0, 0.5 * (a - c) / den, 0.0)
    return np.clip(np.nan_to_num(off), -0.5, 0.5)


def _gauss_fit(img: np.ndarray, y0: np.ndarray, x0: np.ndarray, s0: np.ndarray, half, n_iter: int = 12):
    """Least-squares fit of ``B + A·exp(-((x-x0)²+(y-y0)²)/(2s²))`` to windows of ±``half`` px
    around each start point, all blobs in one batch (damped Gauss–Newton / Levenberg–Marquardt).

    ``half`` may differ from blob to blob. Windows of ±:data:`BIN_FIT_HALF` px or more are
    averaged in ``b × b`` blocks first (``b = ⌈half / 12⌉``, so every window holds at most ~31 ×
    31 values): every pixel still counts, and the block mean of point samples of a Gaussian of
    s.d. ``s`` is, to within ((b² − 1)/12 / s²)², a Gaussian of variance ``s² + (b² − 1)/12`` at
    the block centre, which the fit undoes for ``s`` and ``A`` (the position is unbiased by
    symmetry). Smaller windows are padded with masked values, and so is the part of a window
    beyond the image's edge. A blob stops iterating once its
    accepted position step is under 0.002 px; the model and its Jacobian are evaluated in
    float32 (the 5×5 normal equations are solved in float64).

    Returns arrays ``x, y, s, A, B, ok``.
    """
    y0 = np.asarray(y0, float)
    x0 = np.asarray(x0, float)
    s0 = np.asarray(s0, float)
    k = len(y0)
    ny, nx = img.shape
    half = np.broadcast_to(np.asarray(half, int), (k,))
    b = np.where(half >= BIN_FIT_HALF, np.ceil(half / 12.0), 1).astype(int)
    nb = -(-(2 * half + 1) // b)                    # blocks per side
    n_max, b_max = int(nb.max()), int(b.max())
    start_y = np.rint(y0).astype(int) - (nb * b - 1) // 2
    start_x = np.rint(x0).astype(int) - (nb * b - 1) // 2
    j = np.arange(n_max)
    t = np.arange(b_max)
    rows = start_y[:, None, None] + j[None, :, None] * b[:, None, None] + t[None, None, :]   # (k, N, bmax)
    cols = start_x[:, None, None] + j[None, :, None] * b[:, None, None] + t[None, None, :]
    use = (j[None, :, None] < nb[:, None, None]) & (t[None, None, :] < b[:, None, None])       # (k, N, bmax)
    vals = img[np.clip(rows, 0, ny - 1)[:, :, :, None, None], np.clip(cols, 0, nx - 1)[:, None, None, :, :]]
    wgt = (use[:, :, :, None, None] & use[:, None, None, :, :]).astype(np.float32)
    win = ((vals * wgt).sum(axis=(2, 4)) / (b * b)[:, None, None].astype(np.float32)).reshape(k, -1)
    # a block counts when it is part of this blob's window and lies wholly inside the image
    # (pixels beyond the edge are left out, not replaced by the edge's values)
    in_y = (j[None, :] < nb[:, None]) & (start_y[:, None] + j[None, :] * b[:, None] >= 0) & (
        start_y[:, None] + (j[None, :] + 1) * b[:, None] <= ny)
    in_x = (j[None, :] < nb[:, None]) & (start_x[:, None] + j[None, :] * b[:, None] >= 0) & (
        start_x[:, None] + (j[None, :] + 1) * b[:, None] <= nx)
    mask = (in_y[:, :, None] & in_x[:, None, :]).reshape(k, -1).astype(np.float32)
    centre = (b - 1) / 2.0
    by = (start_y[:, None] + j[None, :] * b[:, None] + centre[:, None]).astype(np.float32)     # (k, N)
    bx = (start_x[:, None] + j[None, :] * b[:, None] + centre[:, None]).astype(np.float32)
    gy = np.repeat(by, n_max, axis=1)
    gx = np.tile(bx, (1, n_max))
    extra = (b * b - 1) / 12.0                      # variance added by the block mean
    s_start = np.sqrt(s0 ** 2 + extra)
    cnt = mask.sum(axis=1).astype(int)
    srt = np.sort(np.where(mask > 0, win, np.float32(np.inf)), axis=1)
    bg = srt[np.arange(k), np.maximum(cnt // 5, 0)].astype(float)
    amp = np.maximum(srt[np.arange(k), np.maximum(cnt - 1, 0)] - bg, 1e-6)
    p = np.column_stack([amp, x0, y0, s_start, bg])
    lam = np.full(k, 1e-3)
    eye = np.eye(5)

    def model(p, g_y, g_x, w, msk):
        q = p.astype(np.float32)
        dx = g_x - q[:, 1:2]
        dy = g_y - q[:, 2:3]
        s2 = q[:, 3:4] ** 2
        e = np.exp(-(dx * dx + dy * dy) / (2 * s2)) * msk
        res = (w - (q[:, 4:5] + q[:, 0:1] * e)) * msk
        return e, dx, dy, s2, res

    e, dx, dy, s2, res = model(p, gy, gx, win, mask)
    cost = np.einsum("ij,ij->i", res, res, dtype=np.float64)
    active = np.ones(k, bool)
    for _ in range(n_iter):
        ia = np.nonzero(active)[0]
        if ia.size == 0:
            break
        pa = p[ia]
        a = pa[:, 0:1].astype(np.float32)
        ea, dxa, dya, s2a = e[ia], dx[ia], dy[ia], s2[ia]
        ae = a * ea / s2a
        jac = np.stack([ea, ae * dxa, ae * dya, ae * (dxa * dxa + dya * dya) / pa[:, 3:4].astype(np.float32),
                        mask[ia]], axis=1)  # (k, 5, n)
        jtj = (jac @ jac.transpose(0, 2, 1)).astype(np.float64)
        jtr = (jac @ res[ia][:, :, None])[:, :, 0].astype(np.float64)
        damp = jtj + lam[ia, None, None] * np.diagonal(jtj, axis1=1, axis2=2)[:, :, None] * eye
        try:
            step = np.linalg.solve(damp, jtr[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            break
        pn = pa + step
        pn[:, 3] = np.abs(pn[:, 3]) + 1e-6
        en, dxn, dyn, s2n, resn = model(pn, gy[ia], gx[ia], win[ia], mask[ia])
        costn = np.einsum("ij,ij->i", resn, resn, dtype=np.float64)
        better = costn < cost[ia]
        ib = ia[better]
        p[ib], e[ib], dx[ib], dy[ib], s2[ib], res[ib] = (pn[better], en[better], dxn[better], dyn[better],
                                                         s2n[better], resn[better])
        cost[ib] = costn[better]
        lam[ia] = np.where(better, lam[ia] * 0.3, lam[ia] * 10.0)
        done = better & (np.abs(step[:, 1:3]) < 2e-3).all(axis=1)
        active[ia[done]] = False
    ok = (np.isfinite(p).all(axis=1) & (p[:, 0] > 0) & (np.abs(p[:, 1] - x0) < np.maximum(s0, 1.0))
          & (np.abs(p[:, 2] - y0) < np.maximum(s0, 1.0)) & (p[:, 3] > 0.4 * s_start) & (p[:, 3] < 2.5 * s_start))
    # undo the block mean: variance s² + (b² − 1)/12, peak A·s²/(s² + (b² − 1)/12)
    s_eff = p[:, 3]
    s = np.sqrt(np.maximum(s_eff ** 2 - extra, 1e-12))
    a = p[:, 0] * s_eff ** 2 / (s * s)
    return p[:, 1], p[:, 2], s, a, p[:, 4], ok


def _ring_stats(img: np.ndarray, ys: np.ndarray, xs: np.ndarray, radii: np.ndarray):
    """Local background (median) and its noise (robust SD) in the annulus ``2r ≤ d ≤ 3r`` around
    each blob, all blobs of similar size at once (a row-wise sort of the masked windows)."""
    ny, nx = img.shape
    n = len(ys)
    bgs, noises, counts = np.full(n, np.nan), np.full(n, np.nan), np.zeros(n, int)
    # windows just large enough for the annulus (a few sizes, so that blobs share a batch)
    sizes = np.array([6, 8, 10, 12, 14, 16, 20, 24, 28, 32, 40, 48, 56, 64, 80, 96, 128, 192])
    want = np.ceil(3 * radii).astype(int) + 1
    halves = np.where(want <= sizes[-1], sizes[np.searchsorted(sizes, np.minimum(want, sizes[-1]))], want)
    for h in np.unique(halves):
        idx = np.nonzero(halves == h)[0]
        off = np.arange(-h, h + 1)
        rows = np.floor(ys[idx]).astype(int)[:, None] + off[None, :]
        cols = np.floor(xs[idx]).astype(int)[:, None] + off[None, :]
        vr = (rows >= 0) & (rows < ny)
        vc = (cols >= 0) & (cols < nx)
        win = img[np.clip(rows, 0, ny - 1)[:, :, None], np.clip(cols, 0, nx - 1)[:, None, :]]
        d2 = (rows[:, :, None] - ys[idx, None, None]) ** 2 + (cols[:, None, :] - xs[idx, None, None]) ** 2
        r2 = radii[idx, None, None] ** 2
        mask = (d2 >= 4 * r2) & (d2 <= 9 * r2) & vr[:, :, None] & vc[:, None, :]
        m = mask.reshape(len(idx), -1)
        cnt = m.sum(axis=1)
        w = np.where(m, win.reshape(len(idx), -1), np.float32(np.inf))
        srt = np.sort(w, axis=1)
        lo, hi = np.maximum(cnt - 1, 0) // 2, cnt // 2
        rr = np.arange(len(idx))
        med = 0.5 * (srt[rr, lo].astype(float) + srt[rr, hi])
        dev = np.sort(np.where(m, np.abs(w - med[:, None].astype(np.float32)), np.float32(np.inf)), axis=1)
        bgs[idx] = med
        noises[idx] = 1.4826 * 0.5 * (dev[rr, lo].astype(float) + dev[rr, hi])
        counts[idx] = cnt
    return bgs, noises, counts


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
        ``region_factor × radius`` from ``(x, y)`` are rejected, and only the region's bounding
        box (with a margin of 4.5 σ of the largest scale) is searched.
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
    if img.ndim != 2 or img.size == 0 or not np.isfinite(img).all():
        return _empty()
    if region is not None and region_factor is not None:
        # only the apex region (and a margin that holds the photometry annulus) is searched
        rx, ry, rr = (float(v) for v in region)
        reach = region_factor * rr + 4.5 * float(sigmas.max()) + 3.0
        y0, x0 = max(0, int(math.floor(ry - reach))), max(0, int(math.floor(rx - reach)))
        y1, x1 = min(img.shape[0], int(math.ceil(ry + reach)) + 1), min(img.shape[1], int(math.ceil(rx + reach)) + 1)
        if y1 - y0 < img.shape[0] or x1 - x0 < img.shape[1]:
            if y1 - y0 < 3 or x1 - x0 < 3:
                return _empty()
            df = detect_blobs(img[y0:y1, x0:x1], sigmas, min_snr=min_snr, border_px=border_px, overlap=overlap,
                              threshold_sd=threshold_sd, region=(rx - x0, ry - y0, rr),
                              region_factor=region_factor, fit=fit)
            if df.empty:
                return df
            df["x_px"] += x0
            df["y_px"] += y0
            return df
    ny, nx = img.shape
    f, cube = log_stack(img, sigmas)
    nk = len(sigmas)
    hh, ww = cube.shape[1:]
    # responses below 1 % of the frame's strongest are never blobs (guards noise-free images)
    floor = 0.01 * float(cube.max())
    # adaptive threshold per scale: threshold_sd × the robust SD of that scale's response
    sub = cube[:, :: max(1, hh // 64), :: max(1, ww // 64)].reshape(nk, -1)
    med = np.median(sub, axis=1)
    thr = np.maximum(threshold_sd * 1.4826 * np.median(np.abs(sub - med[:, None]), axis=1), max(floor, 0.0))
    # a first, cheap peak estimate: at the matching scale the normalised LoG response at the
    # centre of a Gaussian blob is half its amplitude; with the frame's pixel noise (from
    # neighbour differences) it drops clear non-blobs before the per-blob photometry and fit
    half_rows = img.shape[0] // 2
    pix_noise = _robust_sd((img[1::2, :][:half_rows] - img[0::2, :][:half_rows]).ravel()[::7]) / math.sqrt(2.0)
    pre = 0.25 * min_snr * pix_noise if pix_noise > 0 else -np.inf
    # local maxima in space (3×3, edges replicated) above both thresholds: the x neighbours on
    # the whole cube, the rest only at the survivors
    m = (cube > thr[:, None, None]) & (cube >= pre)
    if ww > 1:
        m[:, :, 1:] &= cube[:, :, 1:] >= cube[:, :, :-1]
        m[:, :, :-1] &= cube[:, :, :-1] >= cube[:, :, 1:]
    ks, ys, xs = np.nonzero(m)
    if ks.size == 0:
        return _empty()
    v = cube[ks, ys, xs]
    xl, xr = np.maximum(xs - 1, 0), np.minimum(xs + 1, ww - 1)
    yu, yd = np.maximum(ys - 1, 0), np.minimum(ys + 1, hh - 1)
    keep = np.ones(ks.size, bool)
    for yy in (yu, yd):
        keep &= (v >= cube[ks, yy, xs]) & (v >= cube[ks, yy, xl]) & (v >= cube[ks, yy, xr])
    # ... and not lower than the neighbouring scales at the same grid point
    lo = np.where(ks > 0, cube[np.maximum(ks - 1, 0), ys, xs], -np.inf)
    hi = np.where(ks < nk - 1, cube[np.minimum(ks + 1, nk - 1), ys, xs], -np.inf)
    keep &= (v >= lo) & (v >= hi)
    ks, ys, xs, v, lo, hi = ks[keep], ys[keep], xs[keep], v[keep], lo[keep], hi[keep]
    # subpixel on the coarse grid
    yi = np.clip(ys, 1, max(hh - 2, 0))
    xi = np.clip(xs, 1, max(ww - 2, 0))
    dy = _parabola_offset(cube[ks, yi - 1, xs], v, cube[ks, np.minimum(yi + 1, hh - 1), xs]) * ((ys > 0) & (ys < hh - 1))
    dx = _parabola_offset(cube[ks, ys, xi - 1], v, cube[ks, ys, np.minimum(xi + 1, ww - 1)]) * ((xs > 0) & (xs < ww - 1))
    fy, fx = (ys + dy) * f, (xs + dx) * f
    inside = ((fy >= border_px) & (fy <= ny - 1 - border_px) & (fx >= border_px) & (fx <= nx - 1 - border_px))
    if not inside.any():
        return _empty()
    ks, ys, xs = ks[inside], fy[inside], fx[inside]
    resp, lo, hi = v[inside].astype(float), lo[inside].astype(float), hi[inside].astype(float)
    # refine the scale: parabola in log σ through the neighbouring scales' responses
    logs = np.log(sigmas)
    sig = sigmas[ks].copy()
    if nk >= 3:
        inner = (ks > 0) & (ks < nk - 1)
        if inner.any():
            off = _parabola_offset(lo[inner], resp[inner], hi[inner])
            sig[inner] = np.exp(logs[ks[inner]] + off * (logs[1] - logs[0]))
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
    # photometry at the LoG position: local background (annulus 2r–3r), its noise, and the
    # peak estimate; clear non-blobs are dropped before the (costlier) fit
    bgs, noises, counts = _ring_stats(img, ys, xs, radii)
    for i in np.nonzero(counts < 8)[0]:  # tiny blobs: the whole window outside r instead
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
        noises[i] = _robust_sd(ring) if ring.size >= 8 else _robust_sd(img)
    noises = np.maximum(np.maximum(noises, 1e-6 * np.maximum(np.abs(bgs), 1.0)), 1e-12)
    peaks = 2.0 * resp.astype(float)
    pre = peaks / noises >= 0.5 * min_snr
    ys, xs, resp, sig, radii = ys[pre], xs[pre], resp[pre], sig[pre], radii[pre]
    bgs, noises, peaks = bgs[pre], noises[pre], peaks[pre]
    if len(ys) == 0:
        return _empty()
    # subpixel refinement by a Gaussian fit, all blobs in one batch
    yr, xr = ys.copy(), xs.copy()
    fitted = np.ones(len(ys), bool)
    if fit:
        fitted[:] = False
        # windows of ±2.5σ, rounded up to a few sizes
        sizes = np.array([3, 4, 6, 8, 11, 16, 23, 32, 45, 64])
        want = np.ceil(2.5 * sig)
        halves = np.where(want <= sizes[-1], sizes[np.searchsorted(sizes, np.minimum(want, sizes[-1]))], want).astype(int)
        fx_, fy_, fs_, fa_, fb_, ok = _gauss_fit(img, ys, xs, sig, halves)
        ok &= (fx_ >= 0) & (fx_ <= nx - 1) & (fy_ >= 0) & (fy_ <= ny - 1)
        yr[ok], xr[ok] = fy_[ok], fx_[ok]
        # the fitted amplitude is the peak above the fitted local background
        peaks[ok] = fa_[ok] + fb_[ok] - bgs[ok]
        fitted[ok] = True
    snr = peaks / noises
    # a candidate that no Gaussian blob fits (an edge, a ridge) is not a primordium
    keep = (snr >= min_snr) & fitted
    sel = np.nonzero(keep)[0]
    if sel.size == 0:
        return _empty()
    integ = np.empty(sel.size)
    for n_, i in enumerate(sel):  # integrated intensity above the background within r
        r = float(radii[i])
        y, x = float(yr[i]), float(xr[i])
        lo_y, hi_y = max(0, int(y - r - 1)), min(ny, int(y + r + 2))
        lo_x, hi_x = max(0, int(x - r - 1)), min(nx, int(x + r + 2))
        gy, gx = np.ogrid[lo_y:hi_y, lo_x:hi_x]
        inner = img[lo_y:hi_y, lo_x:hi_x][(gy - y) ** 2 + (gx - x) ** 2 <= r * r]
        integ[n_] = float(np.clip(inner - bgs[i], 0, None).sum())
    order = np.lexsort((xr[sel], yr[sel]))  # by y, then x
    sel, integ = sel[order], integ[order]
    cols = [xr[sel], yr[sel], radii[sel], sig[sel], peaks[sel], bgs[sel], noises[sel], snr[sel], integ, resp[sel]]
    return pd.DataFrame({c: np.asarray(v, dtype=float) for c, v in zip(DETECTION_COLUMNS, cols)})


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
