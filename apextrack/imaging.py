"""The image stage: per timepoint, the dome surface, the top view, the apex region, the
detections, the dome fit and the registration — streamed one timepoint at a time.

The stage has two halves. :func:`measure_frame` measures one timepoint on its own (read,
project, apex region, detect, height map, dome fit): it depends only on the frame, the settings
and a :class:`StageContext` decided once per stack from its first frame with signal, so frames
can be measured in any order, in threads (:func:`measure_frames`, ``settings.threads``) or as
separate dask tasks (:mod:`apextrack.batch`). :func:`image_stage` then puts the measurements
together in frame order: registration, the z of each detection, the centres. The tables are
the same whichever way the frames were measured.
"""

from __future__ import annotations

import math
import os
import sys
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Iterator

import numpy as np
import pandas as pd

from .detect import detect_blobs, detection_columns, scales_px
from .register import warp_view
from .settings import Settings
from .stack import Stack


def progress_over(iterable, total: int, desc: str, enabled):
    """``iterable`` with progress shown: a tqdm bar on stderr (``enabled=True``), a callback
    ``enabled(done, total, stage)`` (e.g. the viewer's), or nothing."""
    if not enabled:
        return iterable
    if callable(enabled):  # a callback progress(done, total, stage), e.g. from the viewer
        def _report():
            for i, item in enumerate(iterable):
                enabled(i, total, desc)
                yield item
            enabled(total, total, desc)

        return _report()
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, unit="frame", file=sys.stderr, leave=False,
                dynamic_ncols=True)


class TopViewWriter:
    """Writes the top view of every frame into an ImageJ ``TYX`` float32 TIFF, one frame at a time.

    The file (header and the full frame layout) is created first; each frame is then written at
    its offset, so no more than one frame is ever held in memory.
    """

    def __init__(self, path: Path, stack: Stack):
        import tifffile

        ny, nx = stack.shape_yx
        px, py = stack.pixel_size_um[0], stack.pixel_size_um[1]
        mm = tifffile.memmap(path, shape=(stack.n_frames, ny, nx), dtype=np.float32, imagej=True,
                             resolution=(1.0 / px, 1.0 / py),
                             metadata={"axes": "TYX", "unit": "um", "finterval": stack.interval_h * 3600.0})
        self.offset, self.dtype, self.frame_bytes = int(mm.offset), mm.dtype, ny * nx * mm.dtype.itemsize
        self.shape_yx = (ny, nx)
        del mm
        self._file = open(path, "r+b")

    def write(self, t: int, view: np.ndarray) -> None:
        if view.shape != self.shape_yx:
            raise ValueError(f"top view of frame {t} has shape {view.shape}, expected {self.shape_yx}")
        self._file.seek(self.offset + t * self.frame_bytes)
        self._file.write(memoryview(np.ascontiguousarray(view, dtype=self.dtype)).cast("B"))

    def close(self) -> None:
        if not self._file.closed:
            self._file.close()


_DOME_COLUMNS = ["dome_x_um", "dome_y_um", "dome_z_um", "curvature_um", "dome_rms_um", "_bx", "_by"]


def _fill_domes(centres: pd.DataFrame) -> None:
    """Give the frames whose dome was not fitted (``_fill``) the fitted domes interpolated
    linearly in frame number (frame-0 frame of reference; held beyond the first and last fit)."""
    fitted = centres["dome_fitted"].to_numpy(bool)
    fill = centres["_fill"].to_numpy(bool) & ~fitted
    if not fill.any() or not fitted.any():
        return
    fr = centres["frame"].to_numpy(float)
    # the tilt is a property of the specimen: a running median over 5 fits steadies it before
    # it is spread to the frames between (with a fit on every frame: the 5-frame median below)
    for col in ("_bx", "_by"):
        vals = centres.loc[fitted, col]
        centres.loc[fitted, col] = vals.rolling(5, center=True, min_periods=1).median().to_numpy()
    for col in _DOME_COLUMNS:
        vals = centres[col].to_numpy(float)
        centres.loc[fill, col] = np.interp(fr[fill], fr[fitted], vals[fitted])
    # the side the dome faces: that of the nearest earlier fit (else the first)
    up = centres["dome_up"].where(centres["dome_fitted"]).ffill().bfill()
    centres.loc[fill, "dome_up"] = up[fill]


@dataclass
class StageContext:
    """What the measurement of every frame of one stack shares, decided once from the stack's
    first frame with signal (:func:`stage_context`)."""

    sigmas: np.ndarray
    #: side the dome faces (+1 / −1; "auto" while undecided, e.g. for 2D stacks)
    side: int | str
    #: dome fitted on the first frame with signal: the starting point of every other frame's fit
    dome_init: dict | None
    #: first frame with signal (the dome is fitted on it and on every ``dome_every_frames``-th after)
    first: int | None


