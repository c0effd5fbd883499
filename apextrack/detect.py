"""Primordium detection: multi-scale, scale-normalised Laplacian of Gaussian on a top view.

Each blob gets a subpixel position, a radius (√2·σ of the scale with the strongest normalised
response, the 2D convention of Lindeberg 1998), its peak intensity above the local background,
the background level and noise, and a signal-to-noise ratio; blobs under the minimum SNR are
dropped.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

DETECTION_COLUMNS = ["x_px", "y_px", "radius_px", "sigma_px", "intensity", "background", "noise",
                     "snr", "integrated_intensity", "response"]


def scales_px(diameter_min_um: float, diameter_max_um: float, pixel_size_um: float, n_scales: int) -> np.ndarray:
    """Gaussian σ (pixels) covering a diameter range: radius = √2·σ, geometric spacing."""
    smin = max(diameter_min_um / 2.0 / math.sqrt(2.0) / pixel_size_um, 0.7)
    smax = max(diameter_max_um / 2.0 / math.sqrt(2.0) / pixel_size_um, smin)
    if n_scales <= 1 or smax <= smin * 1.0001:
        return np.array([math.sqrt(smin * smax)])
    return np.geomspace(smin, smax, n_scales)


def log_scale_space(image: np.ndarray, sigmas) -> np.ndarray:
    """Scale-normalised negative Laplacian of Gaussian, ``-σ²∇²G_σ * I``, stacked over σ."""
    img = np.asarray(image, dtype=np.float32)
    return np.stack([-(s ** 2) * ndi.gaussian_laplace(img, s, mode="nearest") for s in sigmas])


def _robust_sd(values: np.ndarray) -> float:
    v = values[np.isfinite(values)]
    if v.size == 0:
        return 0.0
    mad = np.median(np.abs(v - np.median(v)))
    return float(1.4826 * mad)


def _refine(img: np.ndarray, y: int, x: int) -> tuple[float, float]:
    """Subpixel peak position by a 1D parabola through the peak and its neighbours on each axis."""
    ny, nx = img.shape
    dy = dx = 0.0
    if 0 < y < ny - 1:
        a, b, c = img[y - 1, x], img[y, x], img[y + 1, x]
        den = a - 2 * b + c
        if den < 0:
            dy = float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))
    if 0 < x < nx - 1:
        a, b, c = img[y, x - 1], img[y, x], img[y, x + 1]
        den = a - 2 * b + c
        if den < 0:
            dx = float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))
    return y + dy, x + dx


def detect_blobs(image: np.ndarray, sigmas, min_snr: float = 4.0, border_px: int = 1,
                 overlap: float = 0.5) -> pd.DataFrame:
    """Find bright blobs in a 2D image with a multi-scale LoG.

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

    Returns
    -------
    DataFrame
        One row per blob with columns :data:`DETECTION_COLUMNS` (pixels, intensities in the
        image's units).

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
    cube = log_scale_space(img, sigmas)
    footprint = np.ones((3 if len(sigmas) > 1 else 1, 3, 3), bool)
    peaks = (cube == ndi.maximum_filter(cube, footprint=footprint, mode="nearest")) & (cube > 0)
    # candidate threshold: response well above the response noise at each scale
    for k in range(len(sigmas)):
        sd = _robust_sd(cube[k])
        peaks[k] &= cube[k] > 3.0 * sd
    if border_px > 0:
        peaks[:, :border_px, :] = False
        peaks[:, -border_px:, :] = False
        peaks[:, :, :border_px] = False
        peaks[:, :, -border_px:] = False
    ks, ys, xs = np.nonzero(peaks)
    if ks.size == 0:
        return pd.DataFrame({c: pd.Series(dtype=float) for c in DETECTION_COLUMNS})
    resp = cube[ks, ys, xs]
    order = np.argsort(-resp, kind="stable")
    ks, ys, xs, resp = ks[order], ys[order], xs[order], resp[order]
    # non-maximum suppression across scales and space
    radii = math.sqrt(2.0) * sigmas[ks]
    keep = []
    for i in range(len(ks)):
        ok = True
        for j in keep:
            if math.hypot(ys[i] - ys[j], xs[i] - xs[j]) < overlap * (radii[i] + radii[j]):
                ok = False
                break
        if ok:
            keep.append(i)
    ny, nx = img.shape
    yy, xx = np.indices(img.shape)
    rows = []
    smooth_cache: dict[int, np.ndarray] = {}
    for i in keep:
        k, y, x = int(ks[i]), int(ys[i]), int(xs[i])
        s = float(sigmas[k])
        r = math.sqrt(2.0) * s
        if k not in smooth_cache:
            smooth_cache[k] = ndi.gaussian_filter(img, max(s / 2.0, 0.5), mode="nearest")
        sm = smooth_cache[k]
        yr, xr = _refine(cube[k], y, x)
        # local background and noise in an annulus 2r..3r
        lo_y, hi_y = max(0, int(y - 3 * r - 1)), min(ny, int(y + 3 * r + 2))
        lo_x, hi_x = max(0, int(x - 3 * r - 1)), min(nx, int(x + 3 * r + 2))
        sub = img[lo_y:hi_y, lo_x:hi_x]
        d = np.hypot(yy[lo_y:hi_y, lo_x:hi_x] - yr, xx[lo_y:hi_y, lo_x:hi_x] - xr)
        ring = sub[(d >= 2 * r) & (d <= 3 * r)]
        inner = sub[d <= r]
        if ring.size < 8:
            ring = sub[d > r]
        background = float(np.median(ring)) if ring.size else float(np.median(img))
        noise = _robust_sd(ring) if ring.size >= 8 else _robust_sd(img)
        noise = max(noise, 1e-6 * max(abs(background), 1.0), 1e-12)
        peak = float(sm[y, x]) - background
        snr = peak / noise
        if snr < min_snr:
            continue
        rows.append((xr, yr, r, s, peak, background, noise, snr,
                     float(np.clip(inner - background, 0, None).sum()), float(resp[i])))
    df = pd.DataFrame(rows, columns=DETECTION_COLUMNS)
    return df.sort_values(["y_px", "x_px"], kind="stable").reset_index(drop=True)


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
        "integrated_intensity": df["integrated_intensity"].to_numpy(float),
        "x_px": df["x_px"].to_numpy(float),
        "y_px": df["y_px"].to_numpy(float),
    })
    return out
