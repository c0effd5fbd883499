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