@dataclass
class FrameMeasure:
    """The measurements of one timepoint, in its own pixel frame (see :func:`measure_frame`)."""

    t: int
    blank: bool
    view: np.ndarray
    region: tuple[float, float, float]
    blobs: pd.DataFrame
    height: object | None      # projection.HeightMap, when computed on this frame
    dome: dict | None          # fitted dome (µm, this frame's pixels × pixel size), if plausible
    fitted: bool               # the dome fit was due on this frame


def stack_sigmas(stack: Stack, s: Settings) -> np.ndarray:
    """The detector's Gaussian scales (pixels) for this stack's pixel size."""
    return scales_px(s.primordium_diameter_min_um, s.primordium_diameter_max_um, stack.pixel_size_um[0], s.n_scales)


def measure_frame(stack: Stack, t: int, s: Settings, ctx: StageContext) -> FrameMeasure:
    """Measure timepoint ``t`` on its own: top view, apex region, detections, and on the frames
    the dome is due (every ``dome_every_frames``-th from the first with signal) the height map
    and the dome fit. Safe to call from several threads at once."""
    from .apex import dome_is_plausible, fit_dome
    from .detect import apex_region, detect_blobs_3d
    from .projection import max_projection, shell_projection, surface_height

    px = stack.pixel_size_um[0]
    dz = stack.pixel_size_um[2] if stack.has_z else math.nan
    ny, nx = stack.shape_yx
    sigmas = ctx.sigmas
    # the volume stays in the stack's dtype: projections and the height map's binning
    # read it as it is, nothing converts it whole to float
    vol = stack.frame(t, s.channel, native=True)
    mip = max_projection(vol)  # float32
    is_blank = bool(vol.size) and float(mip.min()) == float(mip.max()) and float(vol.min()) == float(mip.max())
    every = max(1, int(s.dome_every_frames))
    fit_now = (vol.ndim == 3 and not is_blank and ctx.first is not None and (t - ctx.first) % every == 0)
    hm = None
    if fit_now or (vol.ndim == 3 and not is_blank and s.projection == "surface"):
        surf = vol if s.membrane_channel is None else stack.frame(t, s.membrane_channel, native=True)
        hm = surface_height(surf, dz, px, up=ctx.side)
    if s.projection == "surface" and hm is not None:
        view = shell_projection(vol, hm, dz, s.shell_depth_um)
    else:
        view = mip
    rx, ry, rr = apex_region(view, close_px=2.0 * math.sqrt(2.0) * float(np.max(sigmas)))
    if s.detect_3d and vol.ndim == 3:
        blobs = detect_blobs_3d(vol, sigmas, z_ratio=dz / px, min_snr=s.min_snr)
        if not blobs.empty:
            inside = np.hypot(blobs["x_px"] - rx, blobs["y_px"] - ry) <= s.apex_region_factor * rr
            blobs = blobs[inside].reset_index(drop=True)
            blobs["integrated_intensity"] = np.nan
    else:
        blobs = detect_blobs(view, sigmas, min_snr=s.min_snr, region=(rx, ry, rr),
                             region_factor=s.apex_region_factor)
    del vol
    dome = None
    if hm is not None and fit_now:
        hx, hy, hz = hm.points_px()
        if s.membrane_channel is None and len(blobs):
            # primordia bulge out of the reporter's surface: leave their cells out of the fit
            from scipy.spatial import cKDTree

            dist, idx = cKDTree(blobs[["x_px", "y_px"]].to_numpy(float)).query(np.column_stack([hx, hy]))
            far = dist > 1.5 * blobs["radius_px"].to_numpy(float)[idx]
            hx, hy, hz = hx[far], hy[far], hz[far]
        dome = fit_dome(hx * px, hy * px, hz, up=hm.up, init=ctx.dome_init, robust_um=max(0.5, 0.25 * dz))
        if not dome_is_plausible(dome, (nx * px, ny * px)):
            dome = None  # no summit found (a plane, or a summit outside the field)
    return FrameMeasure(t=t, blank=is_blank, view=view, region=(rx, ry, rr),
                        blobs=blobs, height=hm, dome=dome, fitted=fit_now)


def _opening_context(sigmas: np.ndarray, s: Settings, t: int) -> StageContext:
    """The context a frame is measured with when it is taken as the stack's first with signal:
    the side the dome faces as the settings give it (``auto``: from this frame), no earlier dome."""
    return StageContext(sigmas, {"auto": "auto", "+z": 1, "-z": -1}[s.surface_side], None, t)


