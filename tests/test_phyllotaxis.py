"""analyse_phyllotaxis end to end on synthetic primordia tables: divergence angles, chirality,
plastochron (both estimators), plastochron ratio, Richards' phyllotaxis index, pattern modes,
few-primordia behaviour and invariance properties.

The synthetic tables follow the growth law the analysis assumes: primordia are born every T
hours at azimuths k·α and drift outward as r(t) = r0·exp(k (t − t_birth)) (Richards 1951,
Phil. Trans. R. Soc. B 235), so the plastochron ratio is exp(k T).
"""

import json
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from apextrack.phyllotaxis import PhyllotaxisResult, analyse_phyllotaxis, phyllotaxis_index
from apextrack.phyllotaxis import plastochron as pla
from apextrack.settings import Settings

PHI = (1 + math.sqrt(5)) / 2
GOLDEN = 360 * (2 - PHI)

FAST = Settings(bootstrap_n=200)


def make_tables(angles=None, n=16, alpha=GOLDEN, T=6.0, k=0.04, r0=12.0, dt=2.0, theta0=30.0,
                node_size=1, rotation_deg_per_h=0.0, angle_noise=0.0, r_noise=0.0, seed=0,
                extra_frames=3):
    """Primordia and tracks tables of a synthetic apex.

    ``angles`` gives the azimuth of each organ directly (else k·alpha); organs of one node
    (``node_size`` > 1) are born together and flagged co-initiated.
    """
    rng = np.random.default_rng(seed)
    if angles is None:
        angles = theta0 + alpha * np.arange(n)
    angles = np.asarray(angles, float)
    n = angles.size
    node = np.arange(n) // node_size
    t_em = node * T
    times = np.arange(0.0, t_em[-1] + dt * extra_frames + 1e-9, dt)
    prim, det = [], []
    for i in range(n):
        f0 = int(np.ceil(t_em[i] / dt - 1e-9))
        th_em = (angles[i] + rotation_deg_per_h * times[f0]) % 360
        prim.append({"birth_rank": i + 1, "track_id": 50 + i, "emergence_time_h": t_em[i],
                     "emergence_frame": f0, "x_um": 0.0, "y_um": 0.0, "r_um": r0,
                     "theta_deg": th_em, "co_initiated": node_size > 1})
        for f in range(f0, times.size):
            t = times[f]
            det.append({"track_id": 50 + i, "frame": f, "time_h": t,
                        "r_um": r0 * math.exp(k * (t - t_em[i])) * (1 + r_noise * rng.normal()),
                        "theta_deg": (angles[i] + rotation_deg_per_h * t + angle_noise * rng.normal()) % 360,
                        "radius_um": 4.0, "snr": 10.0})
    return pd.DataFrame(prim), pd.DataFrame(det)


def test_golden_spiral_recovered():
    p, t = make_tables(n=20)
    res = analyse_phyllotaxis(p, t, FAST)
    assert isinstance(res, PhyllotaxisResult)
    s = res.summary
    # golden angle 360(2 - φ) = 137.50776° (exact; common knowledge, Vogel 1979)
    assert GOLDEN == pytest.approx(137.5077640500378, abs=1e-9)
    assert s["chirality"] == "ccw" and s["chirality_support"] == 1.0
    assert s["divergence_mean_deg"] == pytest.approx(GOLDEN, abs=1e-6)
    assert s["divergence_ci_deg"][0] <= s["divergence_mean_deg"] <= s["divergence_ci_deg"][1]
    assert s["resultant_length"] == pytest.approx(1.0)
    assert s["rayleigh_p"] < 1e-6
    assert s["plastochron_h"] == pytest.approx(6.0) and s["plastochron_median_h"] == pytest.approx(6.0)
    assert s["plastochron_ratio"] == pytest.approx(math.exp(0.04 * 6))
    assert s["plastochron_growth_h"] == pytest.approx(6.0, rel=1e-9)
    assert s["relative_plastochron_rate"] == pytest.approx(0.24)
    assert s["phyllotaxis_index"] == pytest.approx(phyllotaxis_index(math.exp(0.24)))
    assert s["mode"] == "spiral"
    assert s["permutations"] == [] and s["n_permuted"] == 0
    d = res.divergence
    for col in ("from_rank", "to_rank", "angle_deg", "interval_h", "signed_angle_deg", "angle_class",
                "permutation_id"):
        assert col in d.columns
    assert len(d) == 19 and (d["angle_class"] == "α").all() and (d["permutation_id"] == 0).all()
    assert np.allclose(d["angle_deg"], GOLDEN) and np.allclose(d["interval_h"], 6.0)
    json.dumps(s)  # JSON-able


