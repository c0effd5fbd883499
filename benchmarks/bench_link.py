"""Linking and birth-order time against the number of frames (run by hand, not in CI).

    python benchmarks/bench_link.py [--frames 10 20 40 80] [--repeat 1] [--extra STACK.tif ...]

The image stage (projection, detection, registration) of the benchmark stacks of
``bench_scale.py`` (``benchmarks/data/bench_T###.tif``, generated there) is run once and its
detections and centres cached next to the stack (``*_detections.pkl``, git-ignored with the
data). Then, for each T, this times what ``apextrack.pipeline.analyse`` times as ``link``
(:func:`apextrack.link.link_tracks` and the choice of the apex centre) and as
``birth_and_phyllotaxis`` (:func:`apextrack.pipeline.measure_tracks`), best of ``--repeat``
runs, and fits wall time against T (slope, R²). Figures are printed and written to
``benchmarks/results_link.json``; ``RESULTS.md`` is written by hand from them.
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
import platform
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"


def cached_image_stage(path: Path):
    """Detections and centres of ``path`` (the image stage runs once, then from cache)."""
    from apextrack.pipeline import image_stage
    from apextrack.settings import Settings
    from apextrack.stack import read_stack

    cache = path.with_name(path.stem + "_detections.pkl")
    if cache.exists() and cache.stat().st_mtime > path.stat().st_mtime:
        with open(cache, "rb") as fh:
            return pickle.load(fh)
    s = Settings()
    st = read_stack(path)
    t0 = time.perf_counter()
    det, cen = image_stage(st, s, progress=False)
    print(f"image stage of {path.name}: {time.perf_counter() - t0:.1f} s", flush=True)
    with open(cache, "wb") as fh:
        pickle.dump((det, cen), fh)
    return det, cen


def link_and_birth(det, cen) -> dict:
    """The ``link`` and ``birth_and_phyllotaxis`` steps of ``analyse`` (default settings)."""
    from apextrack.apex import choose_centres
    from apextrack.link import link_tracks
    from apextrack.pipeline import measure_tracks
    from apextrack.settings import Settings

    s = Settings()
    t0 = time.perf_counter()
    tracks, info = link_tracks(det, s.link_search_um, s.link_memory, jump_um=s.link_jump_um,
                               min_track_frames=s.min_track_frames, growth_aware=s.link_growth_aware,
                               centre_hint=cen[["frame", "x_um", "y_um"]], fixed_centre=False)
    t_link_tracks = time.perf_counter() - t0
    motion = info.pop("model", None)
    centres, _ = choose_centres(tracks, cen, s.centre_method, s.centre_um)
    if motion is not None and (motion.n_new >= 3 or motion.anchor == "pattern"):
        mc = motion.centres_table(centres["frame"], centres["time_h"])
        centres = centres.assign(x_um=mc["x_um"].to_numpy(), y_um=mc["y_um"].to_numpy(),
                                 centre_sd_um=mc["centre_sd_um"].to_numpy())
    t_link = time.perf_counter() - t0
    t1 = time.perf_counter()
    m = measure_tracks(tracks, centres, s)
    t_birth = time.perf_counter() - t1
    mo = info.get("motion", {})
    return {"link_tracks_s": t_link_tracks, "link_s": t_link, "birth_and_phyllotaxis_s": t_birth,
            "n_detections": len(det), "n_tracks": int(info.get("n_tracks", 0)),
            "n_primordia": len(m.primordia), "gamma_per_h": mo.get("growth_rate_per_h"),
            "rotation_deg_per_h": mo.get("rotation_deg_per_h"), "rim_radius_um": mo.get("rim_radius_um"),
            "anchor": mo.get("anchor"), "mean_divergence_deg": _mean_div(m)}


def _mean_div(m):
    try:
        return float(m.phyllotaxis.summary.get("divergence_mean_deg"))
    except Exception:  # noqa: BLE001 - a figure for the record only
        return None


def _r2(x, y):
    x, y = np.asarray(x, float), np.asarray(y, float)
    if len(x) < 3:
        return float("nan"), float("nan")
    k, c = np.polyfit(x, y, 1)
    return float(k), float(1 - np.sum((y - (k * x + c)) ** 2) / np.sum((y - y.mean()) ** 2))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, nargs="+", default=[10, 20, 40, 80])
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--extra", nargs="*", default=[], help="other stacks to time (image stage cached)")
    ap.add_argument("--label", default="")
    ap.add_argument("--out", default=str(HERE / "results_link.json"), help="JSON file for the figures")
    args = ap.parse_args()
    machine = {"cpus": os.cpu_count(), "platform": platform.platform(), "python": platform.python_version(),
               "load_avg_at_start": os.getloadavg()}
    print(json.dumps(machine), flush=True)
    rows = []
    paths = [(n, DATA / f"bench_T{n:03d}.tif") for n in args.frames] + [(None, Path(p)) for p in args.extra]
    for n, p in paths:
        det, cen = cached_image_stage(p)
        best = None
        for _ in range(args.repeat):
            r = link_and_birth(det, cen)
            if best is None or r["link_s"] < best["link_s"]:
                best = r
        best.update({"stack": p.name, "T": int(det["frame"].nunique()) if n is None else n})
        rows.append(best)
        print(f"{p.name:28s} T={best['T']:3d} det={best['n_detections']:5d}  link_tracks {best['link_tracks_s']:7.2f} s"
              f"  link (+centre choice) {best['link_s']:7.2f} s  birth+phyllotaxis {best['birth_and_phyllotaxis_s']:6.2f} s"
              f"  tracks {best['n_tracks']}  primordia {best['n_primordia']}  γ {best['gamma_per_h']}"
              f"  div {best['mean_divergence_deg']}", flush=True)
    bench = [r for r in rows if r["stack"].startswith("bench_T")]
    k, r2 = _r2([r["T"] for r in bench], [r["link_s"] for r in bench])
    print(f"link time against T: {k * 1000:.1f} ms per frame, R² = {r2:.4f}")
    out = {"machine": machine, "load_avg_at_end": os.getloadavg(), "label": args.label, "rows": rows,
           "link_s_per_frame": k, "link_linear_r2": r2, "date": time.strftime("%Y-%m-%d %H:%M")}
    Path(args.out).write_text(json.dumps(out, indent=2, default=float) + "\n", encoding="utf-8")


if __name__ == "__main__":
    sys.exit(main())