def check_stage_settings(stack: Stack, s: Settings) -> None:
    """Fail early, before any frame is measured, on settings this stack cannot take: an apex
    centre outside the image, a membrane channel it does not have."""
    if s.centre_um is not None:
        px = stack.pixel_size_um[0]
        ny, nx = stack.shape_yx
        cx, cy = s.centre_um
        if not (0 <= cx <= nx * px and 0 <= cy <= ny * px):
            from .errors import SettingsError

            raise SettingsError(f"apex centre ({cx:g}, {cy:g}) µm lies outside the image "
                                f"(0–{nx * px:g} × 0–{ny * px:g} µm)", stack.path,
                                "give --centre X,Y in µm inside the image")
    if s.membrane_channel is not None:
        stack.channel_index(s.membrane_channel)


def stage_context(stack: Stack, s: Settings) -> tuple[StageContext, dict[int, FrameMeasure]]:
    """Decide what every frame's measurement shares, from the first frame with signal: the side
    the dome faces (when ``surface_side`` is ``auto``) and the dome that starts every other
    frame's fit. Returns the context and the frames measured on the way (the blank frames
    before, and that first frame), so that they need not be measured again."""
    check_stage_settings(stack, s)
    sigmas = stack_sigmas(stack, s)
    done: dict[int, FrameMeasure] = {}
    for t in range(stack.n_frames):
        opening = _opening_context(sigmas, s, t)
        m = measure_frame(stack, t, s, opening)
        done[t] = m
        if not m.blank:
            side = m.height.up if m.height is not None and isinstance(opening.side, str) else opening.side
            return StageContext(sigmas, side, m.dome, t), done
    return StageContext(sigmas, _opening_context(sigmas, s, 0).side, None, None), done


def _measure(stack: Stack, t: int, s: Settings, ctx: StageContext) -> FrameMeasure:
    """:func:`measure_frame` with the context :func:`stage_context` measured frame ``t`` with:
    the first frame with signal is measured as it was when the context was found, so that a
    block of frames measured elsewhere gives it exactly (blank frames do not use the context)."""
    return measure_frame(stack, t, s, _opening_context(ctx.sigmas, s, t) if t == ctx.first else ctx)


def _n_threads(requested: int) -> int:
    if requested and requested > 0:
        return int(requested)
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def measure_frames(stack: Stack, s: Settings, ctx: StageContext, frames: Iterable[int] | None = None,
                   done: dict[int, FrameMeasure] | None = None, threads: int | None = None,
                   pool=None) -> Iterator[FrameMeasure]:
    """The measurements of ``frames`` (default: all), yielded in frame order.

    With a ``pool`` (:class:`apextrack.frame_pool.FramePool`, worker processes with the same
    stack open) the frames are measured there, at most twice the pool's size in flight. Else,
    with more than one thread (``threads``, default ``settings.threads``; 0 = one per core) the
    next frames are measured in a thread pool, at most ``threads`` in flight. Memory stays
    bounded either way. ``done`` holds frames already measured.
    """
    frames = list(range(stack.n_frames) if frames is None else frames)
    done = dict(done or {})
    n = _n_threads(s.threads if threads is None else threads)
    if pool is None and (n <= 1 or len(frames) - len(done) <= 1):
        for t in frames:
            yield done.pop(t) if t in done else _measure(stack, t, s, ctx)
        return
    ex = None
    if pool is not None:
        # the next frames wait in the workers' queue while the caller takes in the last ones
        n, submit = 2 * pool.size, pool.submit
    else:
        from concurrent.futures import ThreadPoolExecutor

        ex = ThreadPoolExecutor(max_workers=n, thread_name_prefix="apextrack-frame")

        def submit(t, c):
            return ex.submit(_measure, stack, t, s, c)
    try:
        pending: deque = deque()
        todo = iter(frames)

        def fill():
            while len(pending) < n:
                t = next(todo, None)
                if t is None:
                    return
                pending.append(done.pop(t) if t in done else submit(t, ctx))

        fill()
        while pending:
            item = pending.popleft()
            fill()
            yield item if isinstance(item, FrameMeasure) else item.result()
    finally:
        if ex is not None:
            ex.shutdown(wait=True, cancel_futures=True)
        else:
            for item in pending:
                if not isinstance(item, FrameMeasure):
                    item.cancel()


def _warp_and_hand_on(on_frame, t: int, view: np.ndarray, matrix: np.ndarray) -> None:
    on_frame(t, warp_view(view, matrix))


