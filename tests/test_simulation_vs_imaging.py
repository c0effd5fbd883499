"""Simulation against imaging, end to end: simulate → render → analyse → compare.

The simulated record comes from the Douady–Couder inhibitory-field model (Douady & Couder
1992, Phys. Rev. Lett. 68; 1996, J. Theor. Biol. 178) as implemented in `apextrack.model`;
the comparison uses Watson's two-sample U² (Watson 1962, Biometrika 49; Mardia & Jupp,
Directional Statistics, §8.3).
"""

from __future__ import annotations

import pytest

from apextrack.comparison import compare_results
from apextrack.model import make_synthetic_stack, write_synthetic
from apextrack.model.patterns import run_simulation
from apextrack.pipeline import analyse


def _row(df, quantity):
    return df.set_index("quantity").loc[quantity]


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    root = tmp_path_factory.mktemp("simimg")
    # a short record with a little angle noise (the model's own, not the camera's)
    run_simulation("spiral", root / "sim", params={"record_primordia": 14, "angle_noise_deg": 1.0},
                   render=True, seed=2)
    return root


def test_imaging_of_a_simulation_matches_it(simulated):
    img = analyse(simulated / "sim" / "stack.tif", out=simulated / "img", progress=False)
    assert img.summary["mode"] == "spiral"
    df = compare_results(simulated / "sim", simulated / "img", seed=0, n_permutations=1999)
    # the same record seen through rendering and analysis: no significant difference
    assert _row(df, "divergence_angle_distribution")["p_value"] > 0.05
    diff = _row(df, "divergence_mean_difference_deg")
    assert diff["ci_low"] <= 0.0 <= diff["ci_high"]
    assert _row(df, "plastochron_distribution_h")["p_value"] > 0.05


def test_imaging_with_another_angle_differs(simulated, tmp_path):
    # a stack whose primordia follow the <1,3> limit angle 360/(3 + 1/φ) = 99.50° instead
    synth = make_synthetic_stack(n_frames=14, shape_zyx=(6, 112, 112), pixel_size_um=1.0,
                                 divergence_deg=99.5, seed=4)
    paths = write_synthetic(synth, tmp_path / "other.tif")
    analyse(paths["stack"], out=tmp_path / "img", progress=False)
    df = compare_results(simulated / "sim", tmp_path / "img", seed=0, n_permutations=1999)
    assert _row(df, "divergence_angle_distribution")["p_value"] < 0.05
    diff = _row(df, "divergence_mean_difference_deg")
    assert not (diff["ci_low"] <= 0.0 <= diff["ci_high"])