def test_clockwise_spiral():
    p, t = make_tables(n=12, alpha=-GOLDEN)
    s = analyse_phyllotaxis(p, t, FAST).summary
    assert s["chirality"] == "cw"
    assert s["divergence_mean_deg"] == pytest.approx(GOLDEN, abs=1e-6)


def test_angles_taken_in_a_common_frame():
    # the whole apex turns 2°/h (e.g. residual rotation); emergence azimuths are then 12° off
    # per plastochron, angles in a frame where both organs are seen are not
    p, t = make_tables(n=12, rotation_deg_per_h=2.0)
    res = analyse_phyllotaxis(p, t, FAST)
    assert (res.divergence["angle_source"] == "common_frame").all()
    assert res.summary["divergence_mean_deg"] == pytest.approx(GOLDEN, abs=1e-6)
    # without tracks the emergence azimuths are used, and the rotation shows
    res2 = analyse_phyllotaxis(p, None, FAST)
    assert (res2.divergence["angle_source"] == "emergence").all()
    assert res2.summary["divergence_mean_deg"] == pytest.approx(GOLDEN + 12.0, abs=1e-6)


def test_noisy_spiral_interval_covers_truth():
    p, t = make_tables(n=30, angle_noise=6.0, r_noise=0.02, seed=4)
    s = analyse_phyllotaxis(p, t, Settings(bootstrap_n=500)).summary
    lo, hi = s["divergence_ci_deg"]
    assert lo < GOLDEN < hi
    assert 5.0 < s["divergence_sd_deg"] < 15.0
    assert s["plastochron_growth_h"] == pytest.approx(6.0, rel=0.1)
    glo, ghi = s["plastochron_growth_ci_h"]
    assert glo < 6.0 < ghi
    assert s["plastochron_estimates_agree"] is True


@pytest.mark.parametrize("n", [0, 1, 2])
def test_few_primordia_never_crash(n):
    p, t = make_tables(n=5)
    p = p.iloc[:n]
    t = t[t["track_id"].isin(p["track_id"])]
    res = analyse_phyllotaxis(p, t, FAST)
    s = res.summary
    json.dumps(s)
    assert s["n_primordia"] == n
    assert len(res.divergence) == max(0, n - 1)
    assert s["divergence_ci_deg"] is None
    assert "3 angles" in s["reasons"]["divergence_ci_deg"] or "at least 1 angle" in s["reasons"]["divergence_ci_deg"]
    for key in ("parastichy_pair", "mode", "permutations", "plastochron_ci_h"):
        assert s[key] is None and key in s["reasons"]
    if n < 2:
        assert s["divergence_mean_deg"] is None and s["plastochron_h"] is None
        assert "divergence_mean_deg" in s["reasons"] and "plastochron_h" in s["reasons"]
    else:
        assert s["divergence_mean_deg"] == pytest.approx(GOLDEN)
        assert s["divergence_ci_deg"] is None
        assert s["reasons"]["divergence_ci_deg"] == "divergence CI needs at least 3 angles; 1 available"


def test_empty_tables_and_no_tracks():
    res = analyse_phyllotaxis(pd.DataFrame(columns=["birth_rank", "track_id", "emergence_time_h", "theta_deg"]),
                              pd.DataFrame(), FAST)
    assert res.summary["n_primordia"] == 0 and len(res.divergence) == 0 and len(res.parastichies) == 0
    p, _ = make_tables(n=8)
    s = analyse_phyllotaxis(p, None, FAST).summary
    assert s["plastochron_ratio"] is None and "plastochron_ratio" in s["reasons"]
    assert s["plastochron_growth_h"] is None and s["divergence_mean_deg"] is not None


