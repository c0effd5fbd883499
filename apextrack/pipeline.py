"""One stack end to end: read → project → centre → detect → link → birth order → phyllotaxis →
write. Every stage is a library function; this module only strings them together, times them
and writes the results folder atomically.
"""

from __future__ import annotations

import os
import platform
import sys
import threading
import time
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import __version__
from .apex import choose_centres
from .birth import order_primordia
from .errors import AnalysisError
from .imaging import TopViewWriter, _n_threads, image_stage, measure_frames, stage_context
from .link import add_polar, link_tracks
from .results import StagedFolder, check_output_dir, write_result_tables
from .settings import Settings, from_dict, result_settings
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


def open_stack(source, s: Settings, quiet: bool = False) -> Stack:
    """The stack at ``source`` with the metadata overrides of ``s`` (pixel size, z step,
    interval, time axis), as every analysis opens it. ``quiet``: its warnings are not raised
    (a worker opening the stack again; the analysis reports them once)."""
    if quiet:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return open_stack(source, s)
    return read_stack(source, pixel_size_um=s.pixel_size_um, z_step_um=s.z_step_um, interval_h=s.interval_h,
                      time_axis=s.time_axis)


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


def _frame_pool(source, stack: Stack, s: Settings):
    """Worker processes measuring this stack's frames (:class:`apextrack.frame_pool.FramePool`),
    or None: frames are then measured in threads. Processes need the stack as a file they can
    open themselves, more than one thread asked for, a few frames to share out, and a program
    that may fork (:func:`apextrack.frame_pool.can_fork`)."""
    n = _n_threads(s.threads)
    if not s.frame_processes or isinstance(source, Stack) or stack.path is None or n <= 1 or stack.n_frames < 3:
        return None
    from .frame_pool import FramePool, can_fork

    if not can_fork():
        return None
    try:
        return FramePool(source, s, min(n, stack.n_frames))
    except Exception:  # workers that cannot start (e.g. no memory to fork): threads do the work
        return None


def _input_checksums(path, stop=None) -> dict[str, str]:
    """SHA-256 of the input file, or of every file of an input folder."""
    if path is None:
        return {}
    p = Path(path)
    if p.is_file():
        return {p.name: sha256_file(p, stop=stop)}
    files = sorted(q for q in p.rglob("*") if q.is_file())
    return {str(q.relative_to(p)): sha256_file(q, stop=stop) for q in files}


class _Checksums:
    """The input's checksums, computed while the stack is analysed (the file is read once more,
    from the page cache).

    Without worker processes, in a thread of this program started at once, at the lowest
    priority, so that it does not hold up the analysis (hashing releases the interpreter lock).
    With worker processes (``pool``), by one of them once the frames are measured
    (:meth:`start`): then the workers have little to do while the tracks are linked here, and
    a thread at the lowest priority would find no processor time left until the very end.
    """

    def __init__(self, path, pool=None):
        self._path, self._pool, self._job = path, pool, None
        self._stop = threading.Event()
        self._value: dict[str, str] | None = None  # set once the checksums are in hand
        self._error: BaseException | None = None
        self._thread = None
        if pool is None:
            self._thread = threading.Thread(target=self._run, args=(path,), name="apextrack-checksum", daemon=True)
            self._thread.start()

    def start(self) -> None:
        """Hand the work to a worker process (when there are any; at most once)."""
        if self._pool is not None and self._job is None:
            self._job = self._pool.call(_input_checksums, self._path)

    def _run(self, path) -> None:
        if sys.platform.startswith("linux"):
            # the lowest scheduling priority, for this thread alone (Linux sets it per thread):
            # the hashing takes the processor time the analysis leaves idle
            try:
                os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), 19)
            except OSError:
                pass
        try:
            self._value = _input_checksums(path, self._stop)
        except BaseException as exc:  # handed on by result()
            self._error = exc

    def result(self) -> dict[str, str]:
        """The checksums (waited for; asked again, the same)."""
        if self._value is None:
            if self._pool is not None:
                self.start()
                self._value = self._job.result()
            else:
                self._thread.join()
                if self._error is not None:
                    raise self._error
        return self._value

    def cancel(self) -> None:
        self._stop.set()
        if self._job:
            self._job.cancel()


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
        "settings": result_settings(settings),
    })
    return summary


