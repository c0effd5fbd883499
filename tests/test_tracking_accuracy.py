"""End-to-end tracking and birth-order accuracy on rendered synthetic stacks.

The stacks drift, turn and carry camera noise; the pipeline's tracks are scored against the
exact ground truth with the Cell Tracking Challenge TRA measure (Matula et al. 2015, PLoS ONE
10:e0144959, as implemented in apextrack.scoring), birth ranks must all be exact, and the
back-extrapolated emergence times (Refahi et al. 2016, eLife 5:e14093, Appendix) must lie
within a quarter of a plastochron of the true birth times. A pair of primordia initiated a
fifth of a plastochron apart must be flagged co-initiated. The thresholds (TRA ≥ 0.95, a
quarter plastochron) are the project's acceptance criteria, not published values.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.model import make_synthetic_stack
from apextrack.pipeline import analyse
from apextrack.scoring import DEFAULT_GATE_UM, match_tracks, score_tracks
from apextrack.stack import from_array

GOLDEN = 360.0 * (2.0 - (1.0 + math.sqrt(5.0)) / 2.0)
PLASTOCHRON_H = 6.0
SHAPE = (8, 128, 128)
PX = 0.8


def run(synth):
    st = from_array(synth.data, synth.axes, pixel_size_um=synth.pixel_size_um, interval_h=synth.interval_h,
                    z_step_um=synth.z_step_um)
    return analyse(st, out=None, progress=False, bootstrap_n=20, report=False)


def image_tracks(res, synth):
    """The tracks in each frame's own image coordinates (the truth is given in those; the
    pipeline's x_um/y_um are registered to the first frame)."""
    tr = res.tracks.copy()
    tr["x_um"] = tr["x_px"] * synth.pixel_size_um
    tr["y_um"] = tr["y_px"] * synth.pixel_size_um
    return tr


@pytest.fixture(scope="module")
def moving_run():
    synth = make_synthetic_stack(n_frames=10, shape_zyx=SHAPE, pixel_size_um=PX, plastochron_h=PLASTOCHRON_H,
                                 drift_um_per_frame=(0.5, -0.3), rotation_deg_per_frame=1.5,
                                 timing_jitter_h=1.0, seed=2)
    return synth, run(synth)


def test_tra_and_birth_ranks_on_a_drifting_turning_noisy_stack(moving_run):
    synth, res = moving_run
    truth = synth.truth[synth.truth["visible"]]
    scores = score_tracks(truth, image_tracks(res, synth), res.primordia, gate_um=DEFAULT_GATE_UM)
    assert scores["TRA"] >= 0.95
    assert scores["n_primordia_matched"] == scores["n_primordia_true"]
    assert scores["rank_exact_fraction_raw"] == 1.0
    assert scores["kendall_tau"] == pytest.approx(1.0)
    assert not res.primordia["co_initiated"].any()


def test_emergence_times_within_a_quarter_plastochron(moving_run):
    synth, res = moving_run
    truth = synth.truth[synth.truth["visible"]]
    tracks = image_tracks(res, synth)
    pairs = match_tracks(truth.rename(columns={"primordium": "track"}),
                         tracks.rename(columns={"track_id": "track"}), DEFAULT_GATE_UM,
                         coords=("x_um", "y_um"))
    est = res.primordia.set_index("track_id")["emergence_time_h"]
    true = synth.primordia.set_index("primordium")["emergence_time_h"]
    errors = [est[t] - true[p] for p, t in pairs.items() if t in est.index]
    assert len(errors) == len(true)
    assert np.max(np.abs(errors)) <= 0.25 * PLASTOCHRON_H


def test_tracks_carry_quality_columns_and_motion_fit(moving_run):
    synth, res = moving_run
    for c in ("track_n_frames", "track_gaps", "track_mean_snr", "track_motion_residual_um", "track_flags"):
        assert c in res.tracks
    for c in ("emergence_time_sd_h", "rank_confidence", "fit_residual_um"):
        assert res.primordia[c].notna().all()
    motion = res.summary["linking"]["motion"]
    assert motion["growth_rate_per_h"] == pytest.approx(synth.params["growth_rate_per_h"], rel=0.05)


def test_pair_initiated_a_fifth_of_a_plastochron_apart_is_flagged():
    births = list(np.arange(-42.0, 28.0, PLASTOCHRON_H) + 1.5)
    j = births.index(7.5)
    births[j + 1] = births[j] + 0.2 * PLASTOCHRON_H      # 1.2 h after its predecessor
    thetas = [(k * GOLDEN) % 360.0 for k in range(len(births))]
    hist = pd.DataFrame({"birth_time_h": births, "theta_deg": thetas})
    synth = make_synthetic_stack(n_frames=10, shape_zyx=SHAPE, pixel_size_um=PX, plastochron_h=PLASTOCHRON_H,
                                 drift_um_per_frame=(0.4, 0.2), rotation_deg_per_frame=1.0, history=hist, seed=4)
    res = run(synth)
    truth = synth.truth[synth.truth["visible"]]
    tracks = image_tracks(res, synth)
    pairs = match_tracks(truth.rename(columns={"primordium": "track"}),
                         tracks.rename(columns={"track_id": "track"}), DEFAULT_GATE_UM,
                         coords=("x_um", "y_um"))
    hp = synth.primordia.set_index("primordium")
    pair = [int(p) for p in hp.index if abs(hp.loc[p, "emergence_time_h"] - 7.5) < 1e-6
            or abs(hp.loc[p, "emergence_time_h"] - 8.7) < 1e-6]
    assert len(pair) == 2
    prim = res.primordia.set_index("track_id")
    flagged = prim.loc[[pairs[p] for p in pair], "co_initiated"]
    assert flagged.all()
    # no other primordium is flagged
    assert int(prim["co_initiated"].sum()) == 2
