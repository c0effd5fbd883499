"""Many stacks on dask: one task per stack (and, for a long stack, one task per block of
``frames_per_task`` frames), results per stack, ``experiment.csv`` and an experiment report.

Each task receives a *path* (never an array) and opens its own file in the worker, so that
memory-mapped and zarr-backed stacks stream from disk there (a zarr store built by tifffile
cannot be pickled, and a pickled memory map is sent as the whole array). A stack that fails is
reported in one line and in ``experiment.csv`` (``status`` = ``failed`` with the error); the
others go on.

The cluster is an existing one when a scheduler address is given, else a
:class:`distributed.LocalCluster` of worker *processes* (one per core, one thread each). Worker
processes are spawned: a script that calls :func:`run_batch` must guard its entry point with
``if __name__ == "__main__":``.
"""

from __future__ import annotations

import glob as _glob
import logging
import os
import re
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

import pandas as pd

from .errors import ApextrackError, InputError
from .settings import Settings, from_dict
from .stack import TIFF_SUFFIXES
from .tables import write_table

#: Columns of ``experiment.csv``, in order.
EXPERIMENT_COLUMNS = [
    "stack", "source", "status", "error", "results_dir", "n_frames", "interval_h", "pixel_size_um",
    "n_detections", "n_tracks", "n_primordia", "n_co_initiated", "chirality",
    "divergence_mean_deg", "divergence_sd_deg", "divergence_ci_low_deg", "divergence_ci_high_deg",
    "plastochron_h", "plastochron_ci_low_h", "plastochron_ci_high_h", "plastochron_growth_h",
    "plastochron_ratio", "plastochron_ratio_ci_low", "plastochron_ratio_ci_high", "phyllotaxis_index",
    "parastichy_m", "parastichy_n", "parastichy_class", "mode", "n_permutations", "n_permuted",
    "wall_time_s",
]
_INT_COLUMNS = ["n_frames", "n_detections", "n_tracks", "n_primordia", "n_co_initiated", "parastichy_m",
                "parastichy_n", "n_permutations", "n_permuted"]
_FLOAT_COLUMNS = [c for c in EXPERIMENT_COLUMNS if c not in _INT_COLUMNS and c not in
                  ("stack", "source", "status", "error", "results_dir", "chirality", "parastichy_class", "mode")]


# ----------------------------------------------------------------------------------------------
# finding stacks
# ----------------------------------------------------------------------------------------------
def _is_tiff(p: Path) -> bool:
    return p.is_file() and p.name.lower().endswith(TIFF_SUFFIXES) and not p.name.startswith(".")


def _is_zarr(p: Path) -> bool:
    return p.is_dir() and (p.suffix.lower() == ".zarr" or (p / "zarr.json").exists() or (p / ".zarray").exists()
                           or (p / ".zgroup").exists())


def _natural(p: Path):
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", p.name)]


def find_stacks(source: str | Path | Sequence[str | Path]) -> list[Path]:
    """The stacks a batch analyses.

    Parameters
    ----------
    source : str, Path or sequence of them
        A folder (each TIFF file, each ``.zarr`` and each sub-folder holding TIFF files — one
        file per timepoint — is one stack), a glob pattern (``"plants/*.tif"``) or a list of
        stack paths.

    Returns
    -------
    list of Path
        In natural order (``p2`` before ``p10``).

    Raises
    ------
    InputError
        When nothing is found.
    """
    if isinstance(source, (list, tuple)):
        paths = [Path(p) for p in source]
        missing = [p for p in paths if not p.exists()]
        if missing:
            raise InputError("stack not found", missing[0], "check the path")
        return paths
    text = str(source)
    if any(ch in text for ch in "*?["):
        hits = [Path(p) for p in _glob.glob(text, recursive=True)]
        stacks = [p for p in hits if _is_tiff(p) or _is_zarr(p) or (p.is_dir() and any(_is_tiff(q) for q in p.iterdir()))]
        where = text
    else:
        folder = Path(text)
        if not folder.exists():
            raise InputError("folder not found", folder, "give a folder of stacks or a glob pattern such as 'data/*.tif'")
        if folder.is_file() or _is_zarr(folder):
            return [folder]
        stacks = []
        for p in folder.iterdir():
            if p.name.startswith("."):
                continue
            if _is_tiff(p) or _is_zarr(p):
                stacks.append(p)
            elif p.is_dir() and any(_is_tiff(q) for q in p.iterdir()):
                stacks.append(p)
        where = folder
    if not stacks:
        raise InputError("no stacks found (TIFF files, .zarr folders or folders of timepoint TIFFs)", where,
                         "give a folder of stacks or a glob pattern such as 'data/*.tif'")
    return sorted(stacks, key=_natural)


