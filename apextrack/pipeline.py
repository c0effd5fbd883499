"""One stack end to end: read → project → centre → detect → link → birth order → phyllotaxis →
write. Every stage is a library function; this module only strings them together, times them
and writes the results folder atomically.
"""

from __future__ import annotations

import math
import os
import platform
import shutil
import sys
import time
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from . import __version__
from .apex import centre_from_view, choose_centres
from .birth import order_primordia
from .detect import detect_blobs, detections_to_um, scales_px
from .errors import AnalysisError, OutputError
from .link import add_polar, link_detections, link_tracks
from .projection import top_view
from .results import write_result_tables
from .settings import Settings, from_dict
from .stack import Stack, StackWarning, read_stack
from .tables import sha256_file, write_json

#: Files every results folder holds.
RESULT_FILES = ["detections.csv", "tracks.csv", "primordia.csv", "divergence.csv", "summary.json", "run.json"]


@dataclass
class AnalysisResult:
    """Everything one analysis produced."""

    detections: pd.DataFrame
    tracks: pd.DataFrame
    primordia: pd.DataFrame
    divergence: pd.DataFrame
    centres: pd.DataFrame
    summary: dict
    run: dict
    settings: Settings
    parastichies: pd.DataFrame = field(default_factory=pd.DataFrame)
    out_dir: Path | None = None
    extra_tables: dict[str, pd.DataFrame] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """The tables by name (as written to ``<name>.csv``)."""
        t = {"detections": self.detections, "tracks": self.tracks, "primordia": self.primordia,
             "divergence": self.divergence, "centres": self.centres}
        if not self.parastichies.empty:
            t["parastichies"] = self.parastichies
        t.update(self.extra_tables)
        return t


def demo_stack_path(name: str = "spiral") -> Path:
    """Path of a bundled demo stack."""
    from .model import demo_stack_path as _demo

    return Path(_demo(name))


def _progress(iterable, total: int, desc: str, enabled):
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


def resolve_settings(settings: Settings | dict | None = None, settings_file=None, **overrides) -> Settings:
    """Defaults ← settings file ← ``settings`` ← keyword overrides (``None`` overrides are ignored)."""
    from . import settings as settings_mod

    s = Settings()
    if settings_file is not None:
        s = settings_mod.load(settings_file, base=s)
    if isinstance(settings, Settings):
        s = settings
    elif isinstance(settings, dict):
        s = from_dict(settings, base=s)
    overrides = {k: v for k, v in overrides.items() if v is not None}
    if overrides:
        s = from_dict(overrides, source="arguments", base=s)
    return s


def check_output_dir(out: Path, overwrite: bool) -> None:
    """Refuse an existing non-empty folder unless ``overwrite``; check the parent is writable."""
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError("exists and is not a folder", out, "give a folder path for the results")
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise OutputError("results folder exists and is not empty", out, "use --overwrite or another --out")
    parent = out.parent if not out.exists() else out
    probe = parent
    while not probe.exists():
        probe = probe.parent
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputError("folder is not writable", probe, "choose another output folder")


class _Staging:
    """A hidden sibling folder that receives every output and replaces ``out`` when complete."""

    def __init__(self, out: Path):
        self.out = Path(out)
        self.out.parent.mkdir(parents=True, exist_ok=True)
        host = platform.node().replace("-", "_") or "host"
        self._sweep(host)
        self.path = self.out.parent / f".{self.out.name}.partial-{host}-{os.getpid()}-{time.time_ns()}"
        try:
            self.path.mkdir()
        except OSError as exc:
            raise OutputError(f"cannot create the results folder ({exc.strerror})", self.out.parent,
                              "choose another output folder") from None

    def _sweep(self, host: str) -> None:
        """Remove staging folders left by killed runs (this host, process no longer running)."""
        for left in self.out.parent.glob(f".{self.out.name}.partial-{host}-*"):
            pid = left.name.rsplit("-", 2)[-2]
            if not pid.isdigit() or int(pid) == os.getpid():
                continue
            try:
                os.kill(int(pid), 0)
            except ProcessLookupError:
                shutil.rmtree(left, ignore_errors=True)
            except (OSError, ValueError):
                pass

    def commit(self) -> None:
        old = None
        if self.out.exists():
            if self.out.is_dir() and not any(self.out.iterdir()):
                self.out.rmdir()
            else:
                old = self.out.parent / f".{self.out.name}.old-{os.getpid()}-{time.time_ns()}"
                os.replace(self.out, old)
        os.replace(self.path, self.out)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)

    def abort(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)


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
        self._file.write(np.ascontiguousarray(view, dtype=self.dtype).tobytes())

    def close(self) -> None:
        if not self._file.closed:
            self._file.close()


