"""The inhibitory-field model: steady patterns, branches, sweep, named patterns, fit."""

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.errors import OutputError, SettingsError
from apextrack.model import (GOLDEN_ANGLE_DEG, LUCAS_ANGLE_DEG, ModelParams, bifurcation_figure,
                             branch_jumps, classify, divergence_angles, fit_model, limit_angle_deg,
                             run_simulation, simulate, simulate_pattern, steady_state, sweep)
from apextrack.model.patterns import perturb_order
from apextrack.model.simulate import contact_parastichies, plastochron_ratio_of, spiral_initial
from apextrack.tables import read_json, read_table

R = 22.0


def _fib_params(ratio, **kw):
    # start distichous (large range) and shrink the range slowly (Douady & Couder 1996 reach the
    # Fibonacci spirals this way); a tiny angle noise breaks the mirror symmetry
    return ModelParams(inhibition_range_um=ratio * R, start_range_um=4 * R, ramp_primordia=60,
                       angle_noise_deg=0.01, **kw)


def test_limit_angles():
    # limit angle of the sequence 1, t, t+1, 2t+1, … is 360/(t + 1/φ): t = 2 golden 137.5078°,
    # t = 3 Lucas 99.50°, t = 4 77.96° (DESIGN.md published facts; Jean 1994, Phyllotaxis,
    # recalled from memory)
    assert limit_angle_deg(2) == pytest.approx(GOLDEN_ANGLE_DEG, abs=1e-9)
    assert LUCAS_ANGLE_DEG == pytest.approx(99.5016, abs=1e-3)
    assert limit_angle_deg(4) == pytest.approx(77.955, abs=1e-3)


@pytest.mark.parametrize("kernel", ["power", "exp"])
def test_fibonacci_setting_settles_to_the_golden_angle(kernel):
    # Douady & Couder 1996 (J. Theor. Biol. 178): in the Fibonacci range the steady divergence
    # is the golden angle 137.5°; steady state as in Refahi et al. 2016 (eLife 5:e14093): the
    # last 50 angles all within 5° of their mean
    sim = simulate(250, _fib_params(0.8, kernel=kernel), "one", seed=0)
    ang = divergence_angles(sim.history)
    steady, mean, dev = steady_state(ang, n_last=50, tol_deg=5.0)
    assert steady and dev <= 5.0
    assert abs(mean - GOLDEN_ANGLE_DEG) < 1.0
    assert not sim.history["co_initiated"].iloc[-60:].any()
    # its contact parastichies are two successive Fibonacci numbers (Douady & Couder 1996)
    m, n = contact_parastichies(sim.history, sim.params)
    assert (m, n) in [(2, 3), (3, 5), (5, 8), (8, 13)]


def test_large_inhibition_range_gives_distichous():
    # Douady & Couder 1992 (Phys. Rev. Lett. 68): when the inhibition range is large relative to
    # the apex the new primordium forms opposite the last one: 180°
    sim = simulate(120, ModelParams(inhibition_range_um=3.5 * R), "one")
    c = classify(sim.history)
    assert c["pattern"] == "distichous" and c["jugacy"] == 1
    assert abs(c["angle_deg"] - 180.0) < 0.5


def test_two_opposite_initial_primordia_give_decussate():
    # decussate: opposite pairs alternating at right angles (common practice, no source);
    # reached from two opposite primordia (Douady & Couder 1996, part II: whorled modes)
    sim = simulate(120, ModelParams(inhibition_range_um=2.0 * R), "two")
    c = classify(sim.history)
    assert c["pattern"] == "decussate" and c["jugacy"] == 2
    assert abs(c["angle_deg"] - 90.0) < 1.0
    h = sim.history.iloc[-40:]
    for _, g in h.groupby("birth_time_h"):
        if len(g) == 2:
            d = abs((g["theta_deg"].iloc[1] - g["theta_deg"].iloc[0] + 180) % 360 - 180)
            assert d == pytest.approx(180.0, abs=1.0)
    assert h["co_initiated"].all()


def test_three_initial_primordia_give_alternating_trimerous_whorls():
    # alternating whorls of three: successive whorls turned by 60° (common practice, no source)
    sim = simulate(150, ModelParams(inhibition_range_um=1.0 * R), "three")
    c = classify(sim.history)
    assert c["pattern"] == "whorled" and c["jugacy"] == 3
    assert abs(c["angle_deg"] - 60.0) < 1.0


def test_lucas_branch_from_a_seeded_initial_condition():
    # the <1,3> branch settles near 360/(3 + 1/φ) = 99.50° (Douady & Couder 1996; DESIGN.md),
    # reached from an initial spiral of that angle; its contact parastichies are successive
    # Lucas numbers 1, 3, 4, 7, 11, 18
    p = ModelParams(inhibition_range_um=0.5 * R)
    given = spiral_initial(12, LUCAS_ANGLE_DEG, p, plastochron_ratio=1.062)
    sim = simulate(250, p, "given", given=given)
    ang = divergence_angles(sim.history)
    steady, mean, dev = steady_state(ang, 50, 5.0)
    assert steady
    assert abs(mean - LUCAS_ANGLE_DEG) < 1.0
    assert contact_parastichies(sim.history, p) in [(4, 7), (7, 11), (11, 18)]