def test_seeded_results_repeat():
    p, t = make_tables(n=15, angle_noise=8.0, seed=2)
    a = analyse_phyllotaxis(p, t, Settings(bootstrap_n=300, seed=5)).summary
    b = analyse_phyllotaxis(p, t, Settings(bootstrap_n=300, seed=5)).summary
    assert a == b


# --- Richards 1951 ----------------------------------------------------------------------------

def test_phyllotaxis_index_published_values():
    # Richards 1951 (Phil. Trans. R. Soc. B 235): P.I. = 0.379 − 2.3925·log10(log10 R), the
    # constant being 1 / (2 log10 φ)
    assert pla.PI_SLOPE == pytest.approx(2.3925, abs=1e-4)
    # R = 1.20451 is the orthogonal (3, 5) case and R = 1.07296 the (5, 8) case: a cylindrical
    # lattice of rise h maps conformally to the plane with r = exp(2π v), so R = exp(2π h); with
    # the Van Iterson (1907) orthogonal rises h = 0.029615 and 0.011208 (checked in
    # test_phyllotaxis_parastichy) this gives the two ratios
    assert math.exp(2 * math.pi * 0.029615) == pytest.approx(1.20451, abs=2e-5)
    # note: exp(2π·0.011208) = 1.07292, 4e-5 below the quoted 1.07296 (rounding of h)
    assert math.exp(2 * math.pi * 0.011208) == pytest.approx(1.07296, abs=6e-5)
    # P.I. ≈ 3.0 and ≈ 4.0 (computed: 2.990 and 4.002 — the index is only near-integer)
    assert phyllotaxis_index(1.20451) == pytest.approx(3.0, abs=0.02)
    assert phyllotaxis_index(1.07296) == pytest.approx(4.0, abs=0.02)
    assert phyllotaxis_index(1.0) is None and phyllotaxis_index(0.9) is None


def test_growth_plastochron_is_ln_ratio_over_rate():
    # Richards 1951: with r(t) = r0·exp(k t), T = ln R / k
    for T, k in [(4.0, 0.03), (9.0, 0.012)]:
        p, t = make_tables(n=14, T=T, k=k)
        s = analyse_phyllotaxis(p, t, FAST).summary
        assert s["radial_growth_rate_per_h"] == pytest.approx(k)
        assert s["plastochron_ratio"] == pytest.approx(math.exp(k * T))
        assert s["plastochron_growth_h"] == pytest.approx(T)
        assert s["plastochron_agreement"] == pytest.approx(1.0)


def test_inward_drift_is_reported_not_crashed():
    p, t = make_tables(n=8, k=-0.02)
    s = analyse_phyllotaxis(p, t, FAST).summary
    assert s["plastochron_growth_h"] is None and "drift outward" in s["reasons"]["plastochron_growth_h"]
    assert s["phyllotaxis_index"] is None


# --- pattern modes ---------------------------------------------------------------------------

def _noisy(angles, sd=4.0, seed=0):
    return np.asarray(angles) + np.random.default_rng(seed).normal(0, sd, len(angles))


def test_mode_distichous():
    # alternate leaves 180° apart (common practice, no source)
    ang = _noisy(10 + 180.0 * np.arange(12))
    s = analyse_phyllotaxis(*make_tables(angles=ang), FAST).summary
    assert s["mode"] == "distichous"
    assert s["mode_evidence"]["n_fit"] == s["mode_evidence"]["n_angles"] == 11
    assert s["permutations"] is None and "pattern mode is distichous" in s["reasons"]["permutations"]


def test_mode_decussate():
    # opposite pairs, successive pairs at right angles (common practice, no source)
    ang = _noisy([(90.0 * j + 180.0 * i) for j in range(7) for i in range(2)])
    s = analyse_phyllotaxis(*make_tables(angles=ang, node_size=2), FAST).summary
    assert s["mode"] == "decussate" and s["organs_per_node"] == 2
    assert abs(((s["node_rotation_deg"] - 90.0 + 90) % 180) - 90) < 10


