"""Emergence times, birth ranks, rank confidence and co-initiation from tracks.

Tracks follow r(t) = R·exp(γ(t − τ)) (Richards 1951, Phil. Trans. R. Soc. B 235); emergence
times are recovered by back-extrapolation τ = t − ln(r/R)/γ (Refahi et al. 2016, eLife
5:e14093, Appendix).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.birth import PRIMORDIA_COLUMNS, growth_rate, order_primordia

GOLDEN = 360.0 * (2.0 - (1.0 + math.sqrt(5.0)) / 2.0)
GAMMA = math.log(1.12) / 6.0     # plastochron ratio 1.12 over a 6-h plastochron
RIM = 22.0


def polar_tracks(births, n_frames=10, interval_h=3.0, noise_um=0.0, r_max_um=60.0, seed=0,
                 missing=()):
    """Tracks (already about the centre) of primordia with birth times and azimuths."""
    rng = np.random.default_rng(seed)
    rows = []
    for f in range(n_frames):
        t = f * interval_h
        for k, (tau, theta) in enumerate(births):
            if tau > t or (f, k) in missing:
                continue
            r = RIM * math.exp(GAMMA * (t - tau))
            if r > r_max_um:
                continue
            x = r * math.cos(math.radians(theta)) + rng.normal(0, noise_um)
            y = -r * math.sin(math.radians(theta)) + rng.normal(0, noise_um)
            rows.append((k, f, t, x, y, 4.0 * r / RIM, 20.0))
    df = pd.DataFrame(rows, columns=["track_id", "frame", "time_h", "x_um", "y_um", "radius_um", "snr"])
    df["r_um"] = np.hypot(df["x_um"], df["y_um"])
    df["theta_deg"] = np.mod(np.degrees(np.arctan2(-df["y_um"], df["x_um"])), 360.0)
    return df


def spiral_births(first=-30.0, last=27.0, plastochron=6.0, phase=1.5):
    times = np.arange(first + phase, last + 1e-9, plastochron)
    return [(float(t), (i * GOLDEN) % 360.0) for i, t in enumerate(times)]


def test_growth_rate_is_the_slope_of_ln_r():
    tr = polar_tracks(spiral_births())
    g, se, n = growth_rate(tr)
    assert g == pytest.approx(GAMMA, rel=1e-9)
    assert n >= 3


def test_back_extrapolation_recovers_birth_times_exactly_without_noise():
    # births exactly half an interval before the next frame: the reference radius estimated
    # from the primordia seen appearing equals the rim radius
    births = spiral_births(phase=1.5)
    prim, info = order_primordia(polar_tracks(births))
    assert info["rim_radius_um"] == pytest.approx(RIM, rel=1e-9)
    est = prim.set_index("track_id")["emergence_time_h"]
    for k, (tau, _) in enumerate(births):
        if k in est.index:
            assert est[k] == pytest.approx(tau, abs=1e-6)
    assert prim["birth_rank"].tolist() == list(range(1, len(prim) + 1))
    assert prim["track_id"].tolist() == sorted(prim["track_id"])  # births in id order
    assert list(prim.columns) == PRIMORDIA_COLUMNS


def test_noisy_tracks_recover_birth_times_within_a_quarter_plastochron():
    births = spiral_births(phase=0.7)
    prim, info = order_primordia(polar_tracks(births, noise_um=0.2, seed=3), centre_sd_um=0.2)
    est = prim.set_index("track_id")["emergence_time_h"]
    err = np.array([est[k] - births[k][0] for k in est.index])
    assert np.max(np.abs(err)) < 0.25 * 6.0
    assert (prim["track_id"].to_numpy() == np.sort(prim["track_id"].to_numpy())).all()
    assert not prim["co_initiated"].any()
    # the stated uncertainty covers the error of most primordia (about 2 SD)
    sd = prim.set_index("track_id")["emergence_time_sd_h"].reindex(est.index).to_numpy()
    assert np.mean(np.abs(err) < 2 * sd + 0.75) > 0.8


def test_pair_initiated_a_fifth_of_a_plastochron_apart_is_flagged():
    births = spiral_births(phase=1.5)
    k = 7
    births[k + 1] = (births[k][0] + 0.2 * 6.0, births[k + 1][1])   # 0.2 plastochron after k
    prim, info = order_primordia(polar_tracks(births, noise_um=0.15, seed=1), centre_sd_um=0.2)
    flagged = set(prim.loc[prim["co_initiated"], "track_id"])
    assert {k, k + 1} <= flagged
    assert len(flagged) == 2
    row = prim.set_index("track_id").loc[k]
    partner = prim.set_index("track_id").loc[k + 1, "birth_rank"]
    assert str(partner) in row["co_initiated_with"].split(";")
    # their ranks are the least certain
    conf = prim.set_index("track_id")["rank_confidence"]
    assert conf[k] < conf.drop([k, k + 1]).min()
    assert conf[k + 1] < conf.drop([k, k + 1]).min()


def test_explicit_tolerance_flags_more():
    births = spiral_births(phase=1.5)
    prim, info = order_primordia(polar_tracks(births), co_initiation_h=7.0)
    assert prim["co_initiated"].all()
    assert info["co_initiation_h"] == 7.0


def test_short_track_in_mid_record_is_left_out_but_censored_ones_are_kept():
    births = spiral_births(phase=1.5)
    tr = polar_tracks(births)
    spur = pd.DataFrame({"track_id": [99], "frame": [4], "time_h": [12.0], "x_um": [10.0], "y_um": [0.0],
                         "radius_um": [3.0], "snr": [5.0], "r_um": [10.0], "theta_deg": [0.0]})
    tr = pd.concat([tr, spur], ignore_index=True)
    prim, info = order_primordia(tr, min_track_frames=2)
    assert 99 not in set(prim["track_id"])
    assert info["tracks_left_out"] == [99]
    last = tr[tr["frame"] == tr["frame"].max()]
    newborn = last.loc[last["r_um"].idxmin(), "track_id"]
    assert (tr["track_id"] == newborn).sum() == 1
    assert newborn in set(prim["track_id"])  # seen once, in the last frame: kept


def test_size_clock_agrees_with_distance_clock():
    # radius ∝ r (self-similar growth): the size clock gives the same emergence times
    births = spiral_births(phase=1.5)
    prim, _ = order_primordia(polar_tracks(births))
    np.testing.assert_allclose(prim["emergence_time_size_h"], prim["emergence_time_h"], atol=1e-6)


def test_single_frame_falls_back_to_distance_order():
    tr = polar_tracks(spiral_births(), n_frames=1)
    prim, info = order_primordia(tr)
    assert "growth rate unknown" in info["method"]
    assert np.all(np.diff(prim["r_um"].to_numpy()) < 0)  # older farther out


def test_empty_tracks():
    empty = polar_tracks([], n_frames=1)
    prim, info = order_primordia(empty)
    assert prim.empty
