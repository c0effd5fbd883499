"""Primordium detection: multi-scale, scale-normalised Laplacian of Gaussian (LoG).

Pipeline of :func:`detect_blobs` (2D top view):

0. **Apex region first.** With a region given, only its bounding box (plus a margin that holds
   the photometry annulus) is searched; the box starts on a multiple of the coarsest grid
   spacing, so that it is searched on the same grid points as the whole frame.
1. **Decimated LoG in the Fourier domain.** The image is padded and Fourier transformed once;
   every scale multiplies the spectrum by the exact transfer function of the scale-normalised
   negative LoG ``-σ²∇²G_σ`` and is transformed back on a grid decimated by the largest power
   of two ``f`` that keeps ≥ 1.25 coarse pixels per σ *of that scale* (keeping only the band
   that grid holds is an ideal anti-alias filter; what it drops is under 1 % of the peak
   response) — so the coarse scales cost a quarter of the fine ones. Each grid is placed
   symmetrically in the frame (it starts ``((n − 1) mod f) / 2`` pixels in, by a phase turn of
   the spectrum), so a frame turned by quarter turns or mirrored is sampled at the turned
   points and gives the turned blobs. Only the band the finest grid holds is computed in the
   forward transform. This and the steps below are what make
   the detector many times faster than evaluating every scale at full resolution (see
   ``benchmarks/bench_image.py``).
2. **Candidates.** Local maxima in space (3×3, on each scale's grid) above an adaptive threshold
   (``k`` × the robust standard deviation of that frame's response at that scale) and above a
   cheap peak test against the frame's pixel noise, which are also maxima across the
   neighbouring scales: the three responses are compared at the subpixel peak (a parabola on
   the grid), each interpolated on its own grid (3×3 quadratic interpolation), so that scales
   on grids of different spacing compare alike and the grid's sampling does not favour the
   wider scale.
3. **Scale and radius.** The selected scale is refined by a parabola in log σ through the
   responses at the neighbouring scales. For a Gaussian profile of standard deviation ``s`` the
   scale-normalised LoG peaks at σ = ``s`` (Lindeberg 1998, IJCV 30); the reported radius is
   ``radius = √2·σ`` in 2D, which is the radius of a flat disc whose LoG response peaks at σ
   (scikit-image ``blob_log`` convention) — so a Gaussian blob of standard deviation ``s`` is
   reported with ``sigma_px = s`` and ``radius_px = √2·s``.
4. **Subpixel position.** A least-squares fit of a 2D Gaussian plus constant background
   (Levenberg–Marquardt, all blobs in one batch, started from the photometry of step 5) on a
   window of ±2.5σ of the full-resolution image (wide windows averaged in small blocks, which
   keeps every pixel's signal; pixels beyond the image's edge left out); a candidate the fit
   cannot turn into a plausible blob (an edge or a ridge) is dropped. With ``fit=False`` the
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
import threading

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

DETECTION_COLUMNS = ["x_px", "y_px", "radius_px", "sigma_px", "intensity", "background", "noise",
                     "snr", "integrated_intensity", "response"]

#: Fit windows at least this wide (±px, i.e. σ ≳ 6 px) are averaged in 2×2 blocks before the
#: Gaussian fit (see :func:`_gauss_fit`).
BIN_FIT_HALF = 16
#: Fewest coarse pixels per σ kept when the LoG of a scale is evaluated on a decimated grid:
#: the part of the response the coarse grid cannot hold is then under 1 %.
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
    med = np.float32(_middle(v)) if v.dtype == np.float32 else _middle(v)
    return float(1.4826 * _middle(np.abs(v - med)))


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
    img = np.asarray(image, dtype=np.float32)
    sig = np.atleast_1d(np.asarray(sigmas, dtype=float))
    f = _decimation(float(sig.min())) if factor is None else int(factor)
    (_, cube), = _log_cubes(img, sig, np.full(len(sig), f)).values()
    return f, cube


def _grid_offsets(frame_shape: tuple[int, int], f: int) -> tuple[float, float]:
    """Where the grid of spacing ``f`` starts in a frame of ``frame_shape`` (fine pixels, y and
    x): ``((n − 1) mod f) / 2``, which places the grid symmetrically in the frame, so that a
    frame turned by quarter turns or mirrored is sampled at the turned or mirrored points."""
    return tuple(((int(n) - 1) % f) / 2.0 for n in frame_shape)


def _log_cubes(img: np.ndarray, sig: np.ndarray, factors: np.ndarray, reuse: bool = False,
               offsets: dict | None = None) -> dict:
    """Scale-normalised negative LoG of a float32 image at every σ, scale ``k`` on the grid
    decimated by ``factors[k]`` (powers of two), all from one Fourier transform (see
    :func:`log_stack`).

    The padded image and the kept band of its spectrum live in work arrays kept per thread
    between calls (frames of a stack share their size): allocating and freeing arrays of
    megabytes for every frame costs more in fresh memory pages than the transforms themselves.

    Returns ``{factor: (ks, cube)}``: ``cube[j, i, l]`` is the response at scale ``sig[ks[j]]``
    at fine pixel ``(i·factor, l·factor)``, for ``i < ⌈ny / factor⌉``, ``l < ⌈nx / factor⌉``;
    with ``offsets`` (``{factor: (dy, dx)}``, fine pixels, below ``factor``) at
    ``(dy + i·factor, dx + l·factor)`` (the spectrum turned by the matching phase).
    With ``reuse``, the cubes are work arrays too, valid until the next call in this thread.
    """
    from scipy import fft as sfft

    factors = np.asarray(factors, dtype=int)
    fmin, fmax = int(factors.min()), int(factors.max())
    ny, nx = img.shape
    m = fmax * int(math.ceil((4.0 * float(sig.max()) + 2.0) / fmax))  # margin, a multiple of every factor
    py, px = _fast_size(ny + 2 * m, fmax), _fast_size(nx + 2 * m, fmax)
    # the image padded with its edge values (as numpy.pad's "edge" mode); the margin rows repeat
    # the first and last padded rows, so only the image's rows are padded (in a work array)
    # and transformed, and their transforms repeated
    pad = _work("pad", (ny, px), np.float32)
    pad[:, m:m + nx] = img
    pad[:, :m] = img[:, :1]
    pad[:, m + nx:] = img[:, -1:]

    def band(spec, n_rows, my, mx, name):
        # the part of a spectrum (rows in FFT order, ``n_rows`` of them) a ``my × mx`` grid
        # holds, rows in that grid's FFT order (``(my + 1) // 2`` non-negative frequencies,
        # then ``my // 2`` negative ones)
        out = _work(name, (my, mx // 2 + 1), np.complex64)
        return np.concatenate([spec[: (my + 1) // 2, : mx // 2 + 1], spec[n_rows - my // 2:, : mx // 2 + 1]],
                              out=out)

    if fmin > 1:
        # only the band the finest coarse grid holds: the rows are transformed a few at a time
        # and their kept half-spectrum columns collected, then only those columns transformed
        keep = px // fmin // 2 + 1
        spec = _work("spec", (py, keep), np.complex64)
        for r0 in range(0, ny, 128):
            spec[m + r0:m + min(r0 + 128, ny)] = sfft.rfft(pad[r0:r0 + 128], axis=1)[:, :keep]
        spec[:m] = spec[m]
        spec[m + ny:] = spec[m + ny - 1]
        spec = band(sfft.fft(spec, axis=0, overwrite_x=True), py, py // fmin, px // fmin, "band")
    else:
        rows = sfft.rfft(pad, axis=1)
        spec = sfft.fft(np.concatenate([np.repeat(rows[:1], m, axis=0), rows,
                                        np.repeat(rows[-1:], py - ny - m, axis=0)]), axis=0, overwrite_x=True)
        spec = spec.astype(np.complex64, copy=False)
    out = {}
    for f in sorted(set(factors.tolist())):
        my, mx = py // f, px // f
        sub = spec if f == fmin else band(spec, py // fmin, my, mx, f"band{f}")
        ks = np.nonzero(factors == f)[0]
        o, cy, cx = m // f, -(-ny // f), -(-nx // f)   # the margin in coarse pixels, the image's size
        cube = _work(f"cube{f}", (len(ks), cy, cx), np.float32) if reuse else np.empty((len(ks), cy, cx), np.float32)
        prod = _work(f"prod{f}", sub.shape, np.complex64)
        dy, dx = (offsets or {}).get(f, (0.0, 0.0))
        if dy or dx:
            # sampled at (dy + i·f, dx + l·f): the spectrum times exp(i(ω_y·dy + ω_x·dx))
            shifted = _work(f"shift{f}", sub.shape, np.complex64)
            sub = np.multiply(sub, _phase(my, mx, f, float(dy), float(dx)), out=shifted)
        for j, h in enumerate(_log_transfer(my, mx, f, tuple(float(v) for v in sig[ks]))):
            np.multiply(sub, h, out=prod)
            cube[j] = sfft.irfft2(prod, s=(my, mx), overwrite_x=True)[o:o + cy, o:o + cx]
        out[f] = (ks, cube)
    return out


_WORK = threading.local()


def _work(name: str, shape: tuple, dtype) -> np.ndarray:
    """A C-contiguous work array of this thread, the front of a buffer kept between calls and
    enlarged when needed (so that frames of slightly different sizes share it); its content is
    not cleared."""
    size = int(np.prod(shape))
    buf = getattr(_WORK, name, None)
    if buf is None or buf.dtype != dtype or buf.size < size:
        buf = np.empty(size, dtype)
        setattr(_WORK, name, buf)
    return buf[:size].reshape(shape)


@functools.lru_cache(maxsize=32)
def _log_transfer(my: int, mx: int, f: int, sigmas: tuple) -> tuple:
    """Transfer functions of ``-σ²∇²G_σ`` on the half spectrum of an ``my × mx`` grid of spacing
    ``f`` (float32, read-only; cached: the frames of a stack, and their apex regions padded to
    fast FFT lengths, come in a few sizes)."""
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


@functools.lru_cache(maxsize=32)
def _phase(my: int, mx: int, f: int, dy: float, dx: float) -> np.ndarray:
    """``exp(i(ω_y·dy + ω_x·dx))`` on the half spectrum of an ``my × mx`` grid of spacing ``f``
    (complex64, read-only): multiplied into a spectrum it samples the image ``dy, dx`` fine pixels
    further on."""
    from scipy import fft as sfft

    wy = 2 * np.pi * sfft.fftfreq(my, d=f)
    wx = 2 * np.pi * sfft.rfftfreq(mx, d=f)
    out = np.exp(1j * (wy[:, None] * dy + wx[None, :] * dx)).astype(np.complex64)
    out.setflags(write=False)
    return out


def pyramid_log(image: np.ndarray, sigmas) -> list[tuple[int, np.ndarray]]:
    """Scale-normalised negative LoG at every σ on a decimated grid (see :func:`log_stack`).

    Returns a list of ``(factor, response)``: ``response[i, j]`` is the response at fine pixel
    ``(i·factor, j·factor)``. It matches :func:`log_scale_space` (the full-resolution filter) to
    within the sampling of that filter's kernels.
    """
    f, cube = log_stack(image, sigmas)
    return [(f, r) for r in cube]


def _parabola_offset(a, b, c):
    """Offset of the vertex of the parabola through (-1, a), (0, b), (1, c), clipped to ±0.5
    (0 where the parabola does not open downwards)."""
    den = np.asarray(a - 2 * b + c)
    off = np.divide(0.5 * (a - c), den, out=np.zeros(den.shape, den.dtype), where=den < 0)
    return np.clip(off, -0.5, 0.5, out=off)


def _gauss_fit(img: np.ndarray, y0: np.ndarray, x0: np.ndarray, s0: np.ndarray, half, n_iter: int = 12,
               a0: np.ndarray | None = None, b0: np.ndarray | None = None):
    """Least-squares fit of ``B + A·exp(-((x-x0)²+(y-y0)²)/(2s²))`` to windows of ±``half`` px
    around each start point, all blobs in one batch (damped Gauss–Newton / Levenberg–Marquardt).

    ``half`` may differ from blob to blob. Windows of ±:data:`BIN_FIT_HALF` px or more are
    averaged in ``b × b`` blocks first (``b = ⌈half / 12⌉``, so every window holds at most ~31 ×
    31 values): every pixel still counts, and the block mean of point samples of a Gaussian of
    s.d. ``s`` is, to within ((b² − 1)/12 / s²)², a Gaussian of variance ``s² + (b² − 1)/12`` at
    the block centre, which the fit undoes for ``s`` and ``A`` (the position is unbiased by
    symmetry). Smaller windows are padded with masked values, and so is the part of a window
    beyond the image's edge. The fit starts from ``(a0, x0, y0, s0, b0)`` (amplitude and
    background by default the window's maximum above its 20th percentile, and that percentile).
    A blob stops iterating once its proposed position step is under 0.005 px, whether the step
    lowers the cost or not as long as the damping is light (a step that small that does not is at
    the float32 noise floor of the cost); the positions are then within about 0.001 px of the
    fully converged ones. The model and its Jacobian are evaluated in float32 (the 5×5 normal
    equations are solved in float64).

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
    # the windows (the part inside the image; the rest is masked below), block means for b > 1
    size = nb * b
    full = np.zeros((k, int(size.max()), int(size.max())), np.float32)
    for i in range(k):
        y_a, y_b = max(int(start_y[i]), 0), min(int(start_y[i] + size[i]), ny)
        x_a, x_b = max(int(start_x[i]), 0), min(int(start_x[i] + size[i]), nx)
        if y_a < y_b and x_a < x_b:
            full[i, y_a - start_y[i]:y_b - start_y[i], x_a - start_x[i]:x_b - start_x[i]] = img[y_a:y_b, x_a:x_b]
    if b_max == 1:
        win = full
    else:
        win = np.zeros((k, n_max, n_max), np.float32)
        for bb in np.unique(b).tolist():
            sel = np.nonzero(b == bb)[0]
            nn = int(nb[sel].max())
            w = full[sel, : nn * bb, : nn * bb]
            if bb > 1:
                w = sum(w[:, t::bb] for t in range(bb))
                w = sum(w[:, :, t::bb] for t in range(bb)) / np.float32(bb * bb)
            win[sel, :nn, :nn] = w
    win = win.reshape(k, -1)
    # a block counts when it is part of this blob's window and lies wholly inside the image
    # (pixels beyond the edge are left out, not replaced by the edge's values)
    in_y = (j[None, :] < nb[:, None]) & (start_y[:, None] + j[None, :] * b[:, None] >= 0) & (
        start_y[:, None] + (j[None, :] + 1) * b[:, None] <= ny)
    in_x = (j[None, :] < nb[:, None]) & (start_x[:, None] + j[None, :] * b[:, None] >= 0) & (
        start_x[:, None] + (j[None, :] + 1) * b[:, None] <= nx)
    mask = (in_y[:, :, None] & in_x[:, None, :]).reshape(k, -1).astype(np.float32)
    win *= mask
    centre = (b - 1) / 2.0
    by = (start_y[:, None] + j[None, :] * b[:, None] + centre[:, None]).astype(np.float32)     # (k, N)
    bx = (start_x[:, None] + j[None, :] * b[:, None] + centre[:, None]).astype(np.float32)
    gy = np.repeat(by, n_max, axis=1)
    gx = np.tile(bx, (1, n_max))
    extra = (b * b - 1) / 12.0                      # variance added by the block mean
    s_start = np.sqrt(s0 ** 2 + extra)
    if a0 is None or b0 is None:
        # start: background the 20th percentile of the window, amplitude its maximum above that
        kth = np.maximum(mask.sum(axis=1).astype(int) // 5, 0)
        part = np.partition(np.where(mask > 0, win, np.float32(np.inf)), np.unique(kth), axis=1)
        bg = part[np.arange(k), kth].astype(float)
        amp = np.maximum(np.where(mask > 0, win, np.float32(-np.inf)).max(axis=1) - bg, 1e-6)
    else:
        # the block mean lowers the peak to A·s²/(s² + (b² − 1)/12)
        bg = np.asarray(b0, float)
        amp = np.maximum(np.asarray(a0, float) * s0 ** 2 / (s0 ** 2 + extra), 1e-6)
    p = np.column_stack([amp, x0, y0, s_start, bg])
    with np.errstate(over="ignore", invalid="ignore"):   # a wild trial step is rejected below
        return _lm_loop(p, x0, y0, s0, s_start, extra, win, mask, gx, gy, n_iter)


def _lm_loop(p, x0, y0, s0, s_start, extra, win, mask, gx, gy, n_iter):
    """The Levenberg–Marquardt iterations of :func:`_gauss_fit` (all blobs in one batch; once
    half of them have converged, the batch is cut down to the rest)."""
    k, n = win.shape
    lam = np.full(k, 1e-3)
    diag = np.arange(5)

    def model(p, out, win, mask, gx, gy):
        # out[:, 0] = the unit Gaussian e (0 where masked), 1 = dx, 2 = dy, 3 = dx² + dy²,
        # 4 = the residual
        q = p.astype(np.float32)
        e, dx, dy, d2, res = out[:, 0], out[:, 1], out[:, 2], out[:, 3], out[:, 4]
        np.subtract(gx, q[:, 1:2], out=dx)
        np.subtract(gy, q[:, 2:3], out=dy)
        np.multiply(dx, dx, out=d2)
        np.multiply(dy, dy, out=e)
        d2 += e
        np.multiply(d2, np.float32(-0.5) / (q[:, 3:4] * q[:, 3:4]), out=e)
        np.exp(e, out=e)
        e *= mask
        np.multiply(q[:, 4:5], mask, out=res)
        np.subtract(win, res, out=res)
        res -= q[:, 0:1] * e
        return out

    data = (win, mask, gx, gy)
    state = model(p, np.empty((k, 5, n), np.float32), *data)
    trial = np.empty_like(state)
    cost = np.einsum("ij,ij->i", state[:, 4], state[:, 4], dtype=np.float64)
    # Jacobian rows (∂/∂A, ∂/∂x0, ∂/∂y0, ∂/∂s, ∂/∂B) and the residual, for one Gram product
    jac = np.empty((k, 6, n), np.float32)
    jac[:, 4] = mask
    active = np.ones(k, bool)
    result = p.copy()
    rows = np.arange(k)                  # the blobs still in the batch
    for _ in range(n_iter):
        n_active = int(active.sum())
        if n_active == 0:
            break
        if 2 * n_active <= len(rows):
            result[rows] = p
            sel = np.nonzero(active)[0]
            rows, p, state, trial, cost, lam, jac, active = (rows[sel], p[sel], state[sel], trial[sel], cost[sel],
                                                              lam[sel], jac[sel], active[sel])
            data = tuple(a[sel] for a in data)
        q = p.astype(np.float32)
        e = state[:, 0]
        jac[:, 0] = e
        np.multiply(e, q[:, 0:1] / (q[:, 3:4] * q[:, 3:4]), out=jac[:, 3])     # A·e/s²
        np.multiply(jac[:, 3], state[:, 1], out=jac[:, 1])
        np.multiply(jac[:, 3], state[:, 2], out=jac[:, 2])
        np.multiply(jac[:, 3], state[:, 3], out=jac[:, 3])
        jac[:, 3] /= q[:, 3:4]
        jac[:, 5] = state[:, 4]
        gram = (jac @ jac.transpose(0, 2, 1)).astype(np.float64)
        damp = gram[:, :5, :5].copy()
        damp[:, diag, diag] *= (1.0 + lam)[:, None]
        try:
            step = np.linalg.solve(damp, gram[:, :5, 5:])[:, :, 0]
        except np.linalg.LinAlgError:
            break
        pn = p + step
        pn[:, 3] = np.abs(pn[:, 3]) + 1e-6
        model(pn, trial, *data)
        costn = np.einsum("ij,ij->i", trial[:, 4], trial[:, 4], dtype=np.float64)
        better = (costn < cost) & active
        if better.all():
            p, cost, state, trial = pn, costn, trial, state
        elif better.any():
            p[better], state[better], cost[better] = pn[better], trial[better], costn[better]
        # converged: the proposed position step is under 0.005 px, taken or, with little
        # damping, not (a step that small which does not lower the cost is at the float32
        # noise floor of the cost)
        active &= ~((np.abs(step[:, 1:3]) < 5e-3).all(axis=1) & (better | (lam <= 1e-2)))
        lam = np.where(better, lam * 0.3, np.where(active, lam * 10.0, lam))
    result[rows] = p
    p = result
    ok = (np.isfinite(p).all(axis=1) & (p[:, 0] > 0) & (np.abs(p[:, 1] - x0) < np.maximum(s0, 1.0))
          & (np.abs(p[:, 2] - y0) < np.maximum(s0, 1.0)) & (p[:, 3] > 0.4 * s_start) & (p[:, 3] < 2.5 * s_start))
    # undo the block mean: variance s² + (b² − 1)/12, peak A·s²/(s² + (b² − 1)/12)
    s_eff = p[:, 3]
    s = np.sqrt(np.maximum(s_eff ** 2 - extra, 1e-12))
    a = p[:, 0] * s_eff ** 2 / (s * s)
    return p[:, 1], p[:, 2], s, a, p[:, 4], ok


def _ring_stats(img: np.ndarray, ys: np.ndarray, xs: np.ndarray, radii: np.ndarray):
    """Local background (median) and its noise (robust SD) in the annulus ``2r ≤ d ≤ 3r`` around
    each blob (pixels within the image only), and the number of pixels in that annulus.

    The annulus masks are formed for blobs of similar size at once (windows of a few sizes),
    the medians blob by blob (a partial sort of the annulus values)."""
    ny, nx = img.shape
    n = len(ys)
    bgs, noises, counts = np.full(n, np.nan), np.full(n, np.nan), np.zeros(n, int)
    # windows just large enough for the annulus (a few sizes, so that blobs share a batch)
    sizes = np.array([6, 8, 10, 12, 14, 16, 20, 24, 28, 32, 40, 48, 56, 64, 80, 96, 128, 192])
    want = np.ceil(3 * radii).astype(int) + 1
    halves = np.where(want <= sizes[-1], sizes[np.searchsorted(sizes, np.minimum(want, sizes[-1]))], want)
    cy, cx = np.floor(ys).astype(int), np.floor(xs).astype(int)
    rings = [np.empty(0, np.float32)] * n
    for h in np.unique(halves).tolist():
        idx = np.nonzero(halves == h)[0]
        off = np.arange(-h, h + 1)
        dy = (cy[idx, None] + off) - ys[idx, None]
        dx = (cx[idx, None] + off) - xs[idx, None]
        d2 = (dy * dy)[:, :, None] + (dx * dx)[:, None, :]
        r2 = (radii[idx] ** 2)[:, None, None]
        ring = (d2 >= 4 * r2) & (d2 <= 9 * r2)
        for n_, i in enumerate(idx.tolist()):
            y0, x0 = cy[i] - h, cx[i] - h
            ya, yb, xa, xb = max(y0, 0), min(y0 + 2 * h + 1, ny), max(x0, 0), min(x0 + 2 * h + 1, nx)
            if ya < yb and xa < xb:
                rings[i] = img[ya:yb, xa:xb][ring[n_, ya - y0:yb - y0, xa - x0:xb - x0]]
    counts[:] = [len(v) for v in rings]
    for i in np.nonzero(counts)[0].tolist():
        v = rings[i]
        med = _middle(v)
        bgs[i] = med
        noises[i] = 1.4826 * _middle(np.abs(v - np.float32(med)))
    return bgs, noises, counts


def _middle(v: np.ndarray) -> float:
    """The median of a 1D array (one partial sort: for an even count, the lower middle value is
    the largest of the values below the upper one)."""
    n = v.size
    part = np.partition(v, n // 2)
    hi = float(part[n // 2])
    return hi if n % 2 else 0.5 * (float(part[: n // 2].max()) + hi)


def _row_medians(x: np.ndarray) -> np.ndarray:
    """``np.median(x, axis=1)`` of a 2D float array with one partial sort per row (see
    :func:`_middle`)."""
    n = x.shape[1]
    part = np.partition(x, n // 2, axis=1)
    hi = part[:, n // 2]
    if n % 2:
        return hi
    return (part[:, : n // 2].max(axis=1) + hi) / x.dtype.type(2)


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
        closed = _disc_morphology(_disc_morphology(padded, rad, grow=True), rad, grow=False)
        p = int(math.ceil(rad)) + 1
        mask = closed[p:-p, p:-p] | mask
    # fill the holes: background not connected (4-neighbours) to the view's edge
    back, n = ndi.label(~mask)
    if n:
        edge = np.unique(np.concatenate([back[0], back[-1], back[:, 0], back[:, -1]]))
        outside = np.zeros(n + 1, bool)
        outside[edge] = True
        outside[0] = False                       # the mask itself
        mask = ~outside[back]
    labels, n = ndi.label(mask)
    if n > 1:
        sizes = np.bincount(labels.ravel(), minlength=n + 1)[1:]
        mask = labels == (1 + int(np.argmax(sizes)))
    yy, xx = np.nonzero(mask)
    cx, cy = float(xx.mean()), float(yy.mean())
    radius = float(np.percentile(np.hypot(xx - cx, yy - cy), 95)) + 0.5
    return cx * f, cy * f, radius * f


def _disc_morphology(mask: np.ndarray, rad: float, grow: bool) -> np.ndarray:
    """Dilation (``grow``) or erosion of a 2D boolean mask by the disc of the pixel offsets
    ``(dy, dx)`` with ``√(dy² + dx²) ≤ rad``; beyond the array the mask is False. The disc is
    the union of its rows: for each row offset, the count of mask pixels in the row's run
    (from running sums along x) is shifted by that offset and tested (any / all)."""
    r = int(math.floor(rad))
    dy = np.arange(-r, r + 1)
    dx = np.arange(0, r + 1)
    # the half-width of the disc's row at each offset (same distance test as a Euclidean
    # distance transform: the square root of the sum of squares, compared with rad)
    half = (np.sqrt(dy[:, None] ** 2 + dx[None, :] ** 2) <= rad).sum(axis=1) - 1
    ny, nx = mask.shape
    # run[:, r + 1 + j] = number of mask pixels in columns ≤ j of the row (0 before the first
    # column, the row's total after the last)
    run = np.zeros((ny, nx + 2 * r + 1), np.int32)
    np.cumsum(mask, axis=1, dtype=np.int32, out=run[:, r + 1:r + 1 + nx])
    run[:, r + 1 + nx:] = run[:, r + nx:r + 1 + nx]
    out = np.zeros(mask.shape, bool) if grow else np.ones(mask.shape, bool)
    tests = {}
    for w in set(half.tolist()):
        count = run[:, r + 1 + w:r + 1 + w + nx] - run[:, r - w:r - w + nx]
        tests[w] = count > 0 if grow else count == 2 * w + 1
    for o, w in zip(dy.tolist(), half.tolist()):
        t = tests[w]
        if abs(o) >= ny:          # the row offset leaves the array
            if not grow:
                out[:] = False
            continue
        if grow:      # out[y] |= t[y - o]
            if o >= 0:
                out[o:] |= t[: ny - o]
            else:
                out[: ny + o] |= t[-o:]
        else:         # out[y] &= t[y + o], False beyond the array
            if o >= 0:
                out[: ny - o] &= t[o:]
                out[ny - o:] = False
            else:
                out[-o:] &= t[: ny + o]
                out[: -o] = False
    return out


_DETECTION_INDEX = pd.Index(DETECTION_COLUMNS)


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
    y0 = x0 = 0
    frame_shape = img.shape
    if region is not None and region_factor is not None:
        # only the apex region (and a margin that holds the photometry annulus) is searched; the
        # box starts on a multiple of the coarsest decimation, so that its coarse grids are
        # those of the whole frame
        rx, ry, rr = (float(v) for v in region)
        reach = region_factor * rr + 4.5 * float(sigmas.max()) + 3.0
        step = max(_decimation(float(v)) for v in sigmas)
        y0, x0 = max(0, int(math.floor(ry - reach))) // step * step, max(0, int(math.floor(rx - reach))) // step * step
        y1, x1 = min(img.shape[0], int(math.ceil(ry + reach)) + 1), min(img.shape[1], int(math.ceil(rx + reach)) + 1)
        if y1 - y0 < 3 or x1 - x0 < 3:
            return _empty()
        img = img[y0:y1, x0:x1]
        region = (rx - x0, ry - y0, rr)
    table = _detect(img, sigmas, min_snr, border_px, overlap, threshold_sd, region, region_factor, fit, frame_shape)
    if table is None:
        return _empty()
    table[:, 0] += x0
    table[:, 1] += y0
    return pd.DataFrame(table, columns=_DETECTION_INDEX)


def _detect(img: np.ndarray, sigmas: np.ndarray, min_snr: float, border_px: int, overlap: float,
            threshold_sd: float, region, region_factor, fit: bool, frame_shape=None) -> np.ndarray | None:
    """The work of :func:`detect_blobs` on a float32 image (a box of a frame of ``frame_shape``
    that starts on a multiple of the coarsest grid spacing): an array of the columns
    :data:`DETECTION_COLUMNS` (one row per blob, sorted by y then x), or None."""
    ny, nx = img.shape
    nk = len(sigmas)
    # every scale on the coarsest grid that keeps ≥ MIN_COARSE_SIGMA coarse pixels per σ, each
    # grid placed symmetrically in the frame
    factors = np.array([_decimation(float(v)) for v in sigmas])
    offsets = {f: _grid_offsets(frame_shape or img.shape, f) for f in set(factors.tolist())}
    groups = _log_cubes(img, sigmas, factors, reuse=True, offsets=offsets)
    # responses below 1 % of the frame's strongest are never blobs (guards noise-free images)
    floor = 0.01 * max(float(cube.max()) for _, cube in groups.values())
    # adaptive threshold per scale: threshold_sd × the robust SD of that scale's response, on a
    # regular sample of about 32 × 32 grid points of each scale (the responses are smooth over
    # σ, so closer samples add little; the estimate differs from that of all grid points by
    # about 4 % rms); grids whose samples are of one size at once
    samples: dict = {}
    for ks, cube in groups.values():
        sub = cube[:, :: max(1, cube.shape[1] // 32), :: max(1, cube.shape[2] // 32)].reshape(len(ks), -1)
        samples.setdefault(sub.shape[1], []).append((ks, sub))
    thr = np.empty(nk)
    for parts in samples.values():
        ks = np.concatenate([p[0] for p in parts])
        sub = np.concatenate([p[1] for p in parts]) if len(parts) > 1 else parts[0][1]
        med = _row_medians(sub)
        thr[ks] = np.maximum(threshold_sd * 1.4826 * _row_medians(np.abs(sub - med[:, None])), max(floor, 0.0))
    # a first, cheap peak estimate: at the matching scale the normalised LoG response at the
    # centre of a Gaussian blob is half its amplitude; with the frame's pixel noise (from
    # neighbour differences) it drops clear non-blobs before the per-blob photometry and fit
    pix_noise = _pair_noise(img)
    pre = 0.25 * min_snr * pix_noise if pix_noise > 0 else -np.inf
    lim = np.maximum(thr, pre)
    found = []
    for f, (ks, cube) in groups.items():
        # local maxima in space (3×3, edges replicated) above both thresholds
        j, ys, xs, v, dy, dx = _local_maxima(cube, lim[ks])
        found.append((ks[j], offsets[f][0] + (ys + dy) * f, offsets[f][1] + (xs + dx) * f))
    ks, fy, fx = (np.concatenate(c) for c in zip(*found))
    inside = ((fy >= border_px) & (fy <= ny - 1 - border_px) & (fx >= border_px) & (fx <= nx - 1 - border_px))
    if not inside.any():
        return None
    ks, ys, xs = ks[inside], fy[inside], fx[inside]
    # ... and not lower than the neighbouring scales: all three compared at the subpixel peak
    # (interpolated on each scale's own grid), so that grids of different spacing compare alike
    resp, lo, hi = _responses_at(groups, nk, np.stack([ks, ks - 1, ks + 1]), ys, xs, offsets)
    keep = (resp >= lo) & (resp >= hi)
    if not keep.any():
        return None
    ks, ys, xs, resp, lo, hi = ks[keep], ys[keep], xs[keep], resp[keep], lo[keep], hi[keep]
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
    keep = _suppress(ys, xs, radii, overlap)
    ys, xs, resp, sig, radii = ys[keep], xs[keep], resp[keep], sig[keep], radii[keep]
    if region is not None and region_factor is not None:
        rx, ry, rr = region
        inside = np.hypot(xs - rx, ys - ry) <= region_factor * rr
        ys, xs, resp, sig, radii = ys[inside], xs[inside], resp[inside], sig[inside], radii[inside]
    if len(ys) == 0:
        return None
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
        return None
    # subpixel refinement by a Gaussian fit, all blobs in one batch
    yr, xr = ys.copy(), xs.copy()
    fitted = np.ones(len(ys), bool)
    if fit:
        fitted[:] = False
        # windows of ±2.5σ, rounded up to a few sizes
        sizes = np.array([3, 4, 6, 8, 11, 16, 23, 32, 45, 64])
        want = np.ceil(2.5 * sig)
        halves = np.where(want <= sizes[-1], sizes[np.searchsorted(sizes, np.minimum(want, sizes[-1]))], want).astype(int)
        # started from the photometry: peak estimate above the annulus background
        fx_, fy_, fs_, fa_, fb_, ok = _gauss_fit(img, ys, xs, sig, halves, a0=peaks, b0=bgs)
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
        return None
    sel = sel[np.lexsort((xr[sel], yr[sel]))]  # by y, then x
    integ = _disc_sum(img, yr[sel], xr[sel], radii[sel], bgs[sel])
    cols = [xr[sel], yr[sel], radii[sel], sig[sel], peaks[sel], bgs[sel], noises[sel], snr[sel], integ, resp[sel]]
    return np.column_stack(cols).astype(float, copy=False)


def _local_maxima(cube: np.ndarray, lim: np.ndarray):
    """Grid points of each plane of ``cube`` above that plane's ``lim`` and not lower than any of
    their 8 neighbours (edges replicated), and the parabola offsets of the peak in y and x (zero
    at the edges). Only the points above the threshold are examined (flat indices), their x
    neighbours first, the rest at the survivors only.

    Returns ``plane, y, x, value, dy, dx``.
    """
    nk, hh, ww = cube.shape
    flat = cube.reshape(-1)
    idx = np.flatnonzero(cube > lim.astype(np.float32)[:, None, None])
    xs = idx % ww
    # the point and its left and right neighbours (edges replicated)
    run = np.stack([idx, idx - (xs > 0), idx + (xs < ww - 1)])
    val = flat[run]
    keep = (val[0] >= val[1]) & (val[0] >= val[2])
    run, val = run[:, keep], val[:, keep]
    ys = (run[0] // ww) % hh
    up = flat[run - ww * (ys > 0)]
    down = flat[run + ww * (ys < hh - 1)]
    keep = (val[0] >= up.max(axis=0)) & (val[0] >= down.max(axis=0))
    run, val, up, down, ys = run[:, keep], val[:, keep], up[0, keep], down[0, keep], ys[keep]
    xs = run[0] % ww
    dy = _parabola_offset(up, val[0], down) * ((ys > 0) & (ys < hh - 1))
    dx = _parabola_offset(val[1], val[0], val[2]) * ((xs > 0) & (xs < ww - 1))
    return run[0] // (hh * ww), ys, xs, val[0], dy, dx


def _responses_at(groups: dict, nk: int, k: np.ndarray, y: np.ndarray, x: np.ndarray,
                  offsets: dict | None = None) -> np.ndarray:
    """Responses at scales ``k`` (any shape, last axis the points; ``-inf`` for a scale outside
    ``0 … nk − 1``) at the fine-pixel positions ``(y, x)``: on each scale's own grid, the 3×3
    tensor-product quadratic (Lagrange) interpolant around the nearest grid point (edges
    replicated). ``groups`` and ``offsets`` are those of :func:`_log_cubes`."""
    k = np.asarray(k)
    yy = np.broadcast_to(y, k.shape)
    xx = np.broadcast_to(x, k.shape)
    out = np.full(k.shape, -np.inf)
    for f, (ks, cube) in groups.items():
        plane = np.full(nk + 2, -1)
        plane[ks + 1] = np.arange(len(ks))
        jp = plane[np.clip(k, -1, nk) + 1]
        sel = jp >= 0
        if not sel.any():
            continue
        oy, ox = (offsets or {}).get(f, (0.0, 0.0))
        j, gy, gx = jp[sel], (yy[sel] - oy) / f, (xx[sel] - ox) / f
        hh, ww = cube.shape[1:]
        iy = np.clip(np.rint(gy), 0, hh - 1).astype(int)
        ix = np.clip(np.rint(gx), 0, ww - 1).astype(int)
        ty = np.clip(gy - iy, -0.5, 0.5)[:, None]
        tx = np.clip(gx - ix, -0.5, 0.5)[:, None]
        o = np.arange(-1, 2)
        rows = np.clip(iy[:, None] + o, 0, hh - 1)
        cols = np.clip(ix[:, None] + o, 0, ww - 1)
        vals = cube[j[:, None, None], rows[:, :, None], cols[:, None, :]].astype(float)
        wy = np.concatenate([0.5 * ty * (ty - 1), 1 - ty * ty, 0.5 * ty * (ty + 1)], axis=1)
        wx = np.concatenate([0.5 * tx * (tx - 1), 1 - tx * tx, 0.5 * tx * (tx + 1)], axis=1)
        out[sel] = np.einsum("na,nab,nb->n", wy, vals, wx)
    return out


def _pair_noise(img: np.ndarray) -> float:
    """Pixel noise of an image from the differences of vertically neighbouring pixel pairs (rows
    ``2i`` and ``2i + 1``; in a large image only every ``r``-th such pair of rows, so that about
    32 768 differences are formed; every 7th of them in raster order): robust SD / √2."""
    half_rows = img.shape[0] // 2
    step = max(1, (half_rows * img.shape[1]) // 32768)
    d = img[1:2 * half_rows:2 * step] - img[0:2 * half_rows:2 * step]
    return _robust_sd(d.ravel()[::7]) / math.sqrt(2.0)


def _suppress(ys: np.ndarray, xs: np.ndarray, radii: np.ndarray, overlap: float) -> np.ndarray:
    """Greedy non-maximum suppression of blobs given strongest first: a blob closer than
    ``overlap`` × the sum of the radii to a kept one is dropped. Returns the kept indices."""
    n = len(ys)
    suppressed = np.zeros(n, bool)
    keep = []
    if n <= 2048:
        # all pairs at once; a blob can only be suppressed by a stronger one that is kept
        dist = np.hypot(ys[:, None] - ys[None, :], xs[:, None] - xs[None, :])
        near = dist < overlap * (radii[:, None] + radii[None, :])
        for i in range(n):
            if not suppressed[i]:
                keep.append(i)
                suppressed |= near[i]
        return np.asarray(keep, dtype=int)
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([ys, xs]))
    rmax = float(radii.max())
    for i in range(n):
        if suppressed[i]:
            continue
        keep.append(i)
        for j in tree.query_ball_point((ys[i], xs[i]), overlap * (radii[i] + rmax)):
            if j != i and not suppressed[j] and math.hypot(ys[i] - ys[j], xs[i] - xs[j]) < overlap * (radii[i] + radii[j]):
                suppressed[j] = True
    return np.asarray(keep, dtype=int)


def _disc_sum(img: np.ndarray, ys: np.ndarray, xs: np.ndarray, radii: np.ndarray, bgs: np.ndarray) -> np.ndarray:
    """Integrated intensity above the background within ``r`` of each blob: the sum over the
    image's pixels with ``(i − y)² + (j − x)² ≤ r²`` of ``max(I − background, 0)``."""
    ny, nx = img.shape
    out = np.zeros(len(ys))
    if len(ys) == 0:
        return out
    h = int(math.ceil(float(radii.max()))) + 1      # a window of ±h around the nearest pixel holds the disc
    off = np.arange(-h, h + 1)
    step = max(1, 2_000_000 // off.size ** 2)        # blobs per batch (bounded memory)
    for s0 in range(0, len(ys), step):
        y, x, r, bg = ys[s0:s0 + step], xs[s0:s0 + step], radii[s0:s0 + step], bgs[s0:s0 + step]
        rows = np.rint(y).astype(int)[:, None] + off
        cols = np.rint(x).astype(int)[:, None] + off
        dy2 = np.where((rows >= 0) & (rows < ny), (rows - y[:, None]) ** 2, np.inf)
        dx2 = np.where((cols >= 0) & (cols < nx), (cols - x[:, None]) ** 2, np.inf)
        disc = dy2[:, :, None] + dx2[:, None, :] <= (r * r)[:, None, None]
        vals = img[np.clip(rows, 0, ny - 1)[:, :, None], np.clip(cols, 0, nx - 1)[:, None, :]]
        out[s0:s0 + step] = np.where(disc, np.maximum(vals - bg[:, None, None], 0.0), 0.0).sum(axis=(1, 2))
    return out


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


def detection_columns(df: pd.DataFrame, frame: int, time_h: float, pixel_size_um: float) -> dict[str, np.ndarray]:
    """The columns of the detections table for one frame's pixel table: ``frame``, ``time_h``,
    the µm columns, the photometry and the pixel positions, as arrays (one table is made of
    every frame's columns at the end, which costs far less than a table per frame)."""
    n = len(df)
    col = {c: df[c].to_numpy(float) for c in ("x_px", "y_px", "radius_px", "intensity", "snr", "background",
                                               "integrated_intensity", "z_px") if c in df.columns}
    out = {
        "frame": np.full(n, frame, dtype=np.int64),
        "time_h": np.full(n, time_h, dtype=float),
        "x_um": col["x_px"] * pixel_size_um,
        "y_um": col["y_px"] * pixel_size_um,
        "radius_um": col["radius_px"] * pixel_size_um,
        "intensity": col["intensity"],
        "snr": col["snr"],
        "background": col["background"],
        "integrated_intensity": col["integrated_intensity"] if "integrated_intensity" in col else np.full(n, np.nan),
        "x_px": col["x_px"],
        "y_px": col["y_px"],
    }
    if "z_px" in col:
        out["z_px"] = col["z_px"]
    return out