def test_mode_decussate_without_co_initiation_flags():
    ang = _noisy([(90.0 * j + 180.0 * i) for j in range(7) for i in range(2)], seed=3)
    p, t = make_tables(angles=ang)
    assert analyse_phyllotaxis(p, t, FAST).summary["mode"] == "decussate"


def test_mode_trimerous_whorl():
    # whorls of three organs 120° apart, successive whorls offset by 60° (common practice)
    ang = _noisy([(60.0 * j + 120.0 * i) for j in range(6) for i in range(3)], seed=1)
    s = analyse_phyllotaxis(*make_tables(angles=ang, node_size=3), FAST).summary
    assert s["mode"] == "whorled" and s["organs_per_node"] == 3


def test_mode_bijugate():
    # pairs 180° apart, successive pairs turned by half the golden angle (68.75°)
    ang = _noisy([(GOLDEN / 2 * j + 180.0 * i) for j in range(8) for i in range(2)], sd=3.0, seed=2)
    s = analyse_phyllotaxis(*make_tables(angles=ang, node_size=2), FAST).summary
    assert s["mode"] == "multijugate" and s["organs_per_node"] == 2
    assert s["node_rotation_deg"] == pytest.approx(GOLDEN / 2, abs=5)


def test_mode_lucas_spiral_and_its_parastichies():
    # Lucas <1,3> spiral: limit angle 360/(3 + 1/φ) = 99.50°. The plastochron ratio is chosen
    # from the Van Iterson orthogonality of the (4, 7) pair: h² = −δ4·δ7/28, R = exp(2π h)
    d = 360 / (3 + 1 / PHI) / 360
    delta = lambda m: m * d - round(m * d)
    h = math.sqrt(-delta(4) * delta(7) / 28)
    T = 6.0
    k = 2 * math.pi * h / T
    ang = _noisy(99.50155 * np.arange(24), sd=2.0, seed=5)
    s = analyse_phyllotaxis(*make_tables(angles=ang, T=T, k=k, extra_frames=1), FAST).summary
    assert s["mode"] == "spiral"
    assert s["divergence_mean_deg"] == pytest.approx(99.5, abs=2)
    assert s["parastichy_pair"] == [4, 7]
    assert s["parastichy_class"] == "Lucas <1,3>"
    assert s["limit_angle_deg"] == pytest.approx(99.50, abs=0.005)
    # angles far from the expected golden angle: noted
    assert any("far from the expected angle" in x for x in s["notes"])


def test_parastichies_table_from_golden_apex():
    p, t = make_tables(n=20)
    res = analyse_phyllotaxis(p, t, FAST)
    s = res.summary
    # exp(k T) = exp(0.24): rise h = 0.24 / 2π = 0.0382, between the orthogonal (3,5) and
    # (2,3) rises (0.0296, 0.0758), closest to the (3,5) one
    assert s["parastichy_pair"] == [3, 5] and s["parastichy_class"] == "Fibonacci"
    par = res.parastichies
    assert set(par["family"]) == {"m", "n"}
    assert len(par) == 2 * 20
    for num in (3, 5):
        sub = par[par["parastichy_number"] == num]
        assert sorted(sub["spiral_index"].unique()) == list(range(num))
    assert set(s["parastichy_winding"].values()) == {"ccw", "cw"}


# --- invariance properties ------------------------------------------------------------------

spiral_params = dict(
    n=st.integers(4, 14), alpha=st.floats(60.0, 165.0), theta0=st.floats(0.0, 359.0),
    noise=st.floats(0.0, 4.0), seed=st.integers(0, 1000))


@hsettings(max_examples=25, deadline=None)
@given(shift=st.floats(-720.0, 720.0), **spiral_params)
def test_rotation_leaves_divergence_unchanged(shift, n, alpha, theta0, noise, seed):
    p, t = make_tables(n=n, alpha=alpha, theta0=theta0, angle_noise=noise, seed=seed)
    a = analyse_phyllotaxis(p, t, Settings(bootstrap_n=0))
    p2, t2 = p.copy(), t.copy()
    p2["theta_deg"] = (p2["theta_deg"] + shift) % 360
    t2["theta_deg"] = (t2["theta_deg"] + shift) % 360
    b = analyse_phyllotaxis(p2, t2, Settings(bootstrap_n=0))
    diff = (b.divergence["angle_deg"] - a.divergence["angle_deg"] + 180) % 360 - 180
    assert np.all(np.abs(diff) < 1e-6)
    assert a.summary["chirality"] == b.summary["chirality"]