def analyse(source=None, out: str | Path | None = None, settings: Settings | dict | None = None, *,
            overwrite: bool = False, progress: bool = True, settings_file=None, write_report: bool | None = None,
            measures=None, **overrides) -> AnalysisResult:
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
    measures : iterable of :class:`apextrack.imaging.FrameMeasure`, optional
        Every frame's measurements, in frame order, made elsewhere (e.g. by dask tasks, see
        :mod:`apextrack.batch`); by default the frames are measured here.

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
            stack = open_stack(source, s)
    stack_warnings = list(stack.warnings)
    for w in caught:
        if progress and issubclass(w.category, StackWarning):
            print(f"apextrack: warning: {w.message}", file=sys.stderr)
    stack.channel_index(s.channel)  # fail early on a bad channel
    lap("read", t0)
    t_image = time.perf_counter()
    pool, measured_in = None, "the caller"
    if measures is None:
        # the first frame with signal is measured here, then the worker processes are forked
        # (while this program has no other thread): they start with what that frame loaded and
        # warmed up (libraries, caches) instead of each loading it again
        try:
            ctx, done = stage_context(stack, s)
        except BaseException:
            if not isinstance(source, Stack):
                stack.close()
            raise
        pool = _frame_pool(source, stack, s)
        measured_in = f"{pool.size} processes" if pool is not None else f"{_n_threads(s.threads)} thread(s)"
        measures = measure_frames(stack, s, ctx, done=done, pool=pool)
    try:
        checksums = _Checksums(stack.path, pool)
        staging = StagedFolder(out) if out is not None else None
    except BaseException:
        if pool is not None:
            pool.close()
        raise
    try:
        writer = TopViewWriter(staging.path / "topview.tif", stack) if staging is not None else None

        def on_frame(t, view):
            if writer is not None:
                writer.write(t, view)

        image_extra: dict = {}
        try:
            detections, centres = image_stage(stack, s, progress, on_frame, extra=image_extra, measures=measures,
                                              pool=pool)
        finally:
            if writer is not None:
                writer.close()
        # while the tracks are linked here, a worker computes the checksum and the workers load
        # the plotting library
        checksums.start()
        if pool is not None and staging is not None and (s.report if write_report is None else write_report):
            pool.load_report()
        lap("image", t_image)
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
        tracks, primordia, phyl = measured.tracks, measured.primordia, measured.phyllotaxis
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
            "input_sha256": None,  # filled in when the checksum thread is done (below)
            "stack": {"axes": stack.axes, "shape": list(stack.shape), "dtype": str(np.dtype(stack.data.dtype)),
                      "format": stack.source_format, "pixel_size_um": list(stack.pixel_size_um),
                      "interval_h": stack.interval_h, "channel_names": stack.channel_names},
            "warnings": stack_warnings,
            "settings": s.to_dict(),
            "frames_measured_in": measured_in,
            "started": started,
            "timings_s": timings,
        }
        result = AnalysisResult(detections=detections, tracks=tracks, primordia=primordia,
                                divergence=phyl.divergence, centres=centres, summary=summary, run=run,
                                settings=s, parastichies=getattr(phyl, "parastichies", pd.DataFrame()))
        if "registration" in image_extra:
            result.extra_tables["registration"] = image_extra["registration"]

        def finished_run():
            # the checksum, still being computed while the figures are drawn, joins the record
            run["input_sha256"] = checksums.result()
            return run

        if staging is not None:
            t0 = time.perf_counter()
            write_results(result, staging.path)
            lap("write", t0)
            if s.report if write_report is None else write_report:
                # report.html + figures/, drawn from the tables and one top-view frame read from disk
                from .report import write_report as _write_report

                t0 = time.perf_counter()
                _write_report(result, staging.path, run_record=finished_run, pool=pool)
                lap("report", t0)
        finished_run()
        run["finished"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
        run["wall_time_s"] = round(time.time() - t_start, 3)
        if staging is not None:
            write_json(run, staging.path / "run.json")
            staging.commit()
            result.out_dir = out
        return result
    except BaseException:
        checksums.cancel()
        if staging is not None:
            staging.abort()
        raise
    finally:
        if pool is not None:
            pool.close()
        if not isinstance(source, Stack):
            stack.close()


def write_results(result: AnalysisResult, folder: str | Path) -> None:
    """Write every table and the summary of a result into ``folder`` (atomically, file by file)."""
    write_result_tables(result.tables(), result.summary, folder)