def test_plastochron_ratio_and_time_scale():
    # Richards 1951 (Phil. Trans. R. Soc. B 235): with r = R·exp(γt) the plastochron is
    # T = ln(ratio)/γ; the pattern depends on ℓ/R only, so doubling γ halves the plastochron and
    # leaves the angles unchanged
    p1 = _fib_params(0.8)
    p2 = _fib_params(0.8, growth_rate_per_h=2 * p1.growth_rate_per_h)
    s1, s2 = simulate(200, p1, "one"), simulate(200, p2, "one")
    t1 = np.diff(np.unique(s1.history["birth_time_h"]))[-50:].mean()
    t2 = np.diff(np.unique(s2.history["birth_time_h"]))[-50:].mean()
    assert t2 == pytest.approx(t1 / 2, rel=1e-6)
    q = plastochron_ratio_of(s1.history, p1)
    assert math.log(q) / p1.growth_rate_per_h == pytest.approx(t1, rel=1e-9)
    assert np.allclose(divergence_angles(s1.history)[-50:], divergence_angles(s2.history)[-50:], atol=1e-3)
    # Arabidopsis-like: ratio in the reported 1.08–1.15 (Refahi et al. 2016)
    assert 1.08 <= q <= 1.18


def test_same_seed_same_history_noise_changes_it():
    p = _fib_params(0.8, threshold_noise=0.05)
    a = simulate(120, p, "one", seed=4).history
    b = simulate(120, p, "one", seed=4).history
    c = simulate(120, p, "one", seed=5).history
    pd.testing.assert_frame_equal(a, b)
    assert not np.allclose(a["theta_deg"], c["theta_deg"])


def test_bad_model_parameters_are_refused():
    with pytest.raises(SettingsError):
        ModelParams(inhibition_range_um=-1.0)
    with pytest.raises(SettingsError):
        ModelParams.from_dict({"inhibition_range": 3.0})
    with pytest.raises(SettingsError):
        ModelParams(kernel="gauss")
    with pytest.raises(SettingsError):
        simulate(10, None, "four")
    with pytest.raises(SettingsError):
        simulate_pattern("spiralish")
    with pytest.raises(SettingsError):
        simulate_pattern("spiral", {"no_such": 1})


