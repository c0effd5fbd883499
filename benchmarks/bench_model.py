"""Speed of the phyllotaxis model and of the synthetic-stack renderer.

Run:  python benchmarks/bench_model.py
Prints the figures and writes them to benchmarks/results_model.json (one core: the model is
single-threaded numpy; BLAS threads are limited to 1 for a fair figure).
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import platform  # noqa: E402
import time  # noqa: E402
from datetime import datetime, timezone  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

import apextrack  # noqa: E402
from apextrack.model import ModelParams, classify, make_synthetic_stack, simulate, sweep  # noqa: E402
from apextrack.tables import write_json  # noqa: E402


CPU = {}


def best_of(fn, repeats=3):
    """Best and median wall time of ``repeats`` calls; the best CPU time of this process is kept
    in ``CPU["last"]`` (less sensitive to other jobs sharing the machine)."""
    times, cpu = [], []
    out = None
    for _ in range(repeats):
        t, c = time.perf_counter(), time.process_time()
        out = fn()
        times.append(time.perf_counter() - t)
        cpu.append(time.process_time() - c)
    CPU["last"] = min(cpu)
    return min(times), float(np.median(times)), out


def main():
    results = {"apextrack_version": apextrack.__version__, "python": platform.python_version(),
               "machine": platform.machine(), "cpu_count": os.cpu_count(),
               "date": datetime.now(timezone.utc).isoformat(timespec="seconds"), "model": [], "render": {},
               "load_average_at_start": list(os.getloadavg()) if hasattr(os, "getloadavg") else None}
    # machine speed reference: numpy sqrt of 10^6 doubles (about 1–3 ms on a current idle core)
    x = np.random.default_rng(0).random(1_000_000)
    ref, _, _ = best_of(lambda: np.sqrt(x), repeats=20)
    results["reference_numpy_sqrt_1e6_s"] = ref
    print(f"reference: numpy sqrt of 10^6 doubles {1e3 * ref:.2f} ms")
    R = 22.0
    cases = [("fibonacci l/R=0.8 (ramp from 4)", dict(inhibition_range_um=0.8 * R, start_range_um=4 * R, ramp_primordia=60), "one"),
             ("fibonacci l/R=0.4 (ramp from 4)", dict(inhibition_range_um=0.4 * R, start_range_um=4 * R, ramp_primordia=60), "one"),
             ("distichous l/R=3.5", dict(inhibition_range_um=3.5 * R), "one"),
             ("decussate l/R=2, two opposite", dict(inhibition_range_um=2.0 * R), "two"),
             ("exp kernel l/R=0.8", dict(inhibition_range_um=0.8 * R, start_range_um=4 * R, ramp_primordia=60, kernel="exp"), "one")]
    for name, kw, init in cases:
        p = ModelParams(**kw)
        best, med, sim = best_of(lambda: simulate(1000, p, init), repeats=5)
        c = classify(sim.history)
        row = {"case": name, "n_primordia": int(len(sim.history)), "best_s": best, "median_s": med,
               "best_cpu_s": CPU["last"],
               "per_primordium_us": 1e6 * best / len(sim.history), "evaluations": sim.n_evaluations,
               "steady_angle_deg": c["angle_deg"], "pattern": c["pattern"]}
        results["model"].append(row)
        print(f"simulate 1000 primordia, {name:34s}: best {best:.3f} s (CPU {CPU['last']:.3f} s), median {med:.3f} s "
              f"({row['per_primordium_us']:.0f} µs/primordium), {c['pattern']} {c['angle_deg']:.2f}°")
    best, med, s = best_of(lambda: make_synthetic_stack(n_frames=12, shape_zyx=(8, 96, 96)))
    results["render"]["stack_12x8x96x96_s"] = {"best": best, "median": med, "best_cpu": CPU["last"],
                                               "shape": list(s.data.shape)}
    print(f"render 12-frame 8×96×96 stack: best {best:.3f} s (CPU {CPU['last']:.3f} s), median {med:.3f} s")
    best, med, s = best_of(lambda: make_synthetic_stack(n_frames=12, shape_zyx=(8, 96, 96), membrane=True, tilt_deg=10))
    results["render"]["stack_12x8x2x96x96_membrane_s"] = {"best": best, "median": med, "best_cpu": CPU["last"],
                                                          "shape": list(s.data.shape)}
    print(f"render 12-frame 8×2×96×96 stack with membrane and tilt: best {best:.3f} s (CPU {CPU['last']:.3f} s), "
          f"median {med:.3f} s")
    t = time.perf_counter()
    tab = sweep(np.geomspace(4.0, 0.3, 24), branches=("fibonacci", "lucas"), n_primordia=250)
    dt = time.perf_counter() - t
    results["sweep"] = {"points": int(len(tab)), "n_primordia": 250, "seconds": dt}
    print(f"sweep: {len(tab)} runs of 250 primordia in {dt:.2f} s")
    if hasattr(os, "getloadavg"):
        results["load_average_at_end"] = list(os.getloadavg())
        print(f"load average (start → end): {results['load_average_at_start']} → {results['load_average_at_end']}")
    out = Path(__file__).resolve().parent / "results_model.json"
    write_json(results, out)
    print(f"written {out}")


if __name__ == "__main__":
    main()
