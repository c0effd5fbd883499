"""Benchmark of the image stage: detection against a naive scikit-image ``blob_log`` call, and
the whole image stage against reading + max-projecting the stack.

Run: ``python benchmarks/bench_image.py`` — prints the figures and writes them to the section
"Image stage" of ``benchmarks/RESULTS.md`` (other sections are kept).
"""

from __future__ import annotations

import os
import platform
import re
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from apextrack.detect import detect_blobs, scales_px
from apextrack.model import make_synthetic_stack, write_synthetic
from apextrack.pipeline import image_stage
from apextrack.projection import max_projection
from apextrack.settings import Settings
from apextrack.stack import read_stack
from apextrack.tables import atomic_write_text

N_FRAMES = 6
SHAPE = (48, 512, 512)
REPEATS = 3


def best_of(fn, repeats=REPEATS):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> str:
    warnings.simplefilter("ignore")
    synth = make_synthetic_stack(n_frames=N_FRAMES, shape_zyx=SHAPE, z_step_um=1.0, pixel_size_um=0.8,
                                 dome_curvature_um=300.0, apex_radius_um=30.0, seed=7,
                                 drift_um_per_frame=(0.5, -0.3, 0.0), rotation_deg_per_frame=1.0)
    s = Settings()
    px = synth.pixel_size_um
    sig = scales_px(s.primordium_diameter_min_um, s.primordium_diameter_max_um, px, s.n_scales)
    views = [max_projection(synth.data[t].astype(np.float32)) for t in range(N_FRAMES)]

    # --- detection: ours vs the naive blob_log with the same scale range ----------------------
    from skimage.feature import blob_log

    detect_blobs(views[0], sig)  # warm-up (imports)
    t_ours, n_ours = best_of(lambda: [len(detect_blobs(v, sig, min_snr=s.min_snr)) for v in views])
    t_naive, n_naive = best_of(lambda: [len(blob_log(v, min_sigma=sig[0], max_sigma=sig[-1],
                                                     num_sigma=len(sig), threshold=None,
                                                     threshold_rel=0.05)) for v in views], repeats=1)
    truth_n = [int(((synth.truth.frame == t) & synth.truth.visible).sum()) for t in range(N_FRAMES)]
    det_ratio = t_naive / t_ours

    # --- whole image stage vs read + max projection -------------------------------------------
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.tif"
        write_synthetic(synth, path)
        size_mb = path.stat().st_size / 1e6

        def read_and_project():
            st = read_stack(path)
            try:
                for t in range(st.n_frames):
                    max_projection(st.frame(t))
            finally:
                st.close()

        def run_stage(settings):
            st = read_stack(path)
            try:
                return image_stage(st, settings, progress=False)
            finally:
                st.close()

        read_and_project()  # warm the page cache
        t_read, _ = best_of(read_and_project)
        t_stage, (dets, cents) = best_of(lambda: run_stage(s))
        t_stage_surf, _ = best_of(lambda: run_stage(s.replace(projection="surface")))
    stage_ratio = t_stage / t_read
    stage_ratio_surf = t_stage_surf / t_read

    lines = [
        "## Image stage",
        "",
        f"Recorded by `benchmarks/bench_image.py` on {platform.platform()}, Python {platform.python_version()}, "
        f"{os.cpu_count()} CPU(s) shared with other work (timings are the best of {REPEATS} runs; the naive call once).",
        "",
        f"Synthetic stack: {N_FRAMES} frames of {SHAPE[0]}×{SHAPE[1]}×{SHAPE[2]} (Z×Y×X) uint16, {px} µm/px, "
        f"{size_mb:.0f} MB TIFF; default settings (primordium diameter {s.primordium_diameter_min_um:g}–"
        f"{s.primordium_diameter_max_um:g} µm → σ {sig[0]:.2f}–{sig[-1]:.2f} px, {len(sig)} scales).",
        "",
        "| measure | value |",
        "|---|---|",
        f"| detection per 512×512 frame, apextrack (pyramid LoG + Gaussian fit + photometry) | {1000 * t_ours / N_FRAMES:.1f} ms |",
        f"| detection per frame, naive `skimage.feature.blob_log` (same σ range, {len(sig)} scales) | {1000 * t_naive / N_FRAMES:.1f} ms |",
        f"| **detection speed-up** (target ≥ 20×) | **{det_ratio:.1f}×** |",
        f"| blobs per frame: apextrack / blob_log / visible primordia in truth | {np.mean(n_ours):.1f} / {np.mean(n_naive):.1f} / {np.mean(truth_n):.1f} |",
        f"| read + max projection, per frame | {1000 * t_read / N_FRAMES:.1f} ms |",
        f"| whole image stage (max projection), per frame | {1000 * t_stage / N_FRAMES:.1f} ms |",
        f"| **image stage / (read + projection)** (target ≤ 3×) | **{stage_ratio:.2f}×** |",
        f"| whole image stage with the surface-shell projection, per frame | {1000 * t_stage_surf / N_FRAMES:.1f} ms ({stage_ratio_surf:.2f}×) |",
        "",
        "The image stage includes the surface height map and tilted-paraboloid dome fit, the apex region, "
        "detection, registration (phase correlation + primordia matching) and the coordinate mapping.",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    results = Path(__file__).with_name("RESULTS.md")
    old = results.read_text(encoding="utf-8") if results.exists() else "# Benchmark results\n\n"
    if "## Image stage" in old:
        new = re.sub(r"## Image stage\n.*?(?=\n## |\Z)", lambda m: text.rstrip("\n") + "\n", old, flags=re.S)
    else:
        new = old.rstrip("\n") + "\n\n" + text
    atomic_write_text(results, new)
    return text


if __name__ == "__main__":
    main()
    sys.exit(0)