def stack_names(paths: Iterable[Path]) -> list[str]:
    """Results sub-folder names: the file names without their suffix, made unique."""
    names, seen = [], {}
    for p in paths:
        name = p.name
        for suffix in (".ome.tiff", ".ome.tif") + tuple(TIFF_SUFFIXES) + (".zarr",):
            if name.lower().endswith(suffix):
                name = name[: -len(suffix)]
                break
        name = name or "stack"
        k = seen.get(name, 0)
        seen[name] = k + 1
        names.append(name if k == 0 else f"{name}_{k + 1}")
    return names


# ----------------------------------------------------------------------------------------------
# one stack (runs in a worker)
# ----------------------------------------------------------------------------------------------
def _pair(v, i):
    if isinstance(v, (list, tuple)) and len(v) == 2 and v[i] is not None:
        return v[i]
    return None


def summary_row(summary: dict) -> dict[str, Any]:
    """The ``experiment.csv`` figures of one analysis summary (``None`` where not estimable)."""
    pair = summary.get("parastichy_pair")
    return {
        "n_frames": summary.get("n_frames"), "interval_h": summary.get("interval_h"),
        "pixel_size_um": summary.get("pixel_size_um"), "n_detections": summary.get("n_detections"),
        "n_tracks": summary.get("n_tracks"), "n_primordia": summary.get("n_primordia"),
        "n_co_initiated": summary.get("n_co_initiated"), "chirality": summary.get("chirality"),
        "divergence_mean_deg": summary.get("divergence_mean_deg"),
        "divergence_sd_deg": summary.get("divergence_sd_deg"),
        "divergence_ci_low_deg": _pair(summary.get("divergence_ci_deg"), 0),
        "divergence_ci_high_deg": _pair(summary.get("divergence_ci_deg"), 1),
        "plastochron_h": summary.get("plastochron_h"),
        "plastochron_ci_low_h": _pair(summary.get("plastochron_ci_h"), 0),
        "plastochron_ci_high_h": _pair(summary.get("plastochron_ci_h"), 1),
        "plastochron_growth_h": summary.get("plastochron_growth_h"),
        "plastochron_ratio": summary.get("plastochron_ratio"),
        "plastochron_ratio_ci_low": _pair(summary.get("plastochron_ratio_ci"), 0),
        "plastochron_ratio_ci_high": _pair(summary.get("plastochron_ratio_ci"), 1),
        "phyllotaxis_index": summary.get("phyllotaxis_index"),
        "parastichy_m": _pair(pair, 0), "parastichy_n": _pair(pair, 1),
        "parastichy_class": summary.get("parastichy_class"), "mode": summary.get("mode"),
        "n_permutations": summary.get("n_permutations"), "n_permuted": summary.get("n_permuted"),
    }


def analyse_stack_task(path: str, out_dir: str, settings: dict, overwrite: bool = False,
                       name: str | None = None, parts: list | None = None) -> dict[str, Any]:
    """Analyse one stack into ``out_dir`` and return its ``experiment.csv`` row.

    Runs in a worker: opens the stack itself from ``path``. ``parts`` are the results of
    :func:`measure_frames_task` for consecutive blocks of frames covering the whole stack (a
    long stack measured by several tasks); without them the frames are measured here. Never
    raises for a bad stack: the row then has ``status = "failed"`` and the error in one line.
    """
    from .pipeline import analyse

    t0 = time.perf_counter()
    row: dict[str, Any] = {"stack": name or Path(path).name, "source": str(path), "status": "ok", "error": "",
                           "results_dir": Path(out_dir).name}
    try:
        measures = None
        if parts is not None:
            failed = next((p for p in parts if isinstance(p, str)), None)
            if failed is not None:
                raise _TaskFailed(failed)
            measures = (m for part in parts for m in part)
        res = analyse(path, out=out_dir, settings=from_dict(settings) if settings else None,
                      overwrite=overwrite, progress=False, measures=measures)
        row.update(summary_row(res.summary))
    except _TaskFailed as exc:
        row.update(status="failed", error=str(exc))
    except ApextrackError as exc:
        row.update(status="failed", error=exc.one_line())
    except MemoryError:
        row.update(status="failed", error=f"{path}: out of memory — analyse it alone or give the workers more memory")
    except Exception as exc:  # an internal error must not stop the batch
        row.update(status="failed", error=f"{path}: internal error {type(exc).__name__}: {exc}")
    row["wall_time_s"] = round(time.perf_counter() - t0, 3)
    return row


