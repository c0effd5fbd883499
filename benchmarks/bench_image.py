"""Benchmark of the image stage: detection against a naive scikit-image ``blob_log`` call, and
the whole image stage against reading + max-projecting the stack.

Run::

    python benchmarks/bench_image.py                      # prints, writes RESULTS.md "Image stage"
    python benchmarks/bench_image.py --json before.json --no-write   # e.g. with an older checkout
    python benchmarks/bench_image.py --before before.json # adds a "before" column from that file

Every figure is the best of ``--repeats`` runs measured in this process, side by side; ratios
are taken within one run. The naive ``blob_log`` call runs once per repeat as well. Accuracy
of both detectors is scored against the generator's ground truth (optimal one-to-one matching,
scipy ``linear_sum_assignment``, within 4 µm).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import re
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from apextrack.detect import apex_region, detect_blobs, scales_px
from apextrack.model import make_synthetic_stack, write_synthetic
from apextrack.pipeline import image_stage
from apextrack.projection import max_projection, surface_height
from apextrack.settings import Settings
from apextrack.stack import read_stack
from apextrack.tables import atomic_write_text

N_FRAMES = 12
SHAPE = (48, 512, 512)
MATCH_UM = 4.0


def best_of(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def score(found_xy: list[np.ndarray], truth_xy: list[np.ndarray], tol_px: float) -> dict:
    """Precision, recall, F1 and localisation RMSE (px) over frames (Hungarian matching)."""
    from scipy.optimize import linear_sum_assignment
    from scipy.spatial.distance import cdist

    tp = fp = fn = 0
    err = []
    for f, t in zip(found_xy, truth_xy):
        if len(f) == 0 or len(t) == 0:
            fp, fn = fp + len(f), fn + len(t)
            continue
        d = cdist(f, t)
        r, c = linear_sum_assignment(np.where(d <= tol_px, d, 1e6))
        ok = d[r, c] <= tol_px
        tp += int(ok.sum())
        fp += len(f) - int(ok.sum())
        fn += len(t) - int(ok.sum())
        err.extend(d[r, c][ok])
    p = tp / max(tp + fp, 1)
    rc = tp / max(tp + fn, 1)
    return {"precision": p, "recall": rc, "f1": 2 * p * rc / max(p + rc, 1e-12),
            "rmse_px": float(np.sqrt(np.mean(np.square(err)))) if err else math.nan, "n_found": tp + fp}


def measure(repeats: int) -> dict:
    warnings.simplefilter("ignore")
    synth = make_synthetic_stack(n_frames=N_FRAMES, shape_zyx=SHAPE, z_step_um=1.0, pixel_size_um=0.8,
                                 dome_curvature_um=300.0, apex_radius_um=30.0, seed=7,
                                 drift_um_per_frame=(0.5, -0.3, 0.0), rotation_deg_per_frame=1.0)
    s = Settings()
    px = synth.pixel_size_um
    sig = scales_px(s.primordium_diameter_min_um, s.primordium_diameter_max_um, px, s.n_scales)
    close = 2.0 * math.sqrt(2.0) * float(np.max(sig))
    views = [max_projection(synth.data[t]) for t in range(N_FRAMES)]
    truth = [synth.truth[(synth.truth.frame == t) & synth.truth.visible][["x_px", "y_px"]].to_numpy(float)
             for t in range(N_FRAMES)]
    tol = MATCH_UM / px
    res: dict = {"platform": platform.platform(), "python": platform.python_version(), "cpus": os.cpu_count(),
                 "load_before": os.getloadavg(), "repeats": repeats, "frames": N_FRAMES, "shape": SHAPE,
                 "pixel_um": px, "sigmas_px": [float(v) for v in sig],
                 "diameter_um": [s.primordium_diameter_min_um, s.primordium_diameter_max_um],
                 "dome_every_frames": s.dome_every_frames}

    # --- detection: ours vs the naive blob_log with the same scale range ----------------------
    from skimage.feature import blob_log

    def ours_full():
        return [detect_blobs(v, sig, min_snr=s.min_snr) for v in views]

    def ours_region():
        return [detect_blobs(v, sig, min_snr=s.min_snr, region=apex_region(v, close_px=close),
                             region_factor=s.apex_region_factor) for v in views]

    def naive():
        return [blob_log(v, min_sigma=sig[0], max_sigma=sig[-1], num_sigma=len(sig), threshold=None,
                         threshold_rel=0.05) for v in views]

    ours_full()  # warm-up (imports, FFT plans)
    t_full, d_full = best_of(ours_full, repeats)
    t_reg, d_reg = best_of(ours_region, repeats)
    t_naive, d_naive = best_of(naive, repeats)
    res["detect_ms"] = {"ours_full_frame": 1000 * t_full / N_FRAMES, "ours_apex_region": 1000 * t_reg / N_FRAMES,
                        "blob_log": 1000 * t_naive / N_FRAMES}
    res["detect_speedup"] = {"full_frame": t_naive / t_full, "apex_region": t_naive / t_reg}
    res["detect_accuracy"] = {
        "ours_full_frame": score([d[["x_px", "y_px"]].to_numpy(float) for d in d_full], truth, tol),
        "ours_apex_region": score([d[["x_px", "y_px"]].to_numpy(float) for d in d_reg], truth, tol),
        "blob_log": score([b[:, [1, 0]].astype(float) for b in d_naive], truth, tol),
        "truth_per_frame": float(np.mean([len(t) for t in truth]))}

    # --- whole image stage vs read + max projection -------------------------------------------
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.tif"
        write_synthetic(synth, path)
        res["tiff_mb"] = path.stat().st_size / 1e6

        def read_project_float():  # the package's reader (float32 frames) + maximum
            st = read_stack(path)
            try:
                for t in range(st.n_frames):
                    st.frame(t).max(axis=0)
            finally:
                st.close()

        def read_project_native():  # the floor: raw frames in their dtype + maximum
            st = read_stack(path)
            try:
                for t in range(st.n_frames):
                    st.timepoint(t).max(axis=0)
            finally:
                st.close()

        def run_stage(settings):
            st = read_stack(path)
            try:
                return image_stage(st, settings, progress=False)
            finally:
                st.close()

        read_project_native()  # warm the page cache
        t_float, _ = best_of(read_project_float, repeats)
        t_native, _ = best_of(read_project_native, repeats)
        run_stage(s)
        t_stage, (dets, _) = best_of(lambda: run_stage(s), repeats)
        t_stage1, _ = best_of(lambda: run_stage(s.replace(threads=1)), repeats)
        t_surf, _ = best_of(lambda: run_stage(s.replace(projection="surface")), repeats)
        t_k3, _ = best_of(lambda: run_stage(s.replace(dome_every_frames=3)), repeats)
        res["per_frame_ms"] = {"read_project_float32": 1000 * t_float / N_FRAMES,
                               "read_project_native": 1000 * t_native / N_FRAMES,
                               "image_stage_max": 1000 * t_stage / N_FRAMES,
                               "image_stage_max_1_thread": 1000 * t_stage1 / N_FRAMES,
                               "image_stage_surface": 1000 * t_surf / N_FRAMES,
                               "image_stage_dome_every_3": 1000 * t_k3 / N_FRAMES}
        res["stage_ratio"] = {"max_vs_float32_read": t_stage / t_float, "max_vs_native_read": t_stage / t_native,
                              "max_1_thread_vs_float32_read": t_stage1 / t_float,
                              "max_1_thread_vs_native_read": t_stage1 / t_native,
                              "dome_every_3_vs_float32_read": t_k3 / t_float,
                              "surface_vs_float32_read": t_surf / t_float, "surface_vs_native_read": t_surf / t_native}
        res["stage_detections"] = int(len(dets))
        res["components_ms"] = components(path, s, sig, close, repeats)
    res["load_after"] = os.getloadavg()
    return res


def components(path: Path, s: Settings, sig, close: float, repeats: int) -> dict:
    """Per-frame cost of the image stage's parts, each timed alone on the same frames."""
    from apextrack.apex import fit_dome
    from apextrack.register import Registrar

    st = read_stack(path)
    try:
        px, dz = st.pixel_size_um[0], st.pixel_size_um[2]
        vols = [st.timepoint(t) for t in range(st.n_frames)]
        out = {}
        out["read_native"] = best_of(lambda: [st.timepoint(t) for t in range(st.n_frames)], repeats)[0]
        out["float32_conversion"] = best_of(lambda: [v.astype(np.float32) for v in vols], repeats)[0]
        out["max_projection"], views = best_of(lambda: [max_projection(v) for v in vols], repeats)
        out["height_map"], hms = best_of(lambda: [surface_height(v, dz, px, up=1) for v in vols], repeats)
        out["apex_region"], regions = best_of(lambda: [apex_region(v, close_px=close) for v in views], repeats)
        out["detection"], blobs = best_of(lambda: [detect_blobs(v, sig, min_snr=s.min_snr, region=r,
                                                                region_factor=s.apex_region_factor)
                                                   for v, r in zip(views, regions)], repeats)

        def domes():
            prev, fits = None, []
            for hm in hms:
                x, y, z = hm.points_px()
                prev = fit_dome(x * px, y * px, z, up=hm.up, init=prev, robust_um=max(0.5, 0.25 * dz))
                fits.append(prev)
            return fits

        out["dome_fit"], _ = best_of(domes, repeats)

        def registration():
            ny, nx = st.shape_yx
            reg = Registrar((ny, nx), px, match_tol_px=max(s.link_search_um / px, 3.0), enabled=True)
            for t, (v, b) in enumerate(zip(views, blobs)):
                reg.update(t, v, b[["x_px", "y_px"]].to_numpy(float), None)

        out["registration"], _ = best_of(registration, repeats)
        return {k: 1000 * v / st.n_frames for k, v in out.items()}
    finally:
        st.close()