def image_stage(stack: Stack, s: Settings, progress: bool = True,
                on_frame: Callable[[int, np.ndarray], None] | None = None,
                extra: dict | None = None, measures: Iterable[FrameMeasure] | None = None,
                pool=None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Project, register, fit the dome and detect primordia frame by frame (streaming).

    Per frame (:func:`measure_frame`): the dome surface height map (membrane channel when
    given, else the reporter; 3D stacks), the top view (``max`` or ``surface`` shell
    projection), the apex region, the detections (2D on the top view, or 3D with
    ``detect_3d``) and the tilted-paraboloid fit of the dome (summit, curvature, tilt). Then, in
    frame order, the registration to the previous frame
    (:class:`apextrack.register.Registrar`). Registration is applied to coordinates: ``x_um``,
    ``y_um`` of detections and every centre estimate are in the frame of reference of the
    first frame; ``x_px``/``y_px`` stay the pixel positions in the frame's own top view.

    Returns ``(detections, centres)``; ``on_frame(t, top_view)`` is called for every frame with
    the top view resampled into the first frame's frame of reference (e.g. to write the top
    views), so that no more than a few frames are held in memory. When ``extra`` is a dict it
    receives the ``registration`` table. ``measures`` gives the frames' measurements in frame
    order (e.g. made by dask tasks); by default they are made here (:func:`measure_frames`, in
    the worker processes of ``pool`` when given).
    """
    from .apex import _tilt_vector
    from .register import Registrar

    px = stack.pixel_size_um[0]
    dz = stack.pixel_size_um[2] if stack.has_z else math.nan
    ny, nx = stack.shape_yx
    check_stage_settings(stack, s)
    reg = Registrar((ny, nx), px, match_tol_px=max(s.link_search_um / px, 3.0), enabled=bool(s.register))
    det_parts, centre_rows, blank = [], [], []
    times = stack.times_h()
    if measures is None:
        ctx, done = stage_context(stack, s)
        measures = measure_frames(stack, s, ctx, done=done, pool=pool)
    # the dome (height map + paraboloid) is a property of the specimen that changes slowly: with
    # ``dome_every_frames`` > 1 it is fitted on every k-th frame; frames between take the fitted
    # domes interpolated in the registered frame of reference, and the z of their detections
    # from the last height map, read where each detection lies in that map's frame
    hm_last, hm_matrix = None, None   # last height map and its frame's registration (frame 0 → it)
    dome_ref = None          # last fitted summit in frame-0 pixels
    expected = 0
    is3d = stack.has_z
    out_pool, out_jobs = None, deque()
    if on_frame is not None and (pool is not None or _n_threads(s.threads) > 1):
        from concurrent.futures import ThreadPoolExecutor

        out_pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="apextrack-topview")
    try:
        for m in progress_over(measures, stack.n_frames, "frames", progress):
            t = m.t
            if t != expected:
                raise RuntimeError(f"frame {t} measured out of order (expected frame {expected})")
            expected += 1
            is_blank, view, hm, dome = m.blank, m.view, m.height, m.dome
            if is_blank:
                blank.append(t)
            rx, ry, rr = m.region
            det = detection_columns(m.blobs, t, float(times[t]), px)
            if dome is not None:
                apex_px = (dome["x_um"] / px, dome["y_um"] / px)
            elif dome_ref is not None and is3d and not is_blank:
                # the last fitted summit, carried into this frame (by the previous frame's registration)
                apex_px = tuple(float(v) for v in reg.from_reference(*dome_ref))
            else:
                apex_px = (rx, ry)
            reg.update(t, view, np.column_stack([det["x_px"], det["y_px"]]), apex_px)
            if "z_px" in det:
                det["z_um"] = det.pop("z_px") * dz
            elif hm is not None:
                det["z_um"] = hm.at(det["x_px"], det["y_px"])
            elif hm_last is not None and is3d and not is_blank:
                # the last height map, read where each detection lies in that map's own frame
                xr0, yr0 = reg.to_reference(det["x_px"], det["y_px"])
                mt = hm_matrix
                det["z_um"] = hm_last.at(mt[0, 0] * xr0 + mt[0, 1] * yr0 + mt[0, 2],
                                         mt[1, 0] * xr0 + mt[1, 1] * yr0 + mt[1, 2])
            if hm is not None:
                hm_last, hm_matrix = hm, reg.current_matrix
            if on_frame is not None:
                # the top view resampled into the first frame's frame of reference: it lines up
                # with the registered coordinates of every table (in a thread of its own when
                # frames are measured in threads; the calls keep frame order)
                if out_pool is None:
                    on_frame(t, warp_view(view, reg.current_matrix))
                else:
                    out_jobs.append(out_pool.submit(_warp_and_hand_on, on_frame, t, view, reg.current_matrix))
                    while len(out_jobs) > 2:
                        out_jobs.popleft().result()
            # coordinates into the first frame's frame of reference
            xr, yr = reg.to_reference(det["x_px"], det["y_px"])
            det["x_um"], det["y_um"] = xr * px, yr * px
            vx, vy = reg.to_reference(rx, ry)
            crow = {"frame": t, "time_h": float(times[t]), "view_x_um": float(vx) * px, "view_y_um": float(vy) * px,
                    "region_radius_um": rr * px}
            if dome is not None:
                sx, sy = reg.to_reference(dome["x_um"] / px, dome["y_um"] / px)
                dome_ref = (float(sx), float(sy))
                a = _tilt_vector(dome["tilt_deg"], dome["tilt_direction_deg"])
                # the tilt vector turned into the first frame's orientation (inverse of the
                # display-counter-clockwise rotation applied to image (x, y) vectors)
                rot = math.radians(reg.current_rotation_deg)
                c, sn = math.cos(rot), math.sin(rot)
                crow.update({"dome_x_um": float(sx) * px, "dome_y_um": float(sy) * px, "dome_z_um": dome["z_um"],
                             "curvature_um": dome["curvature_um"], "dome_up": dome["up"], "dome_rms_um": dome["rms_um"],
                             "_bx": c * a[0] - sn * a[1], "_by": sn * a[0] + c * a[1]})
            crow["dome_fitted"] = dome is not None
            crow["_fill"] = bool(is3d and not is_blank and not m.fitted)
            centre_rows.append(crow)
            det_parts.append(det)
        while out_jobs:
            out_jobs.popleft().result()
    finally:
        if out_pool is not None:
            out_pool.shutdown(wait=True, cancel_futures=True)
    if expected != stack.n_frames:
        raise RuntimeError(f"{expected} of {stack.n_frames} frames were measured")
    centres = pd.DataFrame(centre_rows)
    if "_bx" in centres.columns:
        _fill_domes(centres)
    centres = centres.drop(columns=["_fill"])
    if "_bx" in centres.columns:
        # the tilt is a property of the specimen: a running median over 5 frames steadies it;
        # directions are in the first frame's orientation
        bx, by = centres["_bx"].to_numpy(float), centres["_by"].to_numpy(float)
        bx = pd.Series(bx).rolling(5, center=True, min_periods=1).median().to_numpy()
        by = pd.Series(by).rolling(5, center=True, min_periods=1).median().to_numpy()
        sb = np.clip(np.hypot(bx, by), 0, 0.99)
        centres["measured_tilt_deg"] = np.degrees(np.arcsin(sb))
        centres["tilt_deg"] = centres["measured_tilt_deg"] if s.tilt_correction else 0.0
        centres["tilt_direction_deg"] = np.mod(np.degrees(np.arctan2(-by, bx)), 360.0)
        centres = centres.drop(columns=["_bx", "_by"])
    if s.centre_um is not None:
        centres["x_um"], centres["y_um"], centres["method"] = float(s.centre_um[0]), float(s.centre_um[1]), "user"
    else:
        use_dome = "dome_x_um" in centres.columns
        centres["x_um"] = centres["dome_x_um"].fillna(centres["view_x_um"]) if use_dome else centres["view_x_um"]
        centres["y_um"] = centres["dome_y_um"].fillna(centres["view_y_um"]) if use_dome else centres["view_y_um"]
        centres["method"] = "dome"
    first = ["frame", "time_h", "x_um", "y_um", "method"]
    centres = centres[first + [c for c in centres.columns if c not in first]]
    centres.attrs["blank_frames"] = blank  # frames whose pixels all hold one value
    if extra is not None:
        extra["registration"] = reg.table()
    detections = _table_of(det_parts)
    detections.insert(0, "detection_id", np.arange(len(detections), dtype=np.int64))
    return detections, centres


def _table_of(parts: list[dict[str, np.ndarray]]) -> pd.DataFrame:
    """One table of the frames' detection columns, in order; a column some frames lack is NaN
    there (the columns in order of first appearance, as :func:`pandas.concat` gives them)."""
    names: dict[str, None] = {}
    for part in parts:
        names.update(dict.fromkeys(part))
    if not names:
        return pd.DataFrame()
    cols = {}
    for c in names:
        pieces = [part[c] if c in part else np.full(len(part["frame"]), np.nan) for part in parts]
        cols[c] = np.concatenate(pieces)
    return pd.DataFrame(cols)