@hsettings(max_examples=25, deadline=None)
@given(**spiral_params)
def test_mirroring_flips_chirality_keeps_angles(n, alpha, theta0, noise, seed):
    p, t = make_tables(n=n, alpha=alpha, theta0=theta0, angle_noise=noise, seed=seed)
    a = analyse_phyllotaxis(p, t, Settings(bootstrap_n=0))
    p2, t2 = p.copy(), t.copy()
    p2["theta_deg"] = (-p2["theta_deg"]) % 360
    t2["theta_deg"] = (-t2["theta_deg"]) % 360
    b = analyse_phyllotaxis(p2, t2, Settings(bootstrap_n=0))
    assert {a.summary["chirality"], b.summary["chirality"]} == {"ccw", "cw"}
    assert a.summary["chirality_support"] == b.summary["chirality_support"]
    diff = (b.divergence["angle_deg"] - a.divergence["angle_deg"] + 180) % 360 - 180
    assert np.all(np.abs(diff) < 1e-6)


@hsettings(max_examples=20, deadline=None)
@given(scale=st.floats(0.05, 20.0), T=st.floats(2.0, 12.0), n=st.integers(3, 12))
def test_time_scaling_scales_plastochron(scale, T, n):
    p, t = make_tables(n=n, T=T, k=0.03)
    a = analyse_phyllotaxis(p, t, Settings(bootstrap_n=50)).summary
    p2, t2 = p.copy(), t.copy()
    p2["emergence_time_h"] *= scale
    t2["time_h"] *= scale
    b = analyse_phyllotaxis(p2, t2, Settings(bootstrap_n=50)).summary
    assert b["plastochron_h"] == pytest.approx(scale * a["plastochron_h"], rel=1e-9)
    assert b["plastochron_growth_h"] == pytest.approx(scale * a["plastochron_growth_h"], rel=1e-9)
    assert b["radial_growth_rate_per_h"] == pytest.approx(a["radial_growth_rate_per_h"] / scale, rel=1e-9)
    assert b["plastochron_ratio"] == pytest.approx(a["plastochron_ratio"], rel=1e-12)
    assert b["divergence_mean_deg"] == pytest.approx(a["divergence_mean_deg"], abs=1e-9)


def test_tables_round_trip(tmp_path):
    # every written table reads back to the same values (project convention)
    from apextrack.tables import read_table, write_table

    p, t = make_tables(n=15, angle_noise=3.0, seed=9)
    res = analyse_phyllotaxis(p, t, FAST)
    assert len(res.parastichies) > 0
    for name, df in (("divergence", res.divergence), ("parastichies", res.parastichies)):
        write_table(df, tmp_path / f"{name}.csv", name)
        back = read_table(tmp_path / f"{name}.csv", name)
        pd.testing.assert_frame_equal(back, df[list(back.columns)].reset_index(drop=True), check_dtype=False)


def test_mode_needs_evidence():
    from apextrack.phyllotaxis.mode import classify_mode

    # uniformly scattered angles fit no mode: "irregular", with the evidence
    rng = np.random.default_rng(12)
    out = classify_mode(rng.uniform(0, 360, 30))
    assert out["mode"] == "irregular" and out["evidence"]["fraction"] < 0.5
    # four angles cannot show a whorl of three (two full cycles = 6 angles are needed)
    out = classify_mode([91.7, 212.3, 228.9, 78.1], [False, False, True, False])
    assert out["mode"] != "whorled"
    assert all(c["organs_per_node"] <= 2 for c in out["evidence"]["candidates"])
    # fewer than 3 angles: no mode, with the reason
    out = classify_mode([137.5, 137.5])
    assert out["mode"] is None and "at least 3" in out["reason"]