def render(res: dict, before: dict | None) -> str:
    def col(get, fmt):
        now = fmt.format(get(res))
        if before is None:
            return f"| {now} |"
        try:
            return f"| {fmt.format(get(before))} | {now} |"
        except (KeyError, TypeError):
            return f"| – | {now} |"

    head = "| measure | before | now |\n|---|---:|---:|" if before else "| measure | value |\n|---|---:|"
    acc = res["detect_accuracy"]
    lines = [
        "## Image stage",
        "",
        f"Recorded by `benchmarks/bench_image.py` on {res['platform']}, Python {res['python']}, "
        f"{res['cpus']} CPU cores, no GPU (load average {res['load_before'][0]:.1f} before and "
        f"{res['load_after'][0]:.1f} after the run; times on this virtual machine vary by 10–30 % from run to "
        f"run, so ratios are taken within one run). Each figure is the best of {res['repeats']} runs.",
        "",
        f"Synthetic stack: {res['frames']} frames of {'×'.join(map(str, res['shape']))} (Z×Y×X) uint16, "
        f"{res['pixel_um']} µm/px, {res['tiff_mb']:.0f} MB TIFF in the page cache; default settings (primordium "
        f"diameter {res['diameter_um'][0]:g}–{res['diameter_um'][1]:g} µm → σ {res['sigmas_px'][0]:.2f}–"
        f"{res['sigmas_px'][-1]:.2f} px, {len(res['sigmas_px'])} scales). Accuracy: matches within "
        f"{MATCH_UM:g} µm of the visible primordia of the ground truth ({acc['truth_per_frame']:.1f} per frame).",
        "",
    ]
    if before is not None:
        lines += [f"\"before\": the same script, run earlier on the package as it stood before this round of "
                  f"work (load average {before['load_before'][0]:.1f} then; ratios within each run are the "
                  f"figures to compare).", ""]
    lines += [head]
    rows = [
        ("detection per 512×512 frame, apextrack, whole frame", lambda r: r["detect_ms"]["ours_full_frame"], "{:.1f} ms"),
        ("detection per frame, apextrack with the apex region (as the pipeline runs it; region included)",
         lambda r: r["detect_ms"]["ours_apex_region"], "{:.1f} ms"),
        (f"detection per frame, naive `skimage.feature.blob_log` (same σ range, {len(res['sigmas_px'])} scales)",
         lambda r: r["detect_ms"]["blob_log"], "{:.1f} ms"),
        ("**detection speed-up, whole frame** (target ≥ 20×)", lambda r: r["detect_speedup"]["full_frame"], "**{:.1f}×**"),
        ("**detection speed-up, apex region** (target ≥ 20×)", lambda r: r["detect_speedup"]["apex_region"], "**{:.1f}×**"),
        ("F1 / localisation RMSE, apextrack (whole frame)",
         lambda r: (r["detect_accuracy"]["ours_full_frame"]["f1"], r["detect_accuracy"]["ours_full_frame"]["rmse_px"]),
         None),
        ("F1 / localisation RMSE, `blob_log`",
         lambda r: (r["detect_accuracy"]["blob_log"]["f1"], r["detect_accuracy"]["blob_log"]["rmse_px"]), None),
        ("read + max projection per frame, the package's reader (float32 frames, `Stack.frame`)",
         lambda r: r["per_frame_ms"]["read_project_float32"], "{:.1f} ms"),
        ("read + max projection per frame, raw frames in their dtype (the floor)",
         lambda r: r["per_frame_ms"]["read_project_native"], "{:.1f} ms"),
        ("whole image stage (max projection, default settings: frames measured in one thread per core), per frame",
         lambda r: r["per_frame_ms"]["image_stage_max"], "{:.1f} ms"),
        ("**image stage ÷ read + projection (float32 reader)** (target ≤ 3×)",
         lambda r: r["stage_ratio"]["max_vs_float32_read"], "**{:.2f}×**"),
        ("**image stage ÷ read + projection (raw floor)**", lambda r: r["stage_ratio"]["max_vs_native_read"], "**{:.2f}×**"),
        ("whole image stage in one thread (`threads = 1`), per frame",
         lambda r: r["per_frame_ms"]["image_stage_max_1_thread"], "{:.1f} ms"),
        ("image stage in one thread ÷ read + projection (float32 reader / raw floor)",
         lambda r: (r["stage_ratio"]["max_1_thread_vs_float32_read"], r["stage_ratio"]["max_1_thread_vs_native_read"]),
         None),
        ("whole image stage with the dome fitted on every 3rd frame (`dome_every_frames = 3`), per frame",
         lambda r: r["per_frame_ms"]["image_stage_dome_every_3"], "{:.1f} ms"),
        ("**image stage, dome on every 3rd frame ÷ read + projection (float32 reader)**",
         lambda r: r["stage_ratio"]["dome_every_3_vs_float32_read"], "**{:.2f}×**"),
        ("whole image stage with the surface-shell projection, per frame",
         lambda r: r["per_frame_ms"]["image_stage_surface"], "{:.1f} ms"),
        ("surface-shell stage ÷ read + projection (float32 reader / raw floor)",
         lambda r: (r["stage_ratio"]["surface_vs_float32_read"], r["stage_ratio"]["surface_vs_native_read"]), None),
    ]
    for name, get, fmt in rows:
        if fmt is None:
            fmt = "{0[0]:.3f} / {0[1]:.3f} px" if "F1" in name else "{0[0]:.2f}× / {0[1]:.2f}×"
        lines.append(f"| {name} {col(get, fmt)}")
    lines += ["", "Per-frame cost of the image stage's parts (each timed alone on the same frames, ms):", ""]
    comp = res["components_ms"]
    if before is not None and "components_ms" in before:
        lines += ["| part | before | now |", "|---|---:|---:|"]
        lines += [f"| {k.replace('_', ' ')} | {before['components_ms'].get(k, float('nan')):.1f} | {v:.1f} |"
                  for k, v in comp.items()]
    else:
        lines += ["| part | ms/frame |", "|---|---:|"] + [f"| {k.replace('_', ' ')} | {v:.1f} |" for k, v in comp.items()]
    lines += ["", f"The height map and the dome fit are timed here on every frame (the default, "
                  f"`dome_every_frames` = {res.get('dome_every_frames', 1)}); with `dome_every_frames = 3` the stage "
                  f"runs them on every third of these {res['frames']}. Registration is timed as the stage runs it "
                  f"(primordia matched with the last shift as the guess, phase correlation only when that fails)."]
    lines += [""]
    return "\n".join(lines)


