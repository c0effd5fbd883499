"""Tests of apextrack.comparison: Watson U², circular mean difference, KS, Fisher, folders."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from apextrack.comparison import (circular_mean_difference, compare_results, plastochron_ks,
                                  permutation_fisher, watson_u2, watson_u2_asymptotic_p,
                                  watson_u2_batch, watson_u2_test, write_comparison)
from apextrack.errors import ResultsError
from apextrack.tables import read_table, write_json, write_table


# ----------------------------------------------------------------------------- Watson U²


def test_u2_hand_computed():
    # Definition: Watson 1962 (Biometrika 49); computing form in Mardia & Jupp 2000,
    # Directional Statistics, §8.3: U² = (n1 n2 / N²)[Σ d_k² − (Σ d_k)²/N], d_k = F1 − F2 just
    # after the k-th pooled value.
    # a = {10, 50, 200}, b = {30, 100, 250, 300}: n1 = 3, n2 = 4, N = 7. Pooled order
    # 10a 30b 50a 100b 200a 250b 300b gives d = 1/3, 1/12, 5/12, 1/6, 1/2, 1/4, 0.
    #   Σd = 7/4,  Σd² = 91/144,  Σd² − (Σd)²/7 = 91/144 − 63/144 = 28/144 = 7/36
    #   U² = (12/49)(7/36) = 1/21
    a, b = [10.0, 50.0, 200.0], [30.0, 100.0, 250.0, 300.0]
    assert watson_u2(a, b) == pytest.approx(1 / 21, abs=1e-12)
    # symmetric in the samples and free of the origin (rotate both by 123°)
    assert watson_u2(b, a) == pytest.approx(1 / 21, abs=1e-12)
    assert watson_u2(np.add(a, 123.0), np.add(b, 123.0)) == pytest.approx(1 / 21, abs=1e-12)


def test_u2_ties_follow_the_integral_definition():
    # U² = (n1 n2 / N) ∫ (D − ∫D dH)² dH, D = F1 − F2, H the pooled EDF (Watson 1962).
    # a = {10, 20}, b = {20, 30}: H puts 1/4, 2/4, 1/4 on 10, 20, 30 where D = 1/2, 1/2, 0;
    # mean of D = 3/8; ∫(D − 3/8)² dH = 1/4·1/64 + 1/2·1/64 + 1/4·9/64 = 3/64;
    # n1 n2 / N = 1 → U² = 3/64.
    assert watson_u2([10.0, 20.0], [20.0, 30.0]) == pytest.approx(3 / 64, abs=1e-12)


def test_u2_asymptotic_distribution_points():
    # Limiting upper-tail probabilities: 5% at 0.187 and 1% at 0.268 (Stephens 1970,
    # J. R. Stat. Soc. B 32; tabulated in Mardia & Jupp 2000, Appendix 2).
    assert watson_u2_asymptotic_p(0.187) == pytest.approx(0.05, abs=0.001)
    assert watson_u2_asymptotic_p(0.268) == pytest.approx(0.01, abs=0.0005)
    assert watson_u2_asymptotic_p(0.0) == 1.0


def test_u2_null_rejection_rate_at_published_critical_value():
    # Under H0 (both samples from one von Mises), the share of U² above the asymptotic 5%
    # critical value 0.187 (Stephens 1970; Mardia & Jupp 2000) is 5% ± 2%.
    rng = np.random.default_rng(20260101)
    reps, n1, n2 = 4000, 40, 50
    mu, kappa = np.deg2rad(137.5), 2.0
    a = np.rad2deg(rng.vonmises(mu, kappa, size=(reps, n1)))
    b = np.rad2deg(rng.vonmises(mu, kappa, size=(reps, n2)))
    u2 = watson_u2_batch(a, b)
    share = float(np.mean(u2 > 0.187))
    assert 0.03 <= share <= 0.07, share
    # the batch agrees with the one-pair function
    assert u2[7] == pytest.approx(watson_u2(a[7], b[7]), abs=1e-12)


def test_u2_detects_a_different_angle():
    # Golden angle 137.5° vs the Lucas limit angle 99.5° (design brief values), κ = 10.4 noise
    # (Guédon et al. 2013 fit) — clearly different distributions must give p < 0.05.
    rng = np.random.default_rng(3)
    a = np.rad2deg(rng.vonmises(np.deg2rad(137.5), 10.4, 30))
    b = np.rad2deg(rng.vonmises(np.deg2rad(99.5), 10.4, 30))
    u2, p_perm = watson_u2_test(a, b, method="permutation", n_permutations=999, seed=1)
    _, p_asym = watson_u2_test(a, b, method="asymptotic")
    assert p_perm < 0.05 and p_asym < 0.05
    assert u2 > 0.187


def test_u2_permutation_p_close_to_asymptotic_and_seeded():
    # For moderate samples the permutation distribution approaches the limiting one
    # (Watson 1962): p-values agree to a few percent. Same seed → same p.
    rng = np.random.default_rng(11)
    a = np.rad2deg(rng.vonmises(np.deg2rad(137.5), 3.0, 40))
    b = np.rad2deg(rng.vonmises(np.deg2rad(120.0), 3.0, 40))
    u2, p1 = watson_u2_test(a, b, method="permutation", n_permutations=3999, seed=5)
    _, p2 = watson_u2_test(a, b, method="permutation", n_permutations=3999, seed=5)
    assert p1 == p2
    assert abs(p1 - watson_u2_asymptotic_p(u2)) < 0.04


# ----------------------------------------------------------------------------- other tests


def test_circular_mean_difference_wraps():
    # Means 350° and 10°: difference −20°, not 340° (common practice, no source).
    rng = np.random.default_rng(2)
    a = (350 + rng.normal(0, 3, 25)) % 360
    b = (10 + rng.normal(0, 3, 25)) % 360
    d, lo, hi = circular_mean_difference(a, b, n_boot=1000, seed=0)
    assert d == pytest.approx(-20, abs=3)
    assert lo <= d <= hi and hi - lo < 10
    assert hi < 0  # the interval excludes no shift
    assert circular_mean_difference(a, b, n_boot=1000, seed=0) == (d, lo, hi)


def test_ks_and_fisher_agree_with_scipy():
    # Reference library: scipy.stats.ks_2samp and scipy.stats.fisher_exact.
    rng = np.random.default_rng(4)
    a, b = rng.gamma(9, 0.8, 25), rng.gamma(9, 1.0, 30)
    ref = stats.ks_2samp(a, b)
    assert plastochron_ks(a, b) == pytest.approx((ref.statistic, ref.pvalue), abs=1e-12)
    ref = stats.fisher_exact([[3, 27], [11, 19]])
    assert permutation_fisher(3, 30, 11, 30) == pytest.approx((ref.statistic, ref.pvalue),
                                                               abs=1e-12)


# ----------------------------------------------------------------------------- folders


def _write_folder(folder, angles, intervals, summary_extra=None, drop=None):
    """A results folder in the analyse schema (scenario of our own)."""
    n = len(angles) + 1
    div = pd.DataFrame({"from_rank": np.arange(1, n), "to_rank": np.arange(2, n + 1),
                        "angle_deg": np.asarray(angles, float) % 360,
                        "interval_h": np.asarray(intervals, float)})
    prim = pd.DataFrame({"birth_rank": np.arange(1, n + 1), "track_id": np.arange(n),
                         "emergence_time_h": np.r_[0, np.cumsum(intervals)],
                         "emergence_frame": np.arange(n), "x_um": np.zeros(n),
                         "y_um": np.zeros(n), "r_um": np.full(n, 20.0),
                         "theta_deg": np.zeros(n), "co_initiated": np.arange(n) % 7 == 3})
    if drop:
        div = div.drop(columns=drop)
    folder.mkdir(parents=True, exist_ok=True)
    write_table(div, folder / "divergence.csv")
    write_table(prim, folder / "primordia.csv", "primordia")
    summ = {"n_primordia": n, "chirality": "ccw", "plastochron_h": float(np.mean(intervals)),
            "plastochron_ratio": 1.1}
    summ.update(summary_extra or {})
    write_json(summ, folder / "summary.json")
    return folder


def _sample(rng, mu, n=40, kappa=10.4, plast=8.0):
    ang = np.rad2deg(rng.vonmises(np.deg2rad(mu), kappa, n))
    return ang, rng.gamma(16, plast / 16, n)


def test_compare_results_rows_and_scipy(tmp_path):
    rng = np.random.default_rng(8)
    a = _write_folder(tmp_path / "imaging", *_sample(rng, 137.5),
                      {"n_permuted": 4, "parastichy_pair": [3, 5],
                       "parastichy_class": "Fibonacci", "plastochron_ratio_sd": 0.02})
    b = _write_folder(tmp_path / "model", *_sample(rng, 99.5, plast=10.0),
                      {"n_permuted": 12, "parastichy_pair": [3, 4],
                       "parastichy_class": "Lucas", "plastochron_ratio_sd": 0.02})
    df = compare_results(a, b, seed=0, n_permutations=999)
    rows = df.set_index("quantity")
    assert list(df.columns[:5]) == ["quantity", "value_a", "value_b", "statistic", "p_value"]
    assert rows.loc["divergence_angle_distribution", "p_value"] < 0.05
    da = read_table(a / "divergence.csv", "divergence")
    db = read_table(b / "divergence.csv", "divergence")
    # KS row equals scipy.stats.ks_2samp on the folders' plastochrons
    ks = stats.ks_2samp(da["interval_h"], db["interval_h"])
    assert rows.loc["plastochron_distribution_h", "p_value"] == pytest.approx(ks.pvalue, abs=1e-12)
    # Fisher row equals scipy.stats.fisher_exact on the permuted-organ counts
    fe = stats.fisher_exact([[4, 41 - 4], [12, 41 - 12]])
    assert rows.loc["permutation_frequency", "p_value"] == pytest.approx(fe.pvalue, abs=1e-12)
    assert rows.loc["divergence_mean_difference_deg", "statistic"] == pytest.approx(38, abs=6)
    assert rows.loc["divergence_mean_difference_deg", "ci_low"] > 0
    assert rows.loc["parastichy_class", "statistic"] == 0.0
    assert rows.loc["plastochron_ratio", "p_value"] == pytest.approx(1.0)
    assert all(isinstance(t, str) and t for t in df["test"])
    # repeatable with the same seed
    pd.testing.assert_frame_equal(df, compare_results(a, b, seed=0, n_permutations=999))
    files = write_comparison(df, tmp_path / "cmp")
    assert [f.name for f in files] == ["comparison.csv", "comparison.png"]
    assert files[1].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    back = read_table(files[0])
    assert list(back["quantity"]) == list(df["quantity"])


def test_compare_folder_with_itself(tmp_path):
    rng = np.random.default_rng(9)
    a = _write_folder(tmp_path / "a", *_sample(rng, 137.5))
    rows = compare_results(a, a, seed=0, n_permutations=199).set_index("quantity")
    assert rows.loc["divergence_angle_distribution", "statistic"] == pytest.approx(0, abs=1e-12)
    assert rows.loc["divergence_angle_distribution", "p_value"] == 1.0
    assert rows.loc["plastochron_distribution_h", "p_value"] == pytest.approx(1.0)
    # not reported → NaN with a note, not a crash
    assert math.isnan(rows.loc["permutation_frequency", "p_value"])
    assert "n_permuted" in rows.loc["permutation_frequency", "notes"]


def test_compare_missing_files_and_columns(tmp_path):
    rng = np.random.default_rng(10)
    good = _write_folder(tmp_path / "good", *_sample(rng, 137.5))
    bad = _write_folder(tmp_path / "bad", *_sample(rng, 137.5), drop=["angle_deg"])
    with pytest.raises(ResultsError, match="divergence.csv.*angle_deg"):
        compare_results(good, bad)
    nosum = _write_folder(tmp_path / "nosum", *_sample(rng, 137.5))
    (nosum / "summary.json").unlink()
    with pytest.raises(ResultsError, match="summary.json"):
        compare_results(good, nosum)
    noprim = _write_folder(tmp_path / "noprim", *_sample(rng, 137.5))
    (noprim / "primordia.csv").unlink()
    with pytest.raises(ResultsError, match="primordia.csv"):
        compare_results(noprim, good)
    with pytest.raises(ResultsError, match="missing_folder"):
        compare_results(good, tmp_path / "missing_folder")
