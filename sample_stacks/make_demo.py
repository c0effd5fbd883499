"""Regenerate the bundled demo stacks of the invented "coralbell" scenario.

Run from anywhere with apextrack installed::

    python sample_stacks/make_demo.py            # writes into apextrack/sample_data/
    python sample_stacks/make_demo.py --out DIR  # writes elsewhere

The output is deterministic (fixed seeds): re-running gives byte-identical tables and stacks.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from apextrack.model import GOLDEN_ANGLE_DEG, make_synthetic_stack, write_synthetic

#: Each demo: file name → arguments of make_synthetic_stack.
DEMOS = {
    # Coralbell line CB-7, inflorescence apex, nuclear reporter only: an easy golden-angle
    # spiral with slight drift and mild bleaching.
    "coralbell_spiral.tif": dict(
        n_frames=14, interval_h=3.0, plastochron_h=6.0, divergence_deg=GOLDEN_ANGLE_DEG,
        pixel_size_um=1.0, z_step_um=5.0, shape_zyx=(8, 104, 104), apex_radius_um=22.0,
        plastochron_ratio=1.12, primordium_radius_um=4.0, primordium_max_radius_um=9.0,
        drift_um_per_frame=(0.4, -0.3, 0.0), bleach_per_frame=0.01, peak_photons=90.0,
        theta0_deg=20.0, seed=7),
    # Coralbell mutant line CB-7 "twinrow": a narrower apex initiating alternate (distichous)
    # primordia, imaged with a membrane marker as a second channel.
    "coralbell_distichous.tif": dict(
        n_frames=14, interval_h=3.0, plastochron_h=8.0, divergence_deg=180.0,
        pixel_size_um=1.2, z_step_um=5.0, shape_zyx=(5, 104, 104), apex_radius_um=16.0,
        plastochron_ratio=1.35, primordium_radius_um=3.5, primordium_max_radius_um=6.0,
        brightness_at_birth=0.8, drift_um_per_frame=(-0.3, 0.25, 0.0), bleach_per_frame=0.01,
        peak_photons=110.0,
        theta0_deg=60.0, membrane=True, seed=11),
}


def main(argv=None) -> None:
    default = Path(__file__).resolve().parent.parent / "apextrack" / "sample_data"
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=default, help=f"output folder (default {default})")
    args = ap.parse_args(argv)
    for name, kw in DEMOS.items():
        synth = make_synthetic_stack(**kw)
        paths = write_synthetic(synth, args.out / name)
        n = len(synth.primordia)
        born = int((~synth.primordia["born_before_record"]).sum())
        size = paths["stack"].stat().st_size / 1e6
        print(f"{paths['stack']}: {synth.axes} {synth.data.shape}, {size:.1f} MB, "
              f"{n} primordia ({born} born during the record)")


if __name__ == "__main__":
    main()
