"""Top views: one 2D image per timepoint from a 3D stack, and the dome surface height map.

``max``: maximum-intensity projection along z.

``surface``: a surface-shell projection. The dome surface is found per (x, y) column as the
outermost significant intensity peak along z (seen from the side the dome faces), on a
laterally binned (read in the stack's own dtype, slice by slice) and smoothed copy of the volume (the surface is smooth; binning makes this
cheap), interpolated to subslice precision by a Gaussian (log-parabola) through the peak
slice and its neighbours, and resampled to full resolution. The top view is then the maximum
of the signal within a shell from the surface down to ``shell_depth_um`` below it, which keeps
deep autofluorescence out. The height map (µm, ``z = slice × z step``) is kept so that the z
of every primordium can be reported and the dome fitted (:mod:`apextrack.apex`).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi


def max_projection(volume: np.ndarray) -> np.ndarray:
    """Maximum projection of a ``(Z, Y, X)`` volume along z; a 2D image is returned unchanged.

    Examples
    --------
    >>> v = np.zeros((3, 4, 4)); v[1, 2, 2] = 5
    >>> float(max_projection(v)[2, 2])
    5.0
    """
    volume = np.asarray(volume)
    if volume.ndim == 2:
        return volume.astype(np.float32, copy=False)
    if volume.ndim != 3:
        raise ValueError(f"expected a (Z, Y, X) volume, got shape {volume.shape}")
    return volume.max(axis=0).astype(np.float32, copy=False)


@dataclass
class HeightMap:
    """Dome surface height on a coarse grid.

    Attributes
    ----------
    z_um : (Yc, Xc) array
        Surface height (µm, slice index × z step); NaN where no surface was found.
    bin_px : int
        Size of a coarse cell in pixels; cell ``(i, j)`` is centred on pixel
        ``(i·bin + (bin−1)/2, j·bin + (bin−1)/2)``.
    up : int
        +1 when the dome faces increasing z (summit at high slice index), −1 otherwise.
    shape_yx : (int, int)
        Full-resolution frame size.
    """

    z_um: np.ndarray
    bin_px: int
    up: int
    shape_yx: tuple[int, int]

    def points_px(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Valid cells as full-resolution pixel coordinates ``(x, y)`` and heights ``z_um``."""
        iy, ix = np.nonzero(np.isfinite(self.z_um))
        off = (self.bin_px - 1) / 2.0
        return ix * self.bin_px + off, iy * self.bin_px + off, self.z_um[iy, ix]

    def at(self, x_px, y_px) -> np.ndarray:
        """Height (µm) at full-resolution pixel positions (bilinear; NaN where unknown)."""
        off = (self.bin_px - 1) / 2.0
        gy = (np.asarray(y_px, float) - off) / self.bin_px
        gx = (np.asarray(x_px, float) - off) / self.bin_px
        z = np.where(np.isfinite(self.z_um), self.z_um, 0.0)
        w = np.isfinite(self.z_um).astype(float)
        num = ndi.map_coordinates(z * w, [gy, gx], order=1, mode="nearest")
        den = ndi.map_coordinates(w, [gy, gx], order=1, mode="nearest")
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(den > 0.5, num / np.maximum(den, 1e-9), np.nan)

    def full(self) -> np.ndarray:
        """The height map resampled to every pixel (µm; NaN where unknown).

        The same bilinear interpolation as :meth:`at`, done separably (rows, then columns),
        since the pixels form a regular grid.
        """
        ny, nx = self.shape_yx
        off = (self.bin_px - 1) / 2.0
        valid = np.isfinite(self.z_um)
        z = np.where(valid, self.z_um, 0.0)
        w = valid.astype(float)

        def weights(n_out, n_in):
            g = np.clip((np.arange(n_out) - off) / self.bin_px, 0, n_in - 1)
            i0 = np.minimum(np.floor(g).astype(int), max(n_in - 2, 0))
            f = g - i0
            return i0, np.minimum(i0 + 1, n_in - 1), f

        y0, y1, fy = weights(ny, z.shape[0])
        x0, x1, fx = weights(nx, z.shape[1])

        def resample(a):
            rows = a[y0] * (1 - fy)[:, None] + a[y1] * fy[:, None]
            return rows[:, x0] * (1 - fx)[None, :] + rows[:, x1] * fx[None, :]

        num, den = resample(z * w), resample(w)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(den > 0.5, num / np.maximum(den, 1e-9), np.nan).astype(np.float32)