def test_sweep_only_the_fibonacci_branch_is_continuous(tmp_path):
    # Douady & Couder 1996: from the distichous state the angle falls continuously to the golden
    # angle (the Fibonacci branch); the Lucas branch exists only on a piece of the range and is
    # not connected to it
    # the branch leaves 180° with a square-root onset near ℓ/R ≈ 3, so the grid is dense there
    ratios = np.array([4.0, 3.4, 3.05, 3.0, 2.975, 2.95, 2.9, 2.8, 2.7, 2.55, 2.4, 2.25, 2.1, 1.9,
                       1.4, 1.0, 0.7, 0.5, 0.35])
    tab = sweep(ratios, branches=("fibonacci", "lucas"), n_primordia=200)
    fib = tab[tab["branch"] == "fibonacci"].sort_values("range_ratio", ascending=False)
    assert fib["steady"].all()
    assert fib["angle_deg"].iloc[0] == pytest.approx(180.0, abs=0.5)
    small = fib[fib["range_ratio"] <= 1.0]
    assert (np.abs(small["angle_deg"] - GOLDEN_ANGLE_DEG) < 3.0).all()
    jumps = branch_jumps(tab, "fibonacci")
    assert np.nanmax(jumps) < 8.0  # no jump on this grid: a continuous branch
    luc = tab[tab["branch"] == "lucas"].sort_values("range_ratio", ascending=False)
    on_lucas = np.abs(luc["angle_deg"].to_numpy() - LUCAS_ANGLE_DEG) < 3.0
    assert on_lucas[luc["range_ratio"].to_numpy() <= 0.5].all()
    assert not on_lucas[luc["range_ratio"].to_numpy() >= 1.9].any()
    assert np.nanmax(branch_jumps(tab, "lucas")) > 25.0  # the seeded branch breaks off
    fig = bifurcation_figure(tab, tmp_path / "bif.png")
    assert (tmp_path / "bif.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    ax = fig.axes[0]
    labels = [l.get_label() for l in ax.get_lines()]
    assert any("Fibonacci" in s for s in labels) and any("1,3" in s for s in labels)


def test_permutation_of_birth_order_gives_two_alpha_minus_alpha():
    # Refahi et al. 2016 (eLife 5:e14093): a permutation of two successive organs turns
    # α, α, α into 2α, −α, 2α
    a = GOLDEN_ANGLE_DEG
    h = pd.DataFrame({"birth_rank": np.arange(1, 41), "primordium": np.arange(1, 41),
                      "birth_time_h": 6.0 * np.arange(40), "theta_deg": np.mod(a * np.arange(40), 360),
                      "co_initiated": False, "group": np.arange(40)})
    out = perturb_order(h, 0.2, 0.0, np.random.default_rng(2))
    d = divergence_angles(out, "ccw")
    perm = out["permuted"].to_numpy()
    assert 2 <= perm.sum() <= 20
    starts = [i for i in range(len(perm) - 1) if perm[i] and perm[i + 1] and (i == 0 or not perm[i - 1])]
    for i in starts:
        if 1 <= i and i + 2 < len(perm) and not perm[i + 2] and not perm[i - 1]:
            assert d[i - 1] == pytest.approx(2 * a) and d[i] == pytest.approx(360 - a)
            assert d[i + 1] == pytest.approx(2 * a)


def test_simulate_pattern_gives_analysis_schema_and_expected_angles():
    res = simulate_pattern("spiral", seed=0)
    for col in ("birth_rank", "track_id", "emergence_time_h", "emergence_frame", "x_um", "y_um",
                "r_um", "theta_deg", "co_initiated"):
        assert col in res.primordia.columns
    for col in ("from_rank", "to_rank", "angle_deg", "interval_h"):
        assert col in res.divergence.columns
    s = res.summary
    assert s["source"] == "simulation" and s["chirality"] == "ccw"
    assert abs(s["divergence_mean_deg"] - GOLDEN_ANGLE_DEG) < 1.0
    assert 1.08 <= s["plastochron_ratio"] <= 1.18
    # positions at emergence lie on the apex rim or outside it, about the origin
    assert (np.hypot(res.primordia["x_um"], res.primordia["y_um"]) >= R - 1e-9).all()
    th = np.mod(np.degrees(np.arctan2(-res.primordia["y_um"], res.primordia["x_um"])), 360)
    assert np.allclose(np.mod(th - res.primordia["theta_deg"] + 180, 360) - 180, 0, atol=1e-9)
    dis = simulate_pattern("distichous").summary
    assert dis["divergence_mean_deg"] == pytest.approx(180.0, abs=0.5)
    dec = simulate_pattern("decussate")
    assert dec.primordia["co_initiated"].all()
    assert abs(classify(dec.simulation.history)["angle_deg"] - 90.0) < 1.0
    cw = simulate_pattern("spiral", {"chirality": "cw"}).summary
    assert cw["chirality"] == "cw" and abs(cw["divergence_mean_deg"] - GOLDEN_ANGLE_DEG) < 1.0


def test_run_simulation_writes_a_result_folder_and_renders_it(tmp_path):
    out = tmp_path / "sim"
    res = run_simulation("spiral", out, params={"record_primordia": 10, "interval_h": 6.0}, render=True, seed=1)
    prim = read_table(out / "primordia.csv", "primordia")
    div = read_table(out / "divergence.csv", "divergence")
    summ = read_json(out / "summary.json")
    assert len(prim) == len(res.primordia) and len(div) == len(prim) - 1
    assert np.array_equal(prim["theta_deg"].to_numpy(), res.primordia["theta_deg"].to_numpy())
    assert summ["pattern"] == "spiral" and summ["model"]["seed"] == 1
    assert (out / "stack.tif").exists() and (out / "stack_truth.csv").exists()
    # history → truth → render: the rendered truth carries the simulated azimuths and births
    truth_p = read_table(out / "stack_primordia.csv", "primordia")
    sim_th = np.sort(np.mod(res.history["theta_deg"].to_numpy(), 360))
    assert set(np.round(truth_p["theta_deg"], 6)) <= set(np.round(sim_th, 6))
    assert read_json(out / "run.json")["render"] is True
    with pytest.raises(OutputError):
        run_simulation("spiral", out)


def test_fit_recovers_the_range_and_growth_rate_of_a_simulation():
    true = simulate_pattern("spiral", {"range_ratio": 0.7}, seed=0)
    fit = fit_model(true.summary, range_ratios=[1.0, 0.85, 0.7, 0.6, 0.5], n_primordia=200)
    assert fit.range_ratio == pytest.approx(0.7)
    assert fit.misfit < 0.5
    assert fit.params.growth_rate_per_h == pytest.approx(true.params.growth_rate_per_h, rel=0.03)
    assert len(fit.table) == 5 and fit.table["misfit"].min() == pytest.approx(fit.misfit)


def test_parameter_file_is_read_and_checked(tmp_path):
    from apextrack.model import load_params

    f = tmp_path / "p.toml"
    f.write_text("[model]\nrange_ratio = 0.7\nrecord_primordia = 20\n", encoding="utf-8")
    params = load_params(f)
    assert params == {"range_ratio": 0.7, "record_primordia": 20}
    res = simulate_pattern("spiral", params)
    assert res.params.inhibition_range_um == pytest.approx(0.7 * res.params.apex_radius_um)
    bad = tmp_path / "bad.toml"
    bad.write_text("range_ratio = = 1\n", encoding="utf-8")
    with pytest.raises(SettingsError):
        load_params(bad)
    with pytest.raises(SettingsError):
        load_params(tmp_path / "missing.toml")