class _TaskFailed(Exception):
    """A block of frames of this stack could not be measured (the message is the one line)."""


def _on_stack(path: str, settings: dict, work, failing: str):
    """``work(stack, settings)`` on the stack at ``path``, opened here as the analysis opens it
    (its warnings are the stack task's to report) and closed after; an error as one line
    (``failing``: what was being done, for running out of memory)."""
    from .pipeline import open_stack

    s = from_dict(settings) if settings else Settings()
    try:
        stack = open_stack(path, s, quiet=True)
        try:
            return work(stack, s)
        finally:
            stack.close()
    except ApextrackError as exc:
        return exc.one_line()
    except MemoryError:
        return f"{path}: out of memory {failing}"


def stage_context_task(path: str, settings: dict):
    """The :class:`~apextrack.imaging.StageContext` of the stack at ``path`` (from its first
    frame with signal), computed once and handed to every block of its frames; or the error in
    one line."""
    from .imaging import stage_context

    return _on_stack(path, settings, lambda stack, s: stage_context(stack, s)[0],
                     "finding the stack's first frame with signal")


def measure_frames_task(path: str, settings: dict, first: int, stop: int, ctx) -> list | str:
    """Measure frames ``first … stop − 1`` of the stack at ``path`` (a block of a long stack).

    Runs in a worker and opens the stack itself. Every frame is measured on its own (see
    :func:`apextrack.imaging.measure_frame`) with the context the whole stack shares (``ctx``,
    from :func:`stage_context_task`), so the blocks together give exactly what one task would.
    Returns the list of :class:`~apextrack.imaging.FrameMeasure`, or the error in one line.
    """
    from .imaging import measure_frames

    if isinstance(ctx, str):  # the context could not be found: its error is this block's
        return ctx
    return _on_stack(path, settings,
                     lambda stack, s: list(measure_frames(stack, s, ctx, frames=range(first, stop), threads=1)),
                     f"measuring frames {first}–{stop - 1}")


def frame_blocks(n_frames: int, frames_per_task: int) -> list[tuple[int, int]]:
    """Consecutive blocks ``(first, stop)`` of at most ``frames_per_task`` frames covering a
    stack of ``n_frames`` (one block when ``frames_per_task`` is 0 or the stack is short).

    Examples
    --------
    >>> frame_blocks(10, 4)
    [(0, 4), (4, 8), (8, 10)]
    >>> frame_blocks(10, 0)
    [(0, 10)]
    """
    if frames_per_task <= 0 or n_frames <= frames_per_task:
        return [(0, n_frames)]
    return [(a, min(a + frames_per_task, n_frames)) for a in range(0, n_frames, frames_per_task)]


def _n_frames(path: Path, s: Settings) -> int | None:
    """Frames of the stack at ``path`` (header only), or None when it cannot be opened (its task
    will then report why)."""
    from .pipeline import open_stack

    try:
        stack = open_stack(str(path), s, quiet=True)
    except ApextrackError:
        return None
    try:
        return stack.n_frames
    finally:
        stack.close()


# ----------------------------------------------------------------------------------------------
# the batch
# ----------------------------------------------------------------------------------------------
@dataclass
class BatchResult:
    """What a batch produced."""

    experiment: pd.DataFrame
    out: Path
    dashboard: str | None = None
    report: Path | None = None
    failed: list[str] = field(default_factory=list)

    @property
    def n_failed(self) -> int:
        return len(self.failed)


def experiment_table(rows: list[dict]) -> pd.DataFrame:
    """``experiment.csv`` as a DataFrame with stable column order and dtypes."""
    df = pd.DataFrame(rows)
    for c in EXPERIMENT_COLUMNS:
        if c not in df:
            df[c] = None
    df = df[EXPERIMENT_COLUMNS + [c for c in df.columns if c not in EXPERIMENT_COLUMNS]]
    for c in _INT_COLUMNS:
        df[c] = pd.to_numeric(df[c], errors="coerce").astype("Int64")
    for c in _FLOAT_COLUMNS:
        df[c] = pd.to_numeric(df[c], errors="coerce").astype("float64")
    for c in ("stack", "source", "status", "error", "results_dir", "chirality", "parastichy_class", "mode"):
        df[c] = df[c].astype(object).where(df[c].notna() & (df[c].astype(str) != ""), None)
    return df


# what analysing a stack loads on first use (besides apextrack.pipeline's own imports)
_TASK_MODULES = ("apextrack.pipeline", "apextrack.projection", "apextrack.apex", "apextrack.detect",
                 "apextrack.register", "apextrack.link", "apextrack.phyllotaxis", "apextrack.report",
                 "scipy.fft", "scipy.linalg", "scipy.optimize", "scipy.sparse.csgraph", "scipy.sparse.linalg",
                 "scipy.spatial", "scipy.special", "skimage.filters", "skimage.registration", "threadpoolctl",
                 "tifffile")