def _bin_sums(volume: np.ndarray, b: int, out: np.ndarray) -> None:
    """Sums over ``b × b`` lateral blocks of a volume of any real dtype, written into ``out``
    (float32, shape ``(Z, Y // b, X // b)``, any view).

    Slice by slice (a slice stays in cache): rows are summed first, then columns on the
    ``b``-times smaller result, in an exact integer accumulator for 8- and 16-bit data (float32
    otherwise); the volume itself is never converted whole.
    """
    nz, ny, nx = volume.shape
    my, mx = (ny // b) * b, (nx // b) * b
    v = volume[:, :my, :mx]
    if b == 1:
        out[...] = v
        return
    kind, size = v.dtype.kind, v.dtype.itemsize
    acc_t = np.uint32 if (kind in "ub" and size <= 2) else np.int32 if (kind == "i" and size <= 2) else np.float32
    if v.dtype == np.dtype(np.uint16) and b % 2 == 0 and v.strides[-1] == 2:
        # 16-bit data: adjacent pixels summed as the two halves of a 32-bit word (exact; the
        # sums of b² pixels fit in 32 bits), then rows, then the remaining pairs of columns
        h = b // 2
        for z in range(nz):
            x = v[z].view(np.uint32)
            pr = x & np.uint32(0xFFFF)
            pr += x >> np.uint32(16)
            acc = pr[0::b] + pr[1::b]
            for i in range(2, b):
                acc += pr[i::b]
            cols = acc[:, 0::h] if h == 1 else acc[:, 0::h] + acc[:, 1::h]
            for i in range(2, h):
                cols += acc[:, i::h]
            out[z] = cols
        return
    acc = np.empty((my // b, mx), acc_t)
    for z in range(nz):
        s = v[z]
        np.add(s[0::b], s[1::b], out=acc, dtype=acc_t)
        for i in range(2, b):
            np.add(acc, s[i::b], out=acc, dtype=acc_t)
        cols = acc[:, 0::b] + acc[:, 1::b]
        for i in range(2, b):
            cols += acc[:, i::b]
        out[z] = cols


# the lateral smoothing of the binned volume: a Gaussian of σ = 1 cell, truncated at 4 σ (the
# kernel of scipy.ndimage.gaussian_filter with its defaults)
_SMOOTH_RADIUS = 4
_SMOOTH_WEIGHTS = np.exp(-0.5 * np.arange(-_SMOOTH_RADIUS, _SMOOTH_RADIUS + 1) ** 2.0)
_SMOOTH_WEIGHTS = (_SMOOTH_WEIGHTS / _SMOOTH_WEIGHTS.sum()).astype(np.float32)
_PAD = _SMOOTH_RADIUS  # margin of the padded layout of the binned volume


def _binned_smoothed(volume: np.ndarray, b: int, group: int = 4) -> np.ndarray:
    """The volume binned laterally (``b × b`` block means) and smoothed along y and x by a
    Gaussian of σ = 1 cell (radius 4 cells, edges extended as 'nearest'), in float32.

    Returned in a padded layout, shape ``(Z, Yb + 2·r, Xb + 2·r)`` with ``r`` =
    :data:`_PAD`, contiguous: the result is ``[:, r:-r, r:-r]``, the margins hold values of no
    meaning. The binned sums are written straight into the padded array, and the filter runs
    on it as one flat array (neighbours ``k`` apart along x, ``k`` padded rows apart along y),
    so that every pass is one contiguous sweep; the margins absorb what crosses the end of a
    row or a slice. ``group`` slices at a time are binned and smoothed, so that they stay in
    the cache between the passes.
    """
    nz, ny, nx = volume.shape
    yb, xb = ny // b, nx // b
    r = _PAD
    buf = np.empty((nz, yb + 2 * r, xb + 2 * r), np.float32)
    out = np.zeros_like(buf)
    row = buf.shape[2]
    size = buf.shape[1] * row
    src, dst = buf.reshape(-1), out.reshape(-1)
    tmp = np.empty(group * size, np.float32)
    mean = np.float32(1.0 / (b * b))
    for z0 in range(0, nz, group):
        z1 = min(z0 + group, nz)
        g = buf[z0:z1]
        _bin_sums(volume[z0:z1], b, g[:, r:-r, r:-r])
        g[:, r:-r, :r] = g[:, r:-r, r:r + 1]           # 'nearest': columns, then whole rows
        g[:, r:-r, -r:] = g[:, r:-r, -r - 1:-r]
        g[:, :r] = g[:, r:r + 1]
        g[:, -r:] = g[:, -r - 1:-r]
        # the rows r … r + yb − 1 of the group's slices (all that the cells need), along y into
        # out (block sums → means folded into the weights), then along x back into buf: along
        # y only the group's own rows are read, along x what lies beyond a row's end reaches
        # only margins
        i0, i1 = z0 * size + r * row, z1 * size - r * row
        for step, a, c, w in ((row, src, dst, _SMOOTH_WEIGHTS * mean), (1, dst, src, _SMOOTH_WEIGHTS)):
            o = c[i0:i1]
            t = tmp[:i1 - i0]
            np.multiply(a[i0:i1], w[r], out=o)
            for k in range(1, r + 1):
                d = k * step
                np.add(a[i0 - d:i1 - d], a[i0 + d:i1 + d], out=t)
                t *= w[r + k]
                o += t
    return buf


def dome_side(binned: np.ndarray) -> int:
    """+1 if the dome bulges towards increasing slice index, −1 otherwise.

    The intensity-weighted mean slice of every column is fitted by ``a + b·x + c·y + d·ρ²``
    (least squares, refitted once without outlying columns); a cap (``d < 0``) faces
    increasing z.
    """
    nz = binned.shape[0]
    bg = np.percentile(binned, 5)
    w = np.clip(binned - bg, 0, None)
    tot = w.sum(axis=0)
    ok = tot > np.percentile(tot, 25)
    if ok.sum() < 6:
        return 1
    zc = (w * np.arange(nz)[:, None, None]).sum(axis=0)[ok] / tot[ok]
    iy, ix = np.nonzero(ok)
    a = np.column_stack([np.ones_like(ix, float), ix, iy, (ix - ix.mean()) ** 2 + (iy - iy.mean()) ** 2])
    coef, *_ = np.linalg.lstsq(a, zc, rcond=None)
    # one trimmed refit: a few columns of bright deep signal must not decide
    res = zc - a @ coef
    good = np.abs(res - np.median(res)) <= 2.5 * 1.4826 * np.median(np.abs(res - np.median(res))) + 1e-9
    if good.sum() >= 6:
        coef, *_ = np.linalg.lstsq(a[good], zc[good], rcond=None)
    return 1 if coef[3] <= 0 else -1


@functools.lru_cache(maxsize=8)
def _sample_index(shape: tuple[int, int, int], m: int, side: int) -> np.ndarray:
    """Flat indices into a padded volume (margin ``m``) of every k-th cell, k = cells // 65536,
    the cells counted along x, then y, then z from the dome's side (from the last slice when
    ``side`` is −1). Kept for the next frame of the same shape (read-only)."""
    nz, yp, xp = shape
    yb, xb = yp - 2 * m, xp - 2 * m
    n = nz * yb * xb
    i = np.arange(0, n, max(1, n // 65536))
    z, rem = np.divmod(i, yb * xb)
    y, x = np.divmod(rem, xb)
    if side == -1:
        z = nz - 1 - z
    idx = (z * yp + y + m) * xp + x + m
    idx.flags.writeable = False
    return idx


def _percentiles(a: np.ndarray, q) -> list[float]:
    """Percentiles of a 1D array as :func:`numpy.percentile` gives them (linear interpolation
    between order statistics).

    One selection per percentile, the largest first, each on the part of the array left of the
    previous one; the order statistic next to a selected one is the minimum of what lies right
    of it."""
    n = a.size
    pos = np.asarray(q, float) / 100.0 * (n - 1)
    lo = np.floor(pos).astype(np.intp)
    work = np.array(a, copy=True).reshape(-1)
    stat: dict[int, float] = {}
    end = n
    for k in sorted({int(v) for v in lo}, reverse=True):
        seg = work[:end]
        seg.partition(k)
        stat[k] = float(seg[k])
        if k + 1 < end:
            stat[k + 1] = float(seg[k + 1:].min())
        end = k
    out = []
    for p, k in zip(pos, lo):
        a_lo = stat[int(k)]
        a_hi = stat.get(int(k) + 1, a_lo)
        out.append(a_lo + (a_hi - a_lo) * float(p - k))
    return out


def surface_height(volume: np.ndarray, z_step_um: float, pixel_size_um: float,
                   cell_um: float = 3.0, up: str | int = "auto", rel_level: float = 0.5) -> HeightMap:
    """Find the dome surface: the outermost significant z peak of every (binned) column.

    Parameters
    ----------
    volume : (Z, Y, X) array
        Any real dtype; it is binned laterally as read, never converted to float whole.
    z_step_um, pixel_size_um : float
    cell_um : float
        Lateral size of the coarse cells (µm); the surface is assumed smooth at that scale.
    up : "auto", "+z", "-z", 1 or -1
        Side the dome faces; ``auto`` decides from the data (:func:`dome_side`).
    rel_level : float
        A peak counts when it rises above ``rel_level`` of the column's range over the
        volume's background (the range capped at the 75th percentile of the columns', so that
        bright deep signal does not hide a fainter surface above it). Columns whose range is
        under 30 % of that typical range hold no surface (NaN).

    Returns
    -------
    HeightMap

    Examples
    --------
    >>> zz = np.arange(10)[:, None, None] * 2.0
    >>> v = np.exp(-0.5 * ((zz - 11.0) / 1.5) ** 2) * np.ones((10, 16, 16))
    >>> hm = surface_height(v, 2.0, 1.0, cell_um=4)
    >>> round(float(np.nanmean(hm.z_um)), 2)
    11.0
    """
    vol = np.asarray(volume)
    if vol.ndim != 3:
        raise ValueError(f"expected a (Z, Y, X) volume, got shape {vol.shape}")
    nz, ny, nx = vol.shape
    b = max(1, int(round(cell_um / pixel_size_um)))
    b = min(b, max(1, min(ny, nx) // 4))
    # binned and smoothed, in a padded layout: the cells are [:, m:-m, m:-m]; every step below
    # works on the whole padded array (contiguous sweeps) and the margins are cut off at the end
    v = _binned_smoothed(vol, b)
    m = _PAD
    cells = (slice(m, -m), slice(m, -m))
    if up in ("auto", None):
        side = dome_side(np.ascontiguousarray(v[(slice(None),) + cells]))
    elif up in ("+z", 1):
        side = 1
    elif up in ("-z", -1):
        side = -1
    else:
        raise ValueError(f"up must be 'auto', '+z' or '-z', not {up!r}")
    p = v if side == 1 else v[::-1]
    # background and noise of the volume from every k-th cell (in the order of the cells
    # along x, y, then z from the dome's side), some 65536 of them
    sample = v.reshape(-1)[_sample_index(v.shape, m, side)]
    bg, med = _percentiles(sample, (5.0, 50.0))
    noise = 1.4826 * _percentiles(np.abs(sample - np.float32(med)), (50.0,))[0] + 1e-9
    top = p.max(axis=0)
    # the level a peak must reach: relative to the column's own top, but never above the
    # typical column top, so that a bright deep spot does not hide the surface above it
    typical = _percentiles(top[cells].ravel(), (75.0,))[0]
    thr = bg + rel_level * (np.minimum(top, typical) - bg)
    # peaks: not lower than either neighbour along z (edges count as one-sided peaks)
    peak = p >= thr[None]
    peak[:-1] &= p[:-1] >= p[1:]
    peak[1:] &= p[1:] >= p[:-1]
    # outermost = highest index on the dome's side: the largest (slice + 1) among the peaks,
    # a maximum over slices of uint8 ranks (far cheaper than an argmax along the z axis)
    if nz < 255:
        rank = peak.view(np.uint8)
        rank *= np.arange(1, nz + 1, dtype=np.uint8)[:, None, None]
        rank = rank.max(axis=0)
        has_peak = rank > 0
        idx = np.where(has_peak, rank.astype(np.intp) - 1, nz - 1)
    else:
        has_peak = peak.any(axis=0)
        idx = (nz - 1) - np.argmax(peak[::-1], axis=0)
    # columns whose top is far below the typical surface hold no surface (it left the stack)
    found = has_peak & ((top - bg) > 3 * noise) & ((top - bg) > 0.3 * (typical - bg))
    k = np.clip(idx, 1, max(nz - 2, 1)) if nz >= 3 else idx
    iy, ix = np.indices(idx.shape)
    z = idx.astype(float)
    if nz >= 3:
        a = p[k - 1, iy, ix] - bg
        c0 = p[k, iy, ix] - bg
        c = p[k + 1, iy, ix] - bg
        pos = (a > 0) & (c0 > 0) & (c > 0)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            la, lb, lc = np.log(np.maximum(a, 1e-12)), np.log(np.maximum(c0, 1e-12)), np.log(np.maximum(c, 1e-12))
            den = la - 2 * lb + lc
            off_log = np.where(den < 0, 0.5 * (la - lc) / den, 0.0)
            den2 = a - 2 * c0 + c
            off_lin = np.where(den2 < 0, 0.5 * (a - c) / den2, 0.0)
        off = np.where(pos, off_log, off_lin)
        off = np.clip(np.nan_to_num(off), -1.0, 1.0)
        interior = (idx >= 1) & (idx <= nz - 2)
        z = np.where(interior, k + off, idx)
    if side == -1:
        z = (nz - 1) - z
    z_um = np.where(found, z * z_step_um, np.nan)[cells]
    return HeightMap(z_um=np.ascontiguousarray(z_um, dtype=float), bin_px=b, up=side, shape_yx=(ny, nx))


def shell_projection(volume: np.ndarray, height: HeightMap, z_step_um: float, shell_depth_um: float) -> np.ndarray:
    """Maximum of the signal between the dome surface and ``shell_depth_um`` below it.

    Columns without a surface fall back to the maximum projection. Half a z step above the
    surface is included, so the surface slice itself always counts. The volume may have any
    real dtype: the maximum is taken slice by slice in that dtype (only the slices the shell
    reaches are visited) and the result is float32.
    """
    vol = np.asarray(volume)
    nz = vol.shape[0]
    h = height.full() / z_step_um  # in slices
    depth = shell_depth_um / z_step_um
    margin = 0.5
    if height.up == 1:
        lo, hi = h - depth - margin, h + margin
    else:
        lo, hi = h - margin, h + depth + margin
    none = ~np.isfinite(h)
    if none.all():
        return max_projection(vol)
    # slices z with lo ≤ z ≤ hi, per column; columns without a surface take no slice here
    first = np.where(none, nz, np.ceil(np.where(none, 0, lo))).clip(0, nz).astype(int)
    last = np.where(none, -1, np.floor(np.where(none, 0, hi))).clip(-1, nz - 1).astype(int)
    fill = np.finfo(vol.dtype).min if vol.dtype.kind == "f" else np.iinfo(vol.dtype).min
    proj = np.full(vol.shape[1:], fill, dtype=vol.dtype)
    taken = np.zeros(vol.shape[1:], bool)
    z0 = int(first[~none].min()) if (~none).any() else nz
    z1 = int(last[~none].max()) if (~none).any() else -1
    for z in range(max(z0, 0), min(z1, nz - 1) + 1):
        sel = (first <= z) & (z <= last)
        np.maximum(proj, vol[z], out=proj, where=sel)
        taken |= sel
    proj = proj.astype(np.float32)
    empty = ~taken
    if empty.any():
        proj[empty] = max_projection(vol)[empty]
    return proj


def surface_projection(volume: np.ndarray, z_step_um: float = 1.0, pixel_size_um: float = 1.0,
                       shell_depth_um: float = 6.0, up: str | int = "auto",
                       cell_um: float = 3.0) -> tuple[np.ndarray, HeightMap]:
    """Surface-shell top view of one ``(Z, Y, X)`` timepoint and the surface height map.

    Examples
    --------
    >>> zz, yy, xx = np.mgrid[:12, :32, :32]
    >>> v = np.exp(-0.5 * ((zz - 9.0) / 1.0) ** 2)          # the dome surface, slice 9
    >>> v[2, 10, 10] = 50.0                                   # deep autofluorescence
    >>> view, hm = surface_projection(v, 1.0, 1.0, shell_depth_um=3.0, up="+z")
    >>> float(view[10, 10]) < 2.0, float(v.max(axis=0)[10, 10])
    (True, 50.0)
    """
    hm = surface_height(volume, z_step_um, pixel_size_um, cell_um=cell_um, up=up)
    return shell_projection(volume, hm, z_step_um, shell_depth_um), hm


def top_view(volume: np.ndarray, method: str = "max", **kwargs) -> np.ndarray:
    """Project one timepoint to a top view with the named method (``max`` or ``surface``)."""
    if method == "max" or volume.ndim == 2:
        return max_projection(volume)
    if method == "surface":
        return surface_projection(volume, **kwargs)[0]
    raise ValueError(f"unknown projection method {method!r}")
