"""Primordium histories: birth angles, birth order, outward drift and growth."""

import math

import numpy as np
import pytest

from apextrack.errors import SettingsError
from apextrack.model.growth import (GOLDEN_ANGLE_DEG, Growth, growth_rate_for_ratio,
                                    history_from_births, intrinsic_truth, plastochron_ratio,
                                    regular_history)


def _successive(h):
    return np.mod(np.diff(h.sort_values("birth_rank")["theta_deg"].to_numpy()), 360.0)


def test_golden_angle_value():
    # Golden angle 360·(2 − φ) = 137.50776…° (φ = (1 + √5)/2; standard value, e.g. Douady &
    # Couder 1996, J. Theor. Biol. 178)
    assert GOLDEN_ANGLE_DEG == pytest.approx(137.5077640500378, abs=1e-10)


@pytest.mark.parametrize("angle", [GOLDEN_ANGLE_DEG, 99.5016, 180.0, 77.96])
def test_successive_azimuth_differences_equal_the_set_angle(angle):
    h = regular_history(-40, 60, divergence_deg=angle, plastochron_h=7.0, theta0_deg=33.0)
    assert (h["birth_rank"].to_numpy() == np.arange(1, len(h) + 1)).all()
    assert np.all(np.diff(h["birth_time_h"].to_numpy()) == pytest.approx(7.0))
    d = _successive(h)
    assert np.allclose(d, angle % 360.0, atol=1e-9)
    assert not h["co_initiated"].any()


def test_clockwise_history_turns_the_other_way():
    h = regular_history(0, 50, divergence_deg=GOLDEN_ANGLE_DEG, plastochron_h=5.0, chirality="cw")
    assert np.allclose(_successive(h), 360.0 - GOLDEN_ANGLE_DEG, atol=1e-9)


def test_decussate_pairs_are_co_initiated_and_turn_by_90():
    # decussate: opposite pairs alternating at right angles (common practice, no source)
    h = regular_history(0, 40, divergence_deg=90.0, plastochron_h=8.0, jugacy=2)
    assert h["co_initiated"].all()
    for _, g in h.groupby("birth_time_h"):
        assert len(g) == 2
        assert np.mod(np.diff(g["theta_deg"].to_numpy()), 360.0)[0] == pytest.approx(180.0)
    firsts = h.groupby("birth_time_h")["theta_deg"].first().to_numpy()
    assert np.allclose(np.mod(np.diff(firsts), 360.0), 90.0)


def test_permutation_gives_two_alpha_minus_alpha_two_alpha():
    # Refahi et al. 2016 (eLife 5:e14093): swapping two successive organs turns the angle
    # sequence α, α, α into 2α, −α, 2α (275°, 222.5°, 275° for the golden angle)
    rng = np.random.default_rng(3)
    a = GOLDEN_ANGLE_DEG
    h = regular_history(0, 60 * 6.0, divergence_deg=a, plastochron_h=6.0, phase_h=0.0,
                        permutation_prob=0.25, rng=rng)
    d = _successive(h)
    order = h["group"].to_numpy()  # index of each primordium in the unpermuted sequence
    swaps = np.nonzero(np.diff(order) < 0)[0]
    assert 5 <= len(swaps) <= 25
    checked = 0
    for i in swaps:
        isolated = not any(0 < abs(int(j) - int(i)) <= 2 for j in swaps)
        if isolated and 1 <= i < len(d) - 1:
            assert d[i - 1] == pytest.approx(275.0155, abs=1e-3)
            assert d[i] == pytest.approx(222.4922, abs=1e-3)
            assert d[i + 1] == pytest.approx(275.0155, abs=1e-3)
            assert d[i - 1] == pytest.approx(2 * a) and d[i] == pytest.approx(360 - a)
            checked += 1
    assert checked >= 5
    untouched = np.ones(len(d), bool)
    for i in swaps:
        untouched[max(i - 1, 0):i + 2] = False
    assert np.allclose(d[untouched], a)
    # birth times are still one plastochron apart: only the order of the organs changed
    assert np.allclose(np.diff(h["birth_time_h"]), 6.0)


def test_history_from_births_sorts_and_flags_ties():
    h = history_from_births([12.0, 0.0, 6.0, 6.0], [10.0, 20.0, 30.0, 210.0])
    assert h["birth_time_h"].tolist() == [0.0, 6.0, 6.0, 12.0]
    assert h["co_initiated"].tolist() == [False, True, True, False]
    assert h["birth_rank"].tolist() == [1, 2, 3, 4]
    with pytest.raises(SettingsError):
        history_from_births([1.0, 2.0], [1.0])
    with pytest.raises(SettingsError):
        regular_history(0, 10, plastochron_h=0.0)


def test_radius_follows_exponential_drift_and_plastochron_ratio():
    # Richards 1951 (Phil. Trans. R. Soc. B 235): r(t) = r0·exp(k t) gives plastochron ratio
    # R = exp(k T), i.e. T = ln R / k
    gamma = growth_rate_for_ratio(1.13, 7.0)
    assert gamma == pytest.approx(math.log(1.13) / 7.0)
    assert plastochron_ratio(gamma, 7.0) == pytest.approx(1.13)
    g = Growth(apex_radius_um=25.0, growth_rate_per_h=gamma)
    h = regular_history(-30, 30, plastochron_h=7.0)
    times = np.arange(0, 30, 2.5)
    t = intrinsic_truth(h, times, g)
    assert (t["age_h"] >= 0).all()
    expect = 25.0 * np.exp(gamma * (t["time_h"] - t["birth_time_h"]))
    assert np.allclose(t["r_um"], expect, rtol=1e-12)
    # log r is linear in time with slope γ for each primordium
    for _, tr in t.groupby("primordium"):
        if len(tr) >= 3:
            slope = np.polyfit(tr["time_h"], np.log(tr["r_um"]), 1)[0]
            assert slope == pytest.approx(gamma, rel=1e-9)
    # successive primordia at one time: r_n / r_(n+1) = plastochron ratio
    f0 = t[t["frame"] == 0].sort_values("birth_rank")
    ratios = f0["r_um"].to_numpy()[:-1] / f0["r_um"].to_numpy()[1:]
    assert np.allclose(ratios, 1.13)
    # azimuth stays fixed
    assert (t.groupby("primordium")["theta_deg"].nunique() == 1).all()


def test_size_and_brightness_grow_then_saturate():
    g = Growth(apex_radius_um=20.0, growth_rate_per_h=0.02, radius_at_birth_um=4.0,
               max_radius_um=9.0, brightness_at_birth=0.5, rise_h=6.0)
    assert g.size(20.0) == pytest.approx(4.0)
    assert g.size(30.0) == pytest.approx(6.0)
    assert g.size(100.0) == pytest.approx(9.0)
    assert g.brightness(0.0) == pytest.approx(0.5)
    assert g.brightness(3.0) == pytest.approx(0.75)
    assert g.brightness(60.0) == pytest.approx(1.0)
    assert g.brightness(-1.0) == 0.0
    assert np.isnan(g.distance(-1.0))
