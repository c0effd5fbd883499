"""Circular statistics checked against general-purpose reference libraries (scipy.stats and
astropy.stats) and textbook identities."""

import math

import numpy as np
import pytest
import scipy.stats
from astropy import stats as astats
from hypothesis import given, settings, strategies as st

from apextrack import circular as circ


def _close_mod360(a, b, tol=1e-9):
    return abs(((a - b + 180.0) % 360.0) - 180.0) < tol


ANGLE_SETS = [
    [350.0, 10.0],
    [350.0, 10.0, 5.0, 355.0, 0.0],
    [130.0, 90.0, 0.0, 145.0],
    [137.5, 140.2, 133.9, 275.0, 222.5, 136.0],
    list(np.random.default_rng(3).vonmises(np.deg2rad(100), 2.0, 40) * 180 / np.pi % 360),
]


@pytest.mark.parametrize("angles", ANGLE_SETS)
def test_mean_sd_match_scipy(angles):
    # reference: scipy.stats.circmean / circstd (high=360); circmean may give 360 for 0,
    # hence the comparison modulo 360
    assert _close_mod360(circ.circ_mean(angles), scipy.stats.circmean(angles, high=360, low=0))
    assert circ.circ_sd(angles) == pytest.approx(scipy.stats.circstd(angles, high=360, low=0), rel=1e-9, abs=1e-9)
    assert circ.circ_var(angles) == pytest.approx(scipy.stats.circvar(angles, high=360, low=0), abs=1e-12)


@pytest.mark.parametrize("angles", ANGLE_SETS)
def test_mean_and_rayleigh_match_astropy(angles):
    # reference: astropy.stats.circmean (radians) and astropy.stats.rayleightest
    rad = np.deg2rad(angles)
    assert _close_mod360(circ.circ_mean(angles), math.degrees(float(astats.circmean(rad))))
    z, p = circ.rayleigh_test(angles)
    assert p == pytest.approx(float(astats.rayleightest(rad)), rel=1e-9, abs=1e-12)
    assert z == pytest.approx(len(angles) * circ.resultant_length(angles) ** 2)


def test_rayleigh_docstring_example_of_astropy():
    # astropy.stats.rayleightest docstring: [130, 90, 0, 145] deg -> p = 0.2563487733797317
    assert circ.rayleigh_test([130, 90, 0, 145])[1] == pytest.approx(0.2563487733797317, rel=1e-12)


def test_large_sample_rayleigh_is_exp_minus_z():
    a = np.random.default_rng(0).uniform(0, 360, 80)
    z, p = circ.rayleigh_test(a)
    assert p == pytest.approx(math.exp(-z))
    assert p == pytest.approx(float(astats.rayleightest(np.deg2rad(a))))


def test_empty_and_degenerate_inputs():
    assert math.isnan(circ.circ_mean([]))
    assert math.isnan(circ.circ_mean([0.0, 180.0]))  # zero resultant: no mean direction
    assert circ.circ_sd([0.0, 180.0]) == math.inf
    assert circ.circ_sd([42.0]) == 0.0
    assert all(math.isnan(x) for x in circ.bootstrap_circ_mean_ci([10.0]))
    assert all(math.isnan(x) for x in circ.rayleigh_test([]))


def test_wrap():
    assert circ.wrap360(-1e-17) == 0.0
    assert circ.wrap360(720.5) == pytest.approx(0.5)
    assert circ.wrap180(190.0) == pytest.approx(-170.0)
    assert circ.circ_diff(10.0, 350.0) == pytest.approx(20.0)
    assert np.all(circ.wrap360(np.array([-360.0, 359.999, 360.0])) < 360.0)


def test_von_mises_logpdf_matches_scipy():
    # reference: scipy.stats.vonmises (radians)
    x = np.array([0.0, 30.0, 137.5, 275.0, 359.0])
    for kappa in (0.5, 10.4, 200.0):
        ours = circ.von_mises_logpdf(x, 137.5, kappa)
        ref = scipy.stats.vonmises.logpdf(np.deg2rad(x), kappa, loc=np.deg2rad(137.5))
        assert np.allclose(ours, ref, atol=1e-9)


def test_bootstrap_ci_is_seeded_and_covers_the_mean():
    rng = np.random.default_rng(7)
    a = (np.rad2deg(rng.vonmises(0.0, 10.4, 30)) + 5.0) % 360  # straddles 0/360
    lo, hi = circ.bootstrap_circ_mean_ci(a, 1000, 0.95, rng=1)
    assert (lo, hi) == circ.bootstrap_circ_mean_ci(a, 1000, 0.95, rng=1)
    m = circ.circ_mean(a)
    mu = m if m < 180 else m - 360
    assert lo <= mu <= hi and hi - lo < 30
    # the interval of a von Mises sample with κ = 10.4 (σ ≈ 18°) of 30 angles has a half-width
    # near 1.96·18/√30 ≈ 6.5° (normal approximation; common practice)
    assert 3.0 < (hi - lo) / 2 < 10.0


def test_bootstrap_ci_coverage():
    # frequentist check: the 90 % interval covers the true mean in most repeats
    rng = np.random.default_rng(11)
    hits = 0
    for _ in range(100):
        a = np.rad2deg(rng.vonmises(np.deg2rad(137.5), 10.4, 25))
        lo, hi = circ.bootstrap_circ_mean_ci(a, 300, 0.90, rng)
        hits += lo <= 137.5 <= hi
    assert 80 <= hits <= 98


def test_linear_bootstrap_ci():
    v = np.arange(1.0, 21.0)
    lo, hi = circ.bootstrap_ci(v, np.mean, 2000, 0.95, 0)
    assert lo < v.mean() < hi
    assert (lo, hi) == circ.bootstrap_ci(v, np.mean, 2000, 0.95, 0)
    assert all(math.isnan(x) for x in circ.bootstrap_ci([3.0]))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0, 359.9), min_size=2, max_size=20), st.floats(-720, 720))
def test_mean_rotates_with_the_data(angles, shift):
    m = circ.circ_mean(angles)
    if math.isnan(m) or circ.resultant_length(angles) < 1e-6:
        return
    m2 = circ.circ_mean(np.asarray(angles) + shift)
    assert _close_mod360(m2, m + shift, tol=1e-6)
    assert circ.circ_sd(np.asarray(angles) + shift) == pytest.approx(circ.circ_sd(angles), rel=1e-6, abs=1e-6)
