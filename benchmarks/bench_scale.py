"""Speed, memory and scaling benchmarks (run by hand, not in CI).

    python benchmarks/bench_scale.py [--frames 10 20 40 80] [--batch 8] [--skip-batch]
    python benchmarks/bench_scale.py --frames 10 20 40 80 240   # and a long stack (5 GB)

Generates (once, into ``benchmarks/data/``, git-ignored) synthetic stacks of T timepoints of
40×512×512 uint16 with their ground truth, then measures, side by side in one run:

1. whole ``analyse`` wall time ÷ the time to read the stack and max-project every frame (target ≤ 3),
   the read being the leanest there is: ``tifffile.memmap`` and numpy's max in the file's own type;
2. apextrack's detection ÷ the naive ``skimage.feature.blob_log`` over the same scales (target: ≥ 20×
   faster), with the accuracy of both against the ground truth;
3. peak RSS against T (target: flat within 10 %) and wall time against T (target: linear, R² > 0.99),
   fitted through the fastest and through the median of the five runs per T;
4. a batch of N stacks with 1 and with 2 dask workers (target: ≥ 1.7× speed-up), in five interleaved
   rounds (the median speed-up counts), beside what two processes at once get from this machine
   at all (the same plain work alone and two at a time).

The reads and the analyses are repeated in rounds that take every T in turn, so that the machine's
drift from minute to minute does not bias the fit against T; the ratios take the fastest run of
each. Each ``analyse`` runs in a fresh process so that its peak RSS (VmHWM) is its own; when it
measures frames in worker processes, the largest worker's peak is recorded too. Results are printed
and written to ``benchmarks/results_scale.json``; ``RESULTS.md`` is written by hand from them.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"
SHAPE_ZYX = (40, 512, 512)
PIXEL_UM, Z_UM, INTERVAL_H = 0.5, 1.5, 3.0


def stack_path(n_frames: int) -> Path:
    return DATA / f"bench_T{n_frames:03d}.tif"


def generate(n_frames: int) -> Path:
    """The benchmark stack of ``n_frames`` timepoints (generated once)."""
    from apextrack.model import make_synthetic_stack, write_synthetic

    p = stack_path(n_frames)
    if p.exists():
        return p
    DATA.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    synth = make_synthetic_stack(n_frames=n_frames, shape_zyx=SHAPE_ZYX, pixel_size_um=PIXEL_UM, z_step_um=Z_UM,
                                 interval_h=INTERVAL_H, apex_radius_um=22.0, seed=2026)
    write_synthetic(synth, p)
    print(f"generated {p.name} in {time.perf_counter() - t0:.0f} s", flush=True)
    return p


def _vm(key: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(key + ":"):
                return int(line.split()[1]) * 1024
    return -1


def child_analyse(path: str, out: str) -> None:
    """Run in a fresh process: one analysis; print wall time and peak RSS as JSON."""
    from apextrack.pipeline import analyse

    import resource

    t0 = time.perf_counter()
    res = analyse(path, out=out, overwrite=True, progress=False)
    wall = time.perf_counter() - t0
    # frames measured in worker processes: their memory counts too (the largest worker's peak;
    # the workers are forked, so part of it is pages shared with this process)
    workers = res.run.get("frames_measured_in", "")
    n_proc = int(workers.split()[0]) if workers.endswith("processes") else 0
    child_peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024 if n_proc else 0
    print(json.dumps({"wall_s": wall, "peak_rss_bytes": _vm("VmHWM"), "worker_peak_rss_bytes": child_peak,
                      "n_worker_processes": n_proc, "timings_s": res.run["timings_s"],
                      "n_primordia": res.summary["n_primordia"], "n_detections": res.summary["n_detections"]}))


def child_read_project(path: str, how: str) -> None:
    """Run in a fresh process: read every frame and max-project it (the floor of any analysis).

    ``how``: ``tifffile`` (``tifffile.memmap`` and numpy's max, in the file's own integer type:
    the leanest read, the floor the ratio is taken against), ``native`` (apextrack's reader, in
    the file's own type, each frame copied out of the mapped file) or ``float32`` (apextrack's
    reader converting each frame to float32, the floor of the earlier runs in RESULTS.md).
    Imports come before the clock starts, as for ``analyse``."""
    import tifffile

    from apextrack.stack import read_stack

    t0 = time.perf_counter()
    acc = 0.0
    if how == "tifffile":
        data = tifffile.memmap(path)  # T, Z, Y, X
        for t in range(data.shape[0]):
            acc += float(np.asarray(data[t]).max(axis=0)[0, 0])
    else:
        st = read_stack(path)
        for t in range(st.n_frames):
            acc += float(st.frame(t, native=how == "native").max(axis=0)[0, 0])
    print(json.dumps({"wall_s": time.perf_counter() - t0, "peak_rss_bytes": _vm("VmHWM"), "check": acc}))


def _run_child(*args) -> dict:
    r = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True)
    if r.returncode != 0:
        raise RuntimeError(r.stderr[-3000:])
    return json.loads(r.stdout.strip().splitlines()[-1])


def _match(det_xy: np.ndarray, truth_xy: np.ndarray, max_um: float) -> tuple[int, int, int, np.ndarray]:
    """True positives, false positives, false negatives by optimal one-to-one matching
    (scipy's Hungarian assignment) within ``max_um``, the indices of the detections left
    unmatched and the distances of the matched pairs."""
    from scipy.optimize import linear_sum_assignment
    from scipy.spatial.distance import cdist

    if len(det_xy) == 0 or len(truth_xy) == 0:
        return 0, len(det_xy), len(truth_xy), np.arange(len(det_xy)), np.zeros(0)
    d = cdist(det_xy, truth_xy)
    cost = np.where(d <= max_um, d, 1e6)
    r, c = linear_sum_assignment(cost)
    hit = d[r, c] <= max_um
    tp = int(np.sum(hit))
    return tp, len(det_xy) - tp, len(truth_xy) - tp, np.setdiff1d(np.arange(len(det_xy)), r[hit]), d[r, c][hit]


def detection_benchmark(path: Path) -> dict:
    """apextrack's detector against the naive skimage blob_log on the same top views and scales."""
    import pandas as pd
    from skimage.feature import blob_log

    from apextrack.detect import detect_blobs, scales_px
    from apextrack.settings import Settings
    from apextrack.stack import read_stack

    s = Settings()
    st = read_stack(path)
    sig = scales_px(s.primordium_diameter_min_um, s.primordium_diameter_max_um, PIXEL_UM, s.n_scales)
    everything = pd.read_csv(str(path).replace(".tif", "_truth.csv"))
    seen = everything["visible"].astype(str).str.lower() == "true"
    # the generator counts a primordium visible when its centre lies inside the imaged volume;
    # one whose centre has just left it (below the first slice, at most a radius away) still
    # shows in the top view. A detection there is neither a hit nor a false positive: it is
    # left out of the count, for both detectors (the usual treatment of objects of ambiguous
    # visibility in detection benchmarks, e.g. the distractors of MOT16, Milan et al. 2016 —
    # recalled from memory). The strict count is given too.
    truth, ambiguous = everything[seen], everything[~seen]
    views = [st.frame(t).max(axis=0) for t in range(st.n_frames)]
    max_um = 4.0  # a match lies within half the smallest primordium diameter at birth (8 µm)

    def score(found, strict: bool = False):
        tp = fp = fn = ignored = 0
        dist = []
        for t, xy in enumerate(found):
            tt = truth[truth["frame"] == t][["x_um", "y_um"]].to_numpy(float)
            amb = ambiguous[ambiguous["frame"] == t][["x_um", "y_um"]].to_numpy(float)
            a, b, c, unmatched, d = _match(xy, tt, max_um)
            dist.append(d)
            if not strict and len(unmatched) and len(amb):
                from scipy.spatial.distance import cdist

                near = cdist(xy[unmatched], amb).min(axis=1) <= max_um
                b, ignored = b - int(near.sum()), ignored + int(near.sum())
            tp, fp, fn = tp + a, fp + b, fn + c
        prec = tp / max(tp + fp, 1)
        rec = tp / max(tp + fn, 1)
        d = np.concatenate(dist)
        return {"tp": tp, "fp": fp, "fn": fn, "ignored": ignored, "precision": prec, "recall": rec,
                "f1": 2 * prec * rec / max(prec + rec, 1e-12),
                "rmse_um": float(np.sqrt(np.mean(d ** 2))) if d.size else math.nan}

    def run_ours():
        return [detect_blobs(v, sig, min_snr=s.min_snr)[["x_px", "y_px"]].to_numpy(float) * PIXEL_UM for v in views]

    # naive blob_log: same σ range and count, log spacing, image scaled to [0, 1]; its threshold
    # is tuned on these very frames (best F1 over a grid) to give it its best accuracy
    normed = [(v - v.min()) / max(float(v.max() - v.min()), 1e-9) for v in views]

    def run_blob_log(thr):
        return [blob_log(v, min_sigma=sig[0], max_sigma=sig[-1], num_sigma=len(sig), threshold=thr,
                         log_scale=True)[:, [1, 0]] * PIXEL_UM for v in normed]

    best = best_strict = None
    for thr in (0.01, 0.02, 0.05, 0.1, 0.2):
        found = run_blob_log(thr)
        sc, strict = score(found), score(found, strict=True)
        if best is None or sc["f1"] > best["score"]["f1"]:
            best = {"threshold": thr, "score": sc}
        if best_strict is None or strict["f1"] > best_strict["f1"]:  # its own best threshold for this count
            best_strict = {**strict, "threshold": thr}
    ours = run_ours()  # also the warm-up (FFT plans, transfer functions)
    # timed in five rounds, each the fastest of three runs of ours then one of blob_log (ten
    # times longer): this machine's speed drifts by tens of per cent from minute to minute, and
    # a ratio taken within a round sees both detectors at the same speed; the median counts
    rounds = []
    for _ in range(5):
        t_ours = math.inf
        for _ in range(3):
            t0 = time.perf_counter()
            run_ours()
            t_ours = min(t_ours, time.perf_counter() - t0)
        t0 = time.perf_counter()
        run_blob_log(best["threshold"])
        rounds.append((t_ours, time.perf_counter() - t0))
    ratios = [b / a for a, b in rounds]
    i_med = int(np.argsort(ratios)[len(ratios) // 2])
    t_ours, best["time_s"] = rounds[i_med]
    return {"frames": len(views), "sigmas_px": [float(x) for x in sig], "apextrack_s": t_ours,
            "apextrack": score(ours), "apextrack_strict": score(ours, strict=True), "blob_log_s": best["time_s"],
            "blob_log_threshold": best["threshold"], "blob_log": best["score"], "blob_log_strict": best_strict,
            "speedup": float(np.median(ratios)), "speedup_per_round": ratios}


def _spin(kind: str) -> float:
    """A fixed piece of work, timed: ``python`` (an interpreter loop) or ``numpy`` (max
    projections and additions over a 40×512×512 float32 volume, memory-bound)."""
    if kind == "python":
        t0 = time.perf_counter()
        acc = 0
        for i in range(6_000_000):
            acc += i * i
        return time.perf_counter() - t0
    vol = np.random.default_rng(0).random((40, 512, 512)).astype(np.float32)
    t0 = time.perf_counter()
    for _ in range(30):
        vol.max(axis=0)
        np.add(vol, 1, out=vol)
    return time.perf_counter() - t0


def machine_ceiling(rounds: int = 3) -> dict:
    """What two processes at once get from this machine's two cores: the same work timed alone
    and in two forked processes at the same time; ``2 × alone ÷ together`` is the speed-up any
    two-worker batch can reach at most (2.0 on two independent cores; less where the cores
    share their execution units or memory bandwidth)."""
    import multiprocessing as mp

    out = {}
    pool = mp.get_context("fork").Pool(2)
    try:
        for kind in ("python", "numpy"):
            alone = min(_spin(kind) for _ in range(rounds))
            together = min(max(pool.map(_spin, [kind, kind])) for _ in range(rounds))
            out[kind] = {"alone_s": alone, "two_at_once_s": together, "speedup": 2 * alone / together}
    finally:
        pool.close()
        pool.join()
    return out


def _read_through(path: Path) -> None:
    """Read a file once, so that its pages are in the page cache."""
    with open(path, "rb", buffering=0) as fh:
        buf = bytearray(1 << 22)
        while fh.readinto(buf):
            pass


def batch_benchmark(n_stacks: int, workers_list=(1, 2), rounds: int = 5) -> dict:
    """``run_batch`` on ``n_stacks`` stacks with each worker count of ``workers_list``, in
    ``rounds`` interleaved rounds (1, 2, 1, 2, ...: this machine's speed drifts by tens of per
    cent from minute to minute, and a slow spell then falls on both). Per worker count: every
    run and the median; the speed-up is given per round and as the median of the rounds."""
    from apextrack.batch import make_client, run_batch

    src = stack_path(10)
    folder = DATA / f"batch{n_stacks}"
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n_stacks):  # the T = 10 stack under N names (hard links: no extra disk)
        p = folder / f"plant_{i + 1:02d}.tif"
        if not p.exists():
            os.link(src, p)
    # the client's own first imports (the analysis module, read for each stack's header) are
    # start-up too: made before the first round, which would otherwise pay for them alone
    import apextrack.pipeline  # noqa: F401

    runs: dict[int, list[dict]] = {w: [] for w in workers_list}
    for r in range(rounds):
        for w in workers_list:
            # every run reads the stacks from the page cache (this machine evicts pages left
            # unused for a while, and a run would otherwise read from disk)
            _read_through(src)
            tmp = Path(tempfile.mkdtemp(prefix=f"bench_batch_{w}_"))
            t0 = time.perf_counter()
            # the workers' first imports are start-up, like the cluster's: make_client starts them warm
            client, cluster = make_client(n_workers=w)
            client.wait_for_workers(w)
            t_start = time.perf_counter() - t0
            try:
                t0 = time.perf_counter()
                res = run_batch(folder, tmp / "out", client=client, progress=False)
                wall = time.perf_counter() - t0
            finally:
                client.close()
                cluster.close()
            runs[w].append({"wall_s": wall, "cluster_start_s": t_start, "wall_with_start_s": wall + t_start,
                            "failed": res.n_failed})
            shutil.rmtree(tmp, ignore_errors=True)
            print(f"round {r + 1}: batch of {n_stacks} with {w} worker(s): {wall:.1f} s "
                  f"(+ {t_start:.1f} s to start the cluster)", flush=True)
    out: dict = {}
    for w, rs in runs.items():
        out[w] = {k: float(np.median([x[k] for x in rs])) for k in ("wall_s", "cluster_start_s", "wall_with_start_s")}
        out[w]["failed"] = max(x["failed"] for x in rs)
        out[w]["runs"] = rs
    a, b = workers_list[0], workers_list[-1]
    out["speedup_per_round"] = [x["wall_s"] / y["wall_s"] for x, y in zip(runs[a], runs[b])]
    out["speedup_with_start_per_round"] = [x["wall_with_start_s"] / y["wall_with_start_s"]
                                           for x, y in zip(runs[a], runs[b])]
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, nargs="+", default=[10, 20, 40, 80])
    ap.add_argument("--batch", type=int, default=8)
    ap.add_argument("--skip-batch", action="store_true")
    args = ap.parse_args()
    for n in sorted(set(args.frames) | {10}):
        generate(n)
    machine = {"cpus": os.cpu_count(), "platform": platform.platform(), "python": platform.python_version(),
               "processor": platform.processor() or platform.machine(),
               "mem_gb": round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 1e9, 1),
               "load_avg_at_start": os.getloadavg()}
    print(json.dumps(machine), flush=True)
    rows = []
    # every measurement is repeated in rounds that go through all T in turn, so that the
    # machine's drift from minute to minute is spread over all T instead of biasing the fit of
    # wall time against T. Each stack is read through once before it is timed: this machine
    # evicts pages left unused for a while, and the other stacks were read in between. The
    # floor is the fastest of two lean reads (tifffile's memory map, the file's own integer
    # type); apextrack's own reader is timed too, in its own type and converting to float32
    # (the floor of the earlier runs), for comparison
    reads_of = {n: {how: [] for how in ("tifffile", "native", "float32")} for n in args.frames}
    for _ in range(2):
        for n in args.frames:
            _read_through(stack_path(n))
            for how in reads_of[n]:
                reads_of[n][how].append(_run_child("--child-read", str(stack_path(n)), how))
    # the machine's noise is large: the fastest of five analyses per T (each in a fresh process)
    runs_of = {n: [] for n in args.frames}
    with tempfile.TemporaryDirectory(prefix="bench_") as tmp:
        for k in range(5):
            for n in args.frames:
                _read_through(stack_path(n))
                runs_of[n].append(_run_child("--child-analyse", str(stack_path(n)), str(Path(tmp) / "res")))
            print(f"analyses, round {k + 1} of 5: " + ", ".join(f"T={n} {runs_of[n][-1]['wall_s']:.2f} s"
                                                              for n in args.frames), flush=True)
    for n in args.frames:
        p = stack_path(n)
        reads = {how: min(r, key=lambda x: x["wall_s"]) for how, r in reads_of[n].items()}
        rp = reads["tifffile"]
        an = min(runs_of[n], key=lambda r: r["wall_s"])
        row = {"T": n, "stack_gb": p.stat().st_size / 1e9, "read_project_s": rp["wall_s"], "analyse_s": an["wall_s"],
               "ratio": an["wall_s"] / rp["wall_s"],
               "read_project_native_s": reads["native"]["wall_s"], "read_project_float32_s": reads["float32"]["wall_s"],
               "ratio_to_float32_read": an["wall_s"] / reads["float32"]["wall_s"], "peak_rss_mb": an["peak_rss_bytes"] / 1e6,
               "worker_peak_rss_mb": an["worker_peak_rss_bytes"] / 1e6, "n_worker_processes": an["n_worker_processes"],
               # an upper bound of the memory in use: the analysis plus every worker at its peak
               "total_peak_rss_mb": (an["peak_rss_bytes"] + an["n_worker_processes"] * an["worker_peak_rss_bytes"]) / 1e6,
               "read_peak_rss_mb": rp["peak_rss_bytes"] / 1e6, "timings_s": an["timings_s"],
               "n_primordia": an["n_primordia"], "n_detections": an["n_detections"],
               "analyse_runs_s": [r["wall_s"] for r in runs_of[n]]}
        rows.append(row)
        print(f"T={n:3d}  read+project {row['read_project_s']:6.2f} s (apextrack's reader {row['read_project_native_s']:.2f} s, "
              f"as float32 {row['read_project_float32_s']:.2f} s)  analyse {row['analyse_s']:6.2f} s  "
              f"ratio {row['ratio']:5.2f} (to the float32 read {row['ratio_to_float32_read']:.2f})  peak RSS {row['peak_rss_mb']:5.0f} MB + {row['n_worker_processes']} workers × "
              f"{row['worker_peak_rss_mb']:4.0f} MB  stages {an['timings_s']}", flush=True)
    Ts = np.array([r["T"] for r in rows], float)
    walls = np.array([r["analyse_s"] for r in rows])
    rss = np.array([r["peak_rss_mb"] for r in rows])
    rss_total = np.array([r["total_peak_rss_mb"] for r in rows])

    def linear_fit(x, y):
        slope, icpt = np.polyfit(x, y, 1)
        pred = slope * x + icpt
        r2 = 1 - np.sum((y - pred) ** 2) / np.sum((y - y.mean()) ** 2) if len(x) > 2 else float("nan")
        return float(slope), float(icpt), float(r2)

    # the target is stated for T = 10-80; longer stacks (e.g. --frames ... 240) are fitted apart
    core = Ts <= 80
    slope, icpt, r2 = linear_fit(Ts[core], walls[core])
    slope_all, icpt_all, r2_all = linear_fit(Ts, walls) if (~core).any() else (slope, icpt, r2)
    # the same fits through the median of the five runs per T: the fastest run of a T is an
    # extreme of the machine's drift, the median its typical time
    med = np.array([float(np.median(r["analyse_runs_s"])) for r in rows])
    slope_m, icpt_m, r2_m = linear_fit(Ts[core], med[core])
    r2_m_all = linear_fit(Ts, med)[2] if (~core).any() else r2_m
    det = detection_benchmark(stack_path(10))
    print(f"detection on {det['frames']} top views: apextrack {det['apextrack_s']:.2f} s (F1 {det['apextrack']['f1']:.3f}; "
          f"{det['apextrack_strict']['f1']:.3f} counting detections of primordia just out of the volume as false), "
          f"blob_log {det['blob_log_s']:.2f} s (F1 {det['blob_log']['f1']:.3f}; {det['blob_log_strict']['f1']:.3f}; "
          f"threshold {det['blob_log_threshold']}), localisation RMSE {det['apextrack']['rmse_um']:.3f} vs "
          f"{det['blob_log']['rmse_um']:.3f} µm, speed-up {det['speedup']:.1f}×", flush=True)
    ceiling = machine_ceiling()
    print("two processes at once on this machine: " + ", ".join(
        f"{k} {v['speedup']:.2f}×" for k, v in ceiling.items()) + " the speed of one", flush=True)
    batch = {} if args.skip_batch else batch_benchmark(args.batch)
    summary = {
        "1_analyse_over_read_project": {str(r["T"]): r["ratio"] for r in rows},
        "1_analyse_over_float32_read_project": {str(r["T"]): r["ratio_to_float32_read"] for r in rows},
        "2_detection_speedup_vs_blob_log": det["speedup"],
        "2_f1_apextrack_vs_blob_log": [det["apextrack"]["f1"], det["blob_log"]["f1"]],
        "2_f1_strict_apextrack_vs_blob_log": [det["apextrack_strict"]["f1"], det["blob_log_strict"]["f1"]],
        "2_rmse_um_apextrack_vs_blob_log": [det["apextrack"]["rmse_um"], det["blob_log"]["rmse_um"]],
        "3_peak_rss_max_over_min": float(rss[core].max() / rss[core].min()),
        "3_peak_rss_with_workers_max_over_min": float(rss_total[core].max() / rss_total[core].min()),
        "3_peak_rss_max_over_min_all_T": float(rss.max() / rss.min()),
        "3_wall_linear_r2": r2, "3_wall_s_per_frame": slope, "3_wall_intercept_s": icpt,
        "3_wall_linear_r2_all_T": r2_all, "3_wall_s_per_frame_all_T": slope_all, "3_wall_intercept_s_all_T": icpt_all,
        "3_wall_linear_r2_median_of_runs": r2_m, "3_wall_s_per_frame_median_of_runs": slope_m,
        "3_wall_intercept_s_median_of_runs": icpt_m, "3_wall_linear_r2_median_of_runs_all_T": r2_m_all,
        # the median of the rounds' speed-ups (each round runs 1 then 2 workers)
        "4_batch_speedup_2_over_1_worker": float(np.median(batch["speedup_per_round"])) if batch else None,
        "4_batch_speedup_per_round": batch.get("speedup_per_round"),
        "4_machine_two_process_ceiling": {k: v["speedup"] for k, v in ceiling.items()},
        "4_batch_speedup_with_cluster_start": float(np.median(batch["speedup_with_start_per_round"]))
        if batch else None,
    }
    print("\n=== side by side ===")
    for k, v in summary.items():
        print(f"{k:40s} {v}")
    result = {"machine": machine, "load_avg_at_end": os.getloadavg(), "scaling": rows, "detection": det,
              "batch": batch, "machine_ceiling": ceiling, "summary": summary, "date": time.strftime("%Y-%m-%d %H:%M")}
    (HERE / "results_scale.json").write_text(json.dumps(result, indent=2, default=float) + "\n", encoding="utf-8")


if __name__ == "__main__":  # dask worker processes are spawned: guard the entry point
    if len(sys.argv) > 1 and sys.argv[1] == "--child-analyse":
        child_analyse(sys.argv[2], sys.argv[3])
    elif len(sys.argv) > 1 and sys.argv[1] == "--child-read":
        child_read_project(sys.argv[2], sys.argv[3])
    else:
        main()