def _input_checksums(stack: Stack) -> dict[str, str]:
    if stack.path is None:
        return {}
    p = Path(stack.path)
    if p.is_file():
        return {p.name: sha256_file(p)}
    files = sorted(q for q in p.rglob("*") if q.is_file())
    return {str(q.relative_to(p)): sha256_file(q) for q in files}


def _native_frame(stack: Stack, t: int, channel=None) -> np.ndarray:
    """One channel of timepoint ``t`` in the stack's own dtype (as :meth:`Stack.frame`, which
    converts to float32, for integer data; float data goes through :meth:`Stack.frame`, which
    also rejects NaN and infinite values)."""
    if np.dtype(stack.data.dtype).kind == "f":
        return stack.frame(t, channel)
    arr = stack.timepoint(t)
    rest = stack.axes.replace("T", "")
    if "C" in rest:
        return np.take(arr, stack.channel_index(channel), axis=rest.index("C"))
    stack.channel_index(channel)  # a bad channel name is a clear error, as in Stack.frame
    return arr


def image_stage(stack: Stack, s: Settings, progress: bool = True,
                on_frame: Callable[[int, np.ndarray], None] | None = None,
                extra: dict | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Project, register, fit the dome and detect primordia frame by frame (streaming).

    Per frame: the dome surface height map (membrane channel when given, else the reporter;
    3D stacks), the top view (``max`` or ``surface`` shell projection), the apex region, the
    detections (2D on the top view, or 3D with ``detect_3d``), the tilted-paraboloid fit of the
    dome (summit, curvature, tilt), and the registration to the previous frame
    (:class:`apextrack.register.Registrar`). Registration is applied to coordinates: ``x_um``,
    ``y_um`` of detections and every centre estimate are in the frame of reference of the
    first frame; ``x_px``/``y_px`` stay the pixel positions in the frame's own top view.

    Returns ``(detections, centres)``; ``on_frame(t, top_view)`` is called for every frame with
    the top view resampled into the first frame's frame of reference (e.g. to write the top
    views), so that no more than one frame is held in memory. When
    ``extra`` is a dict it receives the ``registration`` table.
    """
    from .apex import _tilt_vector, dome_is_plausible, fit_dome
    from .detect import apex_region, detect_blobs_3d
    from .projection import max_projection, shell_projection, surface_height
    from .register import Registrar

    px = stack.pixel_size_um[0]
    dz = stack.pixel_size_um[2] if stack.has_z else math.nan
    ny, nx = stack.shape_yx
    if s.centre_um is not None:
        cx, cy = s.centre_um
        if not (0 <= cx <= nx * px and 0 <= cy <= ny * px):
            from .errors import SettingsError

            raise SettingsError(f"apex centre ({cx:g}, {cy:g}) µm lies outside the image "
                                f"(0–{nx * px:g} × 0–{ny * px:g} µm)", stack.path,
                                "give --centre X,Y in µm inside the image")
    if s.membrane_channel is not None:
        stack.channel_index(s.membrane_channel)  # fail early on a bad channel
    sigmas = scales_px(s.primordium_diameter_min_um, s.primordium_diameter_max_um, px, s.n_scales)
    reg = Registrar((ny, nx), px, match_tol_px=max(s.link_search_um / px, 3.0), enabled=bool(s.register))
    det_parts, centre_rows, blank = [], [], []
    times = stack.times_h()
    side = {"auto": "auto", "+z": 1, "-z": -1}[s.surface_side]
    dome_prev = None
    for t in _progress(range(stack.n_frames), stack.n_frames, "frames", progress):
        # the volume stays in the stack's dtype: projections and the height map's binning
        # read it as it is, nothing converts it whole to float
        vol = _native_frame(stack, t, s.channel)
        mip = max_projection(vol)  # float32
        is_blank = bool(vol.size) and float(mip.min()) == float(mip.max()) and float(vol.min()) == float(mip.max())
        if is_blank:
            blank.append(t)
        hm = None
        if vol.ndim == 3 and not is_blank:
            surf = vol if s.membrane_channel is None else _native_frame(stack, t, s.membrane_channel)
            hm = surface_height(surf, dz, px, up=side)
            if isinstance(side, str) and side == "auto":
                side = hm.up  # decided once, from the first frame with signal
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
        det = detections_to_um(blobs, t, float(times[t]), px)
        dome = None
        if hm is not None:
            hx, hy, hz = hm.points_px()
            if s.membrane_channel is None and len(blobs):
                # primordia bulge out of the reporter's surface: leave their cells out of the fit
                from scipy.spatial import cKDTree

                dist, idx = cKDTree(blobs[["x_px", "y_px"]].to_numpy(float)).query(np.column_stack([hx, hy]))
                far = dist > 1.5 * blobs["radius_px"].to_numpy(float)[idx]
                hx, hy, hz = hx[far], hy[far], hz[far]
            dome = fit_dome(hx * px, hy * px, hz, up=hm.up, init=dome_prev, robust_um=max(0.5, 0.25 * dz))
            if not dome_is_plausible(dome, (nx * px, ny * px)):
                dome = None  # no summit found (a plane, or a summit outside the field)
            dome_prev = dome if dome is not None else dome_prev
            if "z_px" in det.columns:
                det["z_um"] = det.pop("z_px").to_numpy(float) * dz
            else:
                det["z_um"] = hm.at(det["x_px"].to_numpy(float), det["y_px"].to_numpy(float))
        apex_px = (dome["x_um"] / px, dome["y_um"] / px) if dome is not None else (rx, ry)
        row = reg.update(t, view, det[["x_px", "y_px"]].to_numpy(float), apex_px)
        if on_frame is not None:
            # the top view resampled into the first frame's frame of reference: it lines up
            # with the registered coordinates of every table
            on_frame(t, reg.warp_to_reference(view))
        # coordinates into the first frame's frame of reference
        xr, yr = reg.to_reference(det["x_px"].to_numpy(float), det["y_px"].to_numpy(float))
        det["x_um"], det["y_um"] = xr * px, yr * px
        vx, vy = reg.to_reference(rx, ry)
        crow = {"frame": t, "time_h": float(times[t]), "view_x_um": float(vx) * px, "view_y_um": float(vy) * px,
                "region_radius_um": rr * px}
        if dome is not None:
            sx, sy = reg.to_reference(dome["x_um"] / px, dome["y_um"] / px)
            a = _tilt_vector(dome["tilt_deg"], dome["tilt_direction_deg"])
            crow.update({"dome_x_um": float(sx) * px, "dome_y_um": float(sy) * px, "dome_z_um": dome["z_um"],
                         "curvature_um": dome["curvature_um"], "dome_up": dome["up"], "dome_rms_um": dome["rms_um"],
                         "_ax": a[0], "_ay": a[1], "_rot": reg.current_rotation_deg})
        centre_rows.append(crow)
        det_parts.append(det)
    centres = pd.DataFrame(centre_rows)
    if "_ax" in centres.columns:
        # the tilt is a property of the specimen: a running median over 5 frames steadies it;
        # directions are turned into the first frame's orientation
        rot = np.radians(centres["_rot"].to_numpy(float))
        ax, ay = centres["_ax"].to_numpy(float), centres["_ay"].to_numpy(float)
        c, sn = np.cos(rot), np.sin(rot)
        # inverse of the display-counter-clockwise rotation applied to image (x, y) vectors
        bx, by = c * ax - sn * ay, sn * ax + c * ay
        bx = pd.Series(bx).rolling(5, center=True, min_periods=1).median().to_numpy()
        by = pd.Series(by).rolling(5, center=True, min_periods=1).median().to_numpy()
        sb = np.clip(np.hypot(bx, by), 0, 0.99)
        centres["measured_tilt_deg"] = np.degrees(np.arcsin(sb))
        centres["tilt_deg"] = centres["measured_tilt_deg"] if s.tilt_correction else 0.0
        centres["tilt_direction_deg"] = np.mod(np.degrees(np.arctan2(-by, bx)), 360.0)
        centres = centres.drop(columns=["_ax", "_ay", "_rot"])
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
    detections = pd.concat(det_parts, ignore_index=True) if det_parts else pd.DataFrame()
    detections.insert(0, "detection_id", np.arange(len(detections), dtype=np.int64))
    return detections, centres


@dataclass
class Measurements:
    """What :func:`measure_tracks` derives from tracks: primordia, angles and summary."""

    tracks: pd.DataFrame
    primordia: pd.DataFrame
    phyllotaxis: Any
    birth_info: dict


def measure_tracks(tracks: pd.DataFrame, centres: pd.DataFrame, settings: Settings,
                   primordia: pd.DataFrame | None = None) -> Measurements:
    """Everything after linking: polar coordinates about the apex centre, emergence times and
    birth order, and the phyllotaxis measurements.

    This is what is re-run after a person edits tracks (or, with ``primordia`` given, the birth
    ranks) in the viewer.

    Parameters
    ----------
    tracks : DataFrame
        Linked detections (``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um`` ...).
    centres : DataFrame
        Apex centre per frame (``frame``, ``x_um``, ``y_um``).
    settings : Settings
    primordia : DataFrame, optional
        A primordia table whose ``birth_rank`` / ``co_initiated`` were set by hand: kept as given
        instead of being re-estimated.
    """
    tracks = add_polar(tracks, centres)
    if primordia is None:
        centre_sd = (float(np.nanmedian(centres["centre_sd_um"])) if "centre_sd_um" in centres
                     and centres["centre_sd_um"].notna().any() else 0.0)
        primordia, birth_info = order_primordia(tracks, settings.co_initiation_h, settings.min_track_frames,
                                                centre_sd_um=centre_sd)
    else:
        primordia = primordia.sort_values("birth_rank", kind="stable").reset_index(drop=True)
        birth_info = {"method": "birth ranks set by hand"}
    from .phyllotaxis import analyse_phyllotaxis

    phyl = analyse_phyllotaxis(primordia, tracks, settings)
    return Measurements(tracks=tracks, primordia=primordia, phyllotaxis=phyl, birth_info=birth_info)


def make_summary(measured: Measurements, detections: pd.DataFrame, settings: Settings, context: dict) -> dict:
    """The ``summary.json`` content: the phyllotaxis summary, counts, the stack's scale
    (``context``: stack, n_frames, pixel_size_um, z_step_um, interval_h) and the settings."""
    summary = dict(measured.phyllotaxis.summary)
    summary.update(context)
    summary.update({
        "n_detections": int(len(detections)),
        "n_tracks": int(measured.tracks["track_id"].nunique()),
        "n_primordia": int(len(measured.primordia)),
        "birth_order": dict(measured.birth_info),
        "settings": settings.to_dict(),
    })
    return summary


def analyse(source=None, out: str | Path | None = None, settings: Settings | dict | None = None, *,
            overwrite: bool = False, progress: bool = True, settings_file=None, write_report: bool | None = None,
            **overrides) -> AnalysisResult:
    """Analyse one time-lapse stack end to end.

    Parameters
    ----------
    source : path, array or Stack, optional
        The stack (any format :func:`apextrack.stack.read_stack` reads). ``None``: the bundled
        demo stack.
    out : path, optional
        Results folder. Written atomically: it appears complete or not at all; an existing
        non-empty folder is replaced only with ``overwrite=True``.
    settings : Settings or dict, optional
        Parameters (see :mod:`apextrack.settings`); keyword arguments override single values,
        e.g. ``analyse(path, pixel_size_um=0.5)``.
    progress : bool or callable
        Show progress bars on stderr; a callable ``progress(done, total, stage)`` is called
        instead (once per frame of the image stage).
    write_report : bool, optional
        Write ``report.html`` and ``figures/`` into ``out`` (default: ``settings.report``).

    Returns
    -------
    AnalysisResult
        The tables (detections, tracks, primordia, divergence, centres), summary and run record.
    """
    t_start = time.time()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    s = resolve_settings(settings, settings_file, **overrides)
    timings: dict[str, float] = {}

    def lap(name, t0):
        timings[name] = round(time.perf_counter() - t0, 4)

    if out is not None:
        out = Path(out)
        check_output_dir(out, overwrite)
    if source is None:
        source = demo_stack_path()
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", StackWarning)
        if isinstance(source, Stack):
            stack = source
        else:
            stack = read_stack(source, pixel_size_um=s.pixel_size_um, z_step_um=s.z_step_um,
                               interval_h=s.interval_h, time_axis=s.time_axis)
    stack_warnings = list(stack.warnings)
    for w in caught:
        if progress and issubclass(w.category, StackWarning):
            print(f"apextrack: warning: {w.message}", file=sys.stderr)
    stack.channel_index(s.channel)  # fail early on a bad channel
    lap("read", t0)

    staging = _Staging(out) if out is not None else None
    try:
        writer = TopViewWriter(staging.path / "topview.tif", stack) if staging is not None else None

        def on_frame(t, view):
            if writer is not None:
                writer.write(t, view)

        t0 = time.perf_counter()
        image_extra: dict = {}
        try:
            detections, centres = image_stage(stack, s, progress, on_frame, extra=image_extra)
        finally:
            if writer is not None:
                writer.close()
        lap("image", t0)
        blank = list(centres.attrs.get("blank_frames", []))
        if blank and len(blank) == stack.n_frames:
            raise AnalysisError("every frame is uniform (all pixels one value): the image holds no signal",
                                stack.path, "check the channel (--channel) and that the file holds the recorded images")
        if blank:
            msg = (f"frame(s) {', '.join(map(str, blank))} of {stack.n_frames} are blank (all pixels one value): "
                   f"no primordia detected there; tracks are linked across the gap when it is at most "
                   f"{s.link_memory} frame(s)")
            stack_warnings.append(msg)
            if progress:
                print(f"apextrack: warning: {stack.name}: {msg}", file=sys.stderr)
        if detections.empty:
            raise AnalysisError("no primordia found in any frame", stack.path,
                                "check the channel, the primordium diameter range and --min-snr")

        t0 = time.perf_counter()
        tracks, link_info = link_tracks(detections, s.link_search_um, s.link_memory, jump_um=s.link_jump_um,
                                        min_track_frames=s.min_track_frames, growth_aware=s.link_growth_aware,
                                        centre_hint=centres[["frame", "x_um", "y_um"]],
                                        fixed_centre=False)
        motion = link_info.pop("model", None)
        centres, centre_info = choose_centres(tracks, centres, s.centre_method, s.centre_um)
        if (s.centre_um is None and s.centre_method in ("auto", "motion") and motion is not None
                and (motion.n_new >= 3 or motion.anchor == "pattern")):
            # the linking's motion fit: a centre per frame pinned by the rim on which new
            # primordia appear and by the regular turn between successive primordia (the latter
            # alone when too few births were seen)
            how = "motion+rim" if motion.n_new >= 3 else "motion+pattern"
            mc = motion.centres_table(centres["frame"], centres["time_h"])
            centres = centres.assign(x_um=mc["x_um"].to_numpy(), y_um=mc["y_um"].to_numpy(),
                                     method=how, centre_sd_um=mc["centre_sd_um"].to_numpy())
            centre_info = {"requested": s.centre_method, "used": how,
                           "motion_fit": link_info.get("motion"), "other_estimates": centre_info}
        lap("link", t0)

        t0 = time.perf_counter()
        measured = measure_tracks(tracks, centres, s)
        tracks, primordia, phyl, birth_info = (measured.tracks, measured.primordia, measured.phyllotaxis,
                                               measured.birth_info)
        lap("birth_and_phyllotaxis", t0)

        context = {"stack": stack.name, "n_frames": stack.n_frames, "pixel_size_um": stack.pixel_size_um[0],
                   "z_step_um": None if not stack.has_z else stack.pixel_size_um[2],
                   "interval_h": stack.interval_h}
        summary = make_summary(measured, detections, s, context)
        summary["centre"] = centre_info
        summary["linking"] = link_info
        summary["blank_frames"] = blank
        if blank:
            summary.setdefault("notes", []).append(msg)
        run = {
            "package": "apextrack",
            "version": __version__,
            "python": platform.python_version(),
            "platform": platform.platform(),
            "input": str(stack.path) if stack.path is not None else "array",
            "input_sha256": _input_checksums(stack),
            "stack": {"axes": stack.axes, "shape": list(stack.shape), "dtype": str(np.dtype(stack.data.dtype)),
                      "format": stack.source_format, "pixel_size_um": list(stack.pixel_size_um),
                      "interval_h": stack.interval_h, "channel_names": stack.channel_names},
            "warnings": stack_warnings,
            "settings": s.to_dict(),
            "started": started,
            "timings_s": timings,
        }
        result = AnalysisResult(detections=detections, tracks=tracks, primordia=primordia,
                                divergence=phyl.divergence, centres=centres, summary=summary, run=run,
                                settings=s, parastichies=getattr(phyl, "parastichies", pd.DataFrame()))
        if "registration" in image_extra:
            result.extra_tables["registration"] = image_extra["registration"]
        if staging is not None:
            t0 = time.perf_counter()
            write_results(result, staging.path)
            lap("write", t0)
            if s.report if write_report is None else write_report:
                # report.html + figures/, drawn from the tables and one top-view frame read from disk
                from .report import write_report as _write_report

                t0 = time.perf_counter()
                _write_report(result, staging.path)
                lap("report", t0)
            run["finished"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
            run["wall_time_s"] = round(time.time() - t_start, 3)
            write_json(run, staging.path / "run.json")
            staging.commit()
            result.out_dir = out
        else:
            run["finished"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
            run["wall_time_s"] = round(time.time() - t_start, 3)
        return result
    except BaseException:
        if staging is not None:
            staging.abort()
        raise
    finally:
        if not isinstance(source, Stack):
            stack.close()


def write_results(result: AnalysisResult, folder: str | Path) -> None:
    """Write every table and the summary of a result into ``folder`` (atomically, file by file)."""
    write_result_tables(result.tables(), result.summary, folder)