def warm_worker() -> None:
    """Load in a worker what analysing a stack loads on first use: the analysis's libraries and
    the plotting library, with one small figure drawn (:func:`apextrack.report.warm_up`). A
    worker's first stack is then no slower than the next."""
    import importlib

    for name in _TASK_MODULES:
        importlib.import_module(name)
    from .report import warm_up

    warm_up()


class _HeartbeatAtClose(logging.Filter):
    """Leaves out a worker's report that its heartbeat could not reach the scheduler.

    In a local cluster of this program the scheduler lives in this program and goes away only
    when the cluster is closed. A heartbeat in flight at that moment fails, and the worker would
    print the failure, with a traceback, at the end of a batch that went well (a known race of
    dask.distributed)."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not record.getMessage().startswith("Failed to communicate with scheduler during heartbeat")


def _start_local_worker() -> None:
    """Run in every worker of the local cluster :func:`make_client` starts: its closing stays
    quiet (:class:`_HeartbeatAtClose`) and it is warmed (:func:`warm_worker`)."""
    worker_log = logging.getLogger("distributed.worker")
    if not any(isinstance(f, _HeartbeatAtClose) for f in worker_log.filters):
        worker_log.addFilter(_HeartbeatAtClose())
    warm_worker()


def make_client(scheduler: str | None = None, n_workers: int | None = None, *, dashboard_address: str = ":0"):
    """A dask client: connected to ``scheduler`` when given, else to a new ``LocalCluster`` of
    ``n_workers`` processes (default: one per core), one thread each. Its workers are started
    warm (:func:`warm_worker`, all at once) and close without noise (:class:`_HeartbeatAtClose`).

    Returns ``(client, cluster)``; ``cluster`` is ``None`` for an existing scheduler. Close both.
    """
    from distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout="5s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot connect to the dask scheduler ({exc})", scheduler,
                             "check the address (e.g. tcp://host:8786) or leave --scheduler out") from None
        return client, None
    n = int(n_workers) if n_workers else (os.cpu_count() or 1)
    if n < 1:
        raise InputError(f"the number of workers must be at least 1, not {n}")
    import dask

    # dask starts its workers with MALLOC_TRIM_THRESHOLD_ set; setting it turns off the C
    # library's growing threshold for serving large blocks from mapped memory, so that every
    # frame-sized array is mapped afresh and its pages zero-filled: the analysis ran ~1.5× slower
    # (a T = 10 stack: 0.9 s instead of 0.5 s for its frames). The workers of this cluster start
    # without it (setting a key to None removes it), and without dask's sampling profiler (a
    # thread looking at every thread's stack every 10 ms, for the dashboard's profile page)
    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
                          "distributed.worker.profile.enabled": False}):
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=dashboard_address)
    client = Client(cluster)
    try:
        client.run(_start_local_worker)
    except Exception:  # noqa: BLE001 - only a head start: a worker that cannot load these fails its tasks plainly
        pass
    return client, cluster


def run_batch(source, out: str | Path, settings: Settings | dict | None = None, *, scheduler: str | None = None,
              n_workers: int | None = None, client=None, overwrite: bool = False, progress: bool = True,
              settings_file=None, report: bool = True, **overrides) -> BatchResult:
    """Analyse many stacks on dask, one task per stack.

    Parameters
    ----------
    source : str, Path or list
        Folder, glob pattern or list of stacks (see :func:`find_stacks`).
    out : str or Path
        Output folder: ``<out>/<stack name>/`` per stack, ``experiment.csv`` (one row per
        stack: summary figures, ``status``, ``error``) and ``experiment_report.html``.
    settings, settings_file, **overrides
        Analysis parameters, as for :func:`apextrack.pipeline.analyse` (the same for every stack).
    scheduler : str, optional
        Address of a running dask scheduler (``tcp://host:8786``).
    n_workers : int, optional
        Worker processes of the local cluster (default: one per core).
    client : distributed.Client, optional
        Use this client (and its cluster) instead of creating one.
    overwrite : bool
        Replace existing per-stack results folders.
    progress : bool
        Print the dashboard address, a progress bar over stacks and one line per failed stack.

    Returns
    -------
    BatchResult

    Examples
    --------
    >>> if __name__ == "__main__":                                   # doctest: +SKIP
    ...     res = run_batch("plants/*.tif", "experiment_1", n_workers=2)
    ...     print(res.experiment[["stack", "status", "divergence_mean_deg"]])
    """
    from distributed import as_completed

    from .pipeline import resolve_settings

    s = resolve_settings(settings, settings_file, **overrides)
    paths = find_stacks(source)
    names = stack_names(paths)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    own_client = client is None
    cluster = None
    if own_client:
        client, cluster = make_client(scheduler, n_workers)
    dashboard = getattr(client, "dashboard_link", None)
    err = sys.stderr
    try:
        if progress:
            print(f"apextrack: {len(paths)} stack(s) on {len(client.scheduler_info().get('workers', {}))} dask "
                  f"worker(s); dashboard: {dashboard}", file=err)
        # one thread per task: the workers already use the cores
        settings_dict = s.replace(threads=1).to_dict()
        futures = {}
        for i, (p, name) in enumerate(zip(paths, names)):
            stamp = f"{i}-{name}-{time.time_ns()}"
            src = str(p.resolve())
            n = _n_frames(p, s) if s.frames_per_task > 0 else None
            blocks = frame_blocks(n, s.frames_per_task) if n else [(0, 0)]
            parts = None
            if len(blocks) > 1:
                # a long stack: the context its frames share found once, then blocks of frames
                # measured by tasks of their own, put together (registration, linking,
                # measurements, report) by the stack's task
                ctx = client.submit(stage_context_task, src, settings_dict, pure=False,
                                    key=f"apextrack-context-{stamp}")
                parts = [client.submit(measure_frames_task, src, settings_dict, a, b, ctx, pure=False,
                                       key=f"apextrack-frames-{a}-{b - 1}-{stamp}") for a, b in blocks]
            fut = client.submit(analyse_stack_task, src, str((out / name).resolve()), settings_dict,
                                overwrite, name, parts, pure=False, key=f"apextrack-stack-{stamp}")
            futures[fut] = i
        rows: list[dict | None] = [None] * len(paths)
        bar = None
        if progress:
            from tqdm.auto import tqdm

            bar = tqdm(total=len(paths), desc="stacks", unit="stack", file=err, dynamic_ncols=True)
        for fut in as_completed(list(futures)):
            i = futures[fut]
            try:
                row = fut.result()
            except Exception as exc:  # the worker died (memory, crash)
                row = {"stack": names[i], "source": str(paths[i]), "status": "failed", "results_dir": names[i],
                       "error": f"{paths[i]}: the worker failed ({type(exc).__name__}: {exc})"}
            rows[i] = row
            if bar is not None:
                bar.update(1)
            if row["status"] != "ok" and progress:
                msg = f"apextrack: {names[i]}: failed: {row['error']}"
                (bar.write(msg, file=err) if bar is not None else print(msg, file=err))
        if bar is not None:
            bar.close()
        df = experiment_table([r for r in rows if r is not None])
        write_table(df, out / "experiment.csv")
        rep = None
        if report:
            # the figures drawn by the workers side by side (their plotting library is loaded
            # already), the page written here; a figure a worker could not draw is drawn here
            from .report import EXPERIMENT_FIGURES, draw_experiment_figure, write_experiment_report

            stamp = time.time_ns()
            jobs = {name: client.submit(draw_experiment_figure, df, name, s.expected_angle_deg, pure=False,
                                        key=f"apextrack-experiment-{name}-{stamp}")
                    for name in EXPERIMENT_FIGURES} if (df["status"] == "ok").any() else {}
            drawn = {}
            for name, job in jobs.items():
                try:
                    drawn[name] = job.result()
                except Exception:  # noqa: BLE001 - drawn here instead
                    pass
            rep = write_experiment_report(df, out, title=f"apextrack experiment: {out.name}",
                                          expected_angle_deg=s.expected_angle_deg, drawn=drawn)
    finally:
        if own_client:
            client.close()
            if cluster is not None:
                cluster.close()
    failed = df.loc[df["status"] != "ok", "stack"].tolist()
    return BatchResult(experiment=df, out=out, dashboard=dashboard, report=rep, failed=failed)


def read_experiment(path: str | Path) -> pd.DataFrame:
    """Read ``experiment.csv`` back with the dtypes :func:`experiment_table` gives."""
    p = Path(path)
    if p.is_dir():
        p = p / "experiment.csv"
    try:
        raw = pd.read_csv(p, dtype=str, keep_default_na=False)
    except FileNotFoundError:
        from .errors import ResultsError

        raise ResultsError("file is missing", p, "run 'apextrack batch' first") from None
    rows = raw.replace({"": None}).to_dict("records")
    return experiment_table(rows)
