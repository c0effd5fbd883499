"""Permutations of birth order found in divergence angle sequences.

Source of the model: Refahi et al. 2016 (eLife 5:e14093) — swapping two successive organs turns
α, α, α into 2α, −α, 2α (275°, 222.5°, 275° for the golden angle), a reversed block of three
gives 3α, −α, −α, 3α; angle classes scored with a von Mises likelihood, κ ≈ 10.4 as fitted by
Guédon et al. 2013 (J. Theor. Biol.).
"""

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.phyllotaxis import analyse_phyllotaxis
from apextrack.phyllotaxis.permutation import BLOCKS, class_label, label_permutations, unexplained_threshold_deg
from apextrack.settings import Settings

PHI = (1 + math.sqrt(5)) / 2
G = 360 * (2 - PHI)


def test_published_class_values_for_the_golden_angle():
    # Refahi et al. 2016: 2α = 275°, −α = 222.5° for α = 137.5°
    assert (2 * G) % 360 == pytest.approx(275.0, abs=0.05)
    assert (-G) % 360 == pytest.approx(222.5, abs=0.05)


def test_two_permutation_exact():
    out = label_permutations([G, 2 * G, -G, 2 * G, G], G)
    assert [(b[0], b[1]) for b in out["blocks"]] == [(2, "swap")]
    assert list(out["multiples"]) == [1, 2, -1, 2, 1]
    assert list(out["corrected_order"]) == [0, 1, 3, 2, 4, 5]
    assert np.allclose(out["corrected_angles_deg"], G)
    assert out["blocks"][0][2] > 5  # strong likelihood ratio
    assert [class_label(m) for m in out["multiples"]] == ["α", "2α", "-α", "2α", "α"]


def test_three_permutation_reversed_block():
    out = label_permutations(np.array([G, 3 * G, -G, -G, 3 * G, G]) % 360, G)
    assert [(b[0], b[1]) for b in out["blocks"]] == [(2, "reversed_3")]
    assert list(out["multiples"]) == [1, 3, -1, -1, 3, 1]
    assert np.allclose(out["corrected_angles_deg"], G)


@pytest.mark.parametrize("name", ["shift_3_forward", "shift_3_back"])
def test_three_permutation_shifts(name):
    perm = np.array(BLOCKS[name])
    sigma = np.arange(9)
    sigma[3:6] = 3 + perm
    ang = np.diff(sigma) * G % 360
    out = label_permutations(ang, G)
    assert [(b[0], b[1]) for b in out["blocks"]] == [(3, name)]


def test_unexplained_angle_is_flagged_not_permuted():
    out = label_permutations([G, G, G, 20.0, G, G], G)
    assert out["blocks"] == []
    assert list(out["unexplained"]) == [False, False, False, True, False, False]
    # where the von Mises density falls below uniform: cos δ = ln I0(κ)/κ (our derivation)
    from scipy.special import i0

    thr = unexplained_threshold_deg(10.4)
    assert math.cos(math.radians(thr)) == pytest.approx(math.log(i0(10.4)) / 10.4)


def _simulate(rng, n=60, n_perm=5, kappa=10.4):
    truth = []
    while len(truth) < n_perm:
        s = int(rng.integers(2, n - 5))
        name = str(rng.choice(["swap", "swap", "reversed_3", "shift_3_forward", "shift_3_back"]))
        if any(abs(s - t) < 6 for t, _ in truth):
            continue
        truth.append((s, name))
    sigma = np.arange(n)
    for s, name in truth:
        sigma[s:s + len(BLOCKS[name])] = s + np.array(BLOCKS[name])
    noise = np.rad2deg(rng.vonmises(0.0, kappa, n - 1))
    return (np.diff(sigma) * G + noise) % 360, truth