def write_section(text: str, notes: str = "") -> None:
    results = Path(__file__).with_name("RESULTS.md")
    old = results.read_text(encoding="utf-8") if results.exists() else "# Benchmark results\n\n"
    body = text.rstrip("\n") + "\n" + (("\n" + notes.rstrip("\n") + "\n") if notes else "")
    if "## Image stage" in old:
        new = re.sub(r"## Image stage\n.*?(?=\n## |\Z)", lambda m: body, old, count=1, flags=re.S)
    else:
        new = old.rstrip("\n") + "\n\n" + body
    atomic_write_text(results, new)


def main(argv=None) -> str:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--json", type=Path, help="also write the raw figures to this JSON file")
    ap.add_argument("--before", type=Path, help="JSON of an earlier run, shown side by side")
    ap.add_argument("--notes", type=Path, help="text appended to the RESULTS.md section")
    ap.add_argument("--no-write", action="store_true", help="do not touch RESULTS.md")
    a = ap.parse_args(argv)
    res = measure(a.repeats)
    before = json.loads(a.before.read_text()) if a.before else None
    text = render(res, before)
    print(text)
    if a.json:
        a.json.write_text(json.dumps(res, indent=1, default=float))
    if not a.no_write:
        write_section(text, a.notes.read_text(encoding="utf-8") if a.notes else "")
    return text


if __name__ == "__main__":
    main()
    sys.exit(0)
