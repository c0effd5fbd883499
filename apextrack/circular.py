"""Circular statistics of angles in degrees, and seeded bootstrap confidence intervals.

All functions take and return degrees. Means are wrapped to [0, 360); the circular standard
deviation is ``sqrt(-2 ln R)`` (Mardia & Jupp 2000, eq. 2.3.11), the same definition as
``scipy.stats.circstd`` and ``astropy.stats.circstd``; the Rayleigh test uses the same
small-sample correction as ``astropy.stats.rayleightest`` (Wilkie 1983).

Examples
--------
>>> from apextrack.circular import circ_mean, circ_sd
>>> round(circ_mean([350.0, 10.0]), 6) % 360
0.0
>>> round(circ_sd([137.5, 137.5]), 6)
0.0
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import i0e

__all__ = ["wrap360", "wrap180", "circ_mean", "resultant_length", "circ_sd", "circ_var",
           "rayleigh_test", "bootstrap_circ_mean_ci", "bootstrap_ci", "von_mises_logpdf",
           "circ_diff"]


def wrap360(a):
    """Angles (deg) wrapped to [0, 360)."""
    out = np.mod(np.asarray(a, dtype=float), 360.0)
    # np.mod can return 360.0 for tiny negative inputs
    out = np.where(out >= 360.0, 0.0, out)
    return float(out) if np.ndim(out) == 0 else out


def wrap180(a):
    """Angles (deg) wrapped to [-180, 180)."""
    out = wrap360(np.asarray(a, dtype=float) + 180.0) - 180.0
    return float(out) if np.ndim(out) == 0 else out


def circ_diff(a, b):
    """Signed smallest difference ``a - b`` in degrees, in [-180, 180)."""
    return wrap180(np.asarray(a, dtype=float) - np.asarray(b, dtype=float))


def _clean(angles, weights=None):
    a = np.asarray(angles, dtype=float).ravel()
    w = np.ones_like(a) if weights is None else np.asarray(weights, dtype=float).ravel()
    keep = np.isfinite(a) & np.isfinite(w)
    return a[keep], w[keep]


def _resultant(angles, weights=None):
    a, w = _clean(angles, weights)
    if a.size == 0 or w.sum() <= 0:
        return math.nan, math.nan, 0
    rad = np.deg2rad(a)
    c = float(np.sum(w * np.cos(rad)) / w.sum())
    s = float(np.sum(w * np.sin(rad)) / w.sum())
    return c, s, a.size


def circ_mean(angles, weights=None) -> float:
    """Circular mean direction in [0, 360); NaN for no angles or a zero resultant.

    Parameters
    ----------
    angles : array_like
        Angles in degrees (NaN ignored).
    weights : array_like, optional
        Non-negative weights.
    """
    c, s, n = _resultant(angles, weights)
    if n == 0 or math.hypot(c, s) < 1e-12:
        return math.nan
    return wrap360(math.degrees(math.atan2(s, c)))


def resultant_length(angles, weights=None) -> float:
    """Mean resultant length R̄ in [0, 1] (1 = all angles equal)."""
    c, s, n = _resultant(angles, weights)
    if n == 0:
        return math.nan
    return min(1.0, math.hypot(c, s))


def circ_var(angles, weights=None) -> float:
    """Circular variance 1 − R̄."""
    r = resultant_length(angles, weights)
    return math.nan if math.isnan(r) else 1.0 - r


def circ_sd(angles, weights=None) -> float:
    """Circular standard deviation sqrt(−2 ln R̄) in degrees (∞ when R̄ = 0)."""
    r = resultant_length(angles, weights)
    if math.isnan(r):
        return math.nan
    if r < 1e-12:  # zero resultant (up to rounding): no concentration at all
        return math.inf
    return math.degrees(math.sqrt(max(0.0, -2.0 * math.log(r))))


def rayleigh_test(angles) -> tuple[float, float]:
    """Rayleigh test of uniformity against a unimodal alternative.

    Returns
    -------
    z : float
        ``n R̄²``.
    p : float
        p-value, with Wilkie's (1983) small-sample correction for n < 50.
    """
    a, _ = _clean(angles)
    n = a.size
    if n == 0:
        return math.nan, math.nan
    r = resultant_length(a)
    z = n * r * r
    tmp = 1.0
    if n < 50:
        tmp = (1.0 + (2.0 * z - z * z) / (4.0 * n)
               - (24.0 * z - 132.0 * z ** 2 + 76.0 * z ** 3 - 9.0 * z ** 4) / (288.0 * n * n))
    p = math.exp(-z) * tmp
    return float(z), float(min(1.0, max(0.0, p)))


def bootstrap_circ_mean_ci(angles, n_boot: int = 2000, confidence: float = 0.95,
                           rng: np.random.Generator | int | None = 0) -> tuple[float, float]:
    """Percentile bootstrap interval of the circular mean.

    The bootstrap means are taken as deviations from the sample mean (in [-180, 180)), so the
    interval is continuous across 0/360: ``lo <= mean <= hi`` and ``hi - lo < 360``; ``lo`` may be
    below 0 or ``hi`` above 360 when the mean is near 0.

    Returns ``(nan, nan)`` for fewer than 2 angles or ``n_boot < 1``.
    """
    a, _ = _clean(angles)
    if a.size < 2 or n_boot < 1:
        return math.nan, math.nan
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    m = circ_mean(a)
    if math.isnan(m):
        return math.nan, math.nan
    idx = rng.integers(0, a.size, size=(int(n_boot), a.size))
    rad = np.deg2rad(a[idx])
    bm = np.rad2deg(np.arctan2(np.sin(rad).mean(axis=1), np.cos(rad).mean(axis=1)))
    dev = wrap180(bm - m)
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(dev, [alpha, 1.0 - alpha])
    return float(m + lo), float(m + hi)


def bootstrap_ci(values, statistic=np.mean, n_boot: int = 2000, confidence: float = 0.95,
                 rng: np.random.Generator | int | None = 0) -> tuple[float, float]:
    """Percentile bootstrap interval of a statistic of linear values.

    Returns ``(nan, nan)`` for fewer than 2 finite values or ``n_boot < 1``.
    """
    v = np.asarray(values, dtype=float).ravel()
    v = v[np.isfinite(v)]
    if v.size < 2 or n_boot < 1:
        return math.nan, math.nan
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    idx = rng.integers(0, v.size, size=(int(n_boot), v.size))
    stats = np.apply_along_axis(statistic, 1, v[idx]) if statistic not in (np.mean, np.median) \
        else statistic(v[idx], axis=1)
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(stats, [alpha, 1.0 - alpha])
    return float(lo), float(hi)


def von_mises_logpdf(x_deg, mu_deg, kappa: float):
    """Log density (per radian) of a von Mises distribution at angles given in degrees."""
    d = np.deg2rad(np.asarray(x_deg, dtype=float) - np.asarray(mu_deg, dtype=float))
    # log I0(k) = log(i0e(k)) + k  (numerically stable for large k)
    return kappa * np.cos(d) - (math.log(2.0 * math.pi) + math.log(i0e(kappa)) + kappa)