def test_detection_rates_with_von_mises_noise():
    # κ = 10.4 (Guédon et al. 2013): at least 90 % of inserted 2- and 3-permutations found
    # exactly (same organs, same kind), at most 5 % of unpermuted organs put in a permutation
    rng = np.random.default_rng(2016)
    found = total = false = unpermuted = 0
    for _ in range(60):
        ang, truth = _simulate(rng)
        out = label_permutations(ang, G, kappa=10.4, prior=0.05)
        in_true = np.zeros(ang.size + 1, bool)
        for s, name in truth:
            in_true[s:s + len(BLOCKS[name])] = True
        in_found = np.zeros_like(in_true)
        for s, name, _ in out["blocks"]:
            in_found[s:s + len(BLOCKS[name])] = True
        for s, name in truth:
            total += 1
            found += any(b[0] == s and b[1] == name for b in out["blocks"])
        unpermuted += int((~in_true).sum())
        false += int((in_found & ~in_true).sum())
    assert found / total >= 0.90
    assert false / unpermuted <= 0.05


def test_no_permutation_in_a_clean_noisy_spiral():
    rng = np.random.default_rng(1)
    flagged = 0
    for _ in range(20):
        ang = (G + np.rad2deg(rng.vonmises(0.0, 10.4, 40))) % 360
        flagged += sum(len(BLOCKS[b[1]]) for b in label_permutations(ang, G)["blocks"])
    assert flagged / (20 * 41) <= 0.05


def test_prior_zero_disables_detection():
    out = label_permutations([G, 2 * G, -G, 2 * G, G], G, prior=0.0)
    assert out["blocks"] == []


def test_permutation_reported_by_analyse():
    # organs observed in order 1 2 3 5 4 6 7 8 (true positions); azimuths at k·α
    true_pos = [0, 1, 2, 4, 3, 5, 6, 7, 8, 9]
    p = pd.DataFrame({"birth_rank": np.arange(1, 11), "track_id": np.arange(10),
                      "emergence_time_h": 6.0 * np.arange(10),
                      "theta_deg": (10 + G * np.array(true_pos)) % 360, "r_um": 15.0,
                      "co_initiated": False})
    res = analyse_phyllotaxis(p, None, Settings(bootstrap_n=100))
    s = res.summary
    assert s["n_permutations"] == 1 and s["n_permuted"] == 2
    perm = s["permutations"][0]
    assert perm["ranks"] == [4, 5] and perm["corrected_order"] == [5, 4]
    assert perm["kind"] == "2-permutation" and perm["log_likelihood_ratio"] > 0
    assert s["corrected_order"] == [1, 2, 3, 5, 4, 6, 7, 8, 9, 10]
    assert s["corrected_divergence_mean_deg"] == pytest.approx(G, abs=1e-6)
    d = res.divergence
    assert list(d["angle_class"]) == ["α", "α", "2α", "-α", "2α", "α", "α", "α", "α"]
    assert list(d["permutation_id"]) == [0, 0, 1, 1, 1, 0, 0, 0, 0]
    assert np.allclose(d["corrected_angle_deg"], G)
    assert s["chirality"] == "ccw" and s["chirality_support"] == pytest.approx(6 / 9)


@pytest.mark.parametrize("direction", [1, -1])
def test_noisy_permuted_spiral_is_still_a_spiral(direction):
    # a golden spiral (both chiralities) with κ = 10.4 angle noise and two inserted
    # permutations: the mode stays "spiral" and both blocks are reported
    rng = np.random.default_rng(8)
    true_pos = np.arange(40)
    true_pos[10:12] = [11, 10]
    true_pos[25:28] = [27, 26, 25]
    theta = direction * (G * true_pos + np.rad2deg(rng.vonmises(0.0, 10.4, 40)) / math.sqrt(2))
    p = pd.DataFrame({"birth_rank": np.arange(1, 41), "track_id": np.arange(40),
                      "emergence_time_h": 6.0 * np.arange(40), "theta_deg": theta % 360,
                      "r_um": 15.0, "co_initiated": False})
    s = analyse_phyllotaxis(p, None, Settings(bootstrap_n=100)).summary
    assert s["chirality"] == ("ccw" if direction > 0 else "cw")
    assert s["mode"] == "spiral"
    blocks = sorted((q["ranks"], q["kind"]) for q in s["permutations"])
    assert ([11, 12], "2-permutation") in blocks and ([26, 27, 28], "3-permutation") in blocks
    assert s["corrected_divergence_mean_deg"] == pytest.approx(G, abs=5)
