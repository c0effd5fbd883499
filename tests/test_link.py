"""Linking: motion fit, growth-aware prediction, memory, jump splitting, quality columns.

The point sets here follow the growth law of primordia r(t) = R·exp(γ(t − τ)) at a fixed
azimuth (Richards 1951, Phil. Trans. R. Soc. B 235; Douady & Couder 1992, Phys. Rev. Lett. 68)
inside an image that drifts and turns; the tests check that the linking recovers the
identities that generated them and that the fitted motion recovers the generating parameters.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.link import (QUALITY_COLUMNS, fit_motion, link_detections, link_tracks, split_jumps,
                            step_residuals)

GOLDEN = 360.0 * (2.0 - (1.0 + math.sqrt(5.0)) / 2.0)


def spiral_points(n_frames=10, interval_h=3.0, plastochron_h=6.0, rim_um=22.0, gamma=math.log(1.12) / 6.0,
                  rotation_deg_per_frame=0.0, drift_um_per_frame=(0.0, 0.0), centre=(60.0, 60.0),
                  noise_um=0.0, n_before=5, r_max_um=60.0, seed=0, births=None):
    """Detections of a golden-angle spiral (true identity in ``true_id``), image coordinates."""
    rng = np.random.default_rng(seed)
    if births is None:
        births = [(k * plastochron_h, (k * GOLDEN) % 360.0) for k in range(-n_before, 50)]
    rows = []
    for f in range(n_frames):
        t = f * interval_h
        phi = math.radians(f * rotation_deg_per_frame)
        cx = centre[0] + f * drift_um_per_frame[0]
        cy = centre[1] + f * drift_um_per_frame[1]
        for pid, (tau, theta) in enumerate(births):
            if tau > t:
                continue
            r = rim_um * math.exp(gamma * (t - tau))
            if r > r_max_um:
                continue
            th = math.radians(theta) + phi
            x = cx + r * math.cos(th) + rng.normal(0, noise_um)
            y = cy - r * math.sin(th) + rng.normal(0, noise_um)
            rows.append((f, t, x, y, 4.0 * r / rim_um, 20.0, pid))
    return pd.DataFrame(rows, columns=["frame", "time_h", "x_um", "y_um", "radius_um", "snr", "true_id"])


def identity_errors(tracks: pd.DataFrame) -> int:
    """Number of links joining two different true primordia plus true links cut."""
    tr = tracks.sort_values(["track_id", "frame"])
    wrong = int(((tr["track_id"].diff() == 0) & (tr["true_id"].diff() != 0)).sum())
    tt = tracks.sort_values(["true_id", "frame"])
    cut = int(((tt["true_id"].diff() == 0) & (tt["track_id"].diff() != 0)).sum())
    return wrong + cut


def test_fit_motion_recovers_growth_rotation_and_centre():
    # generating values: γ = ln(1.12)/6 h (plastochron ratio 1.12, Richards 1951 r = r0·exp(kt)),
    # 2° per 3-h frame of rotation, drift (0.4, −0.3) µm per frame, 0.15 µm position noise
    gamma = math.log(1.12) / 6.0
    det = spiral_points(rotation_deg_per_frame=2.0, drift_um_per_frame=(0.4, -0.3), noise_um=0.15)
    det = det.rename(columns={"true_id": "track_id"})
    m = fit_motion(det)
    assert m is not None
    assert m.gamma_per_h == pytest.approx(gamma, rel=0.03)
    # rotation counter-clockwise on the display turns +x towards −y: ω < 0 in image coordinates
    assert math.degrees(-m.omega_rad_per_h) * 3.0 == pytest.approx(2.0, abs=0.1)
    true_c = np.array([60.0 + 0.4 * f + 1j * (60.0 - 0.3 * f) for f in range(10)])
    assert np.max(np.abs(m.frame_centres - true_c)) < 0.5
    assert m.n_new >= 3
    assert m.rim_radius_um == pytest.approx(22.0 * math.exp(gamma * 1.5), rel=0.05)


def test_fit_motion_needs_three_tracks():
    det = spiral_points().rename(columns={"true_id": "track_id"})
    assert fit_motion(det[det["track_id"] < 2]) is None


def test_growth_aware_linking_survives_fast_rotation_where_nearest_neighbour_fails():
    # 15° per frame: a primordium at r = 45 µm moves ≈ 11.8 µm sideways per frame, about the
    # spacing of neighbours; predicting the rotation keeps the identities
    det = spiral_points(rotation_deg_per_frame=15.0, drift_um_per_frame=(0.5, 0.3), noise_um=0.1,
                        n_frames=8)
    plain = link_detections(det, 12.0, 2)
    tracks, info = link_tracks(det, 12.0, 2)
    assert "growth-aware" in info["method"]
    assert identity_errors(tracks) == 0
    assert identity_errors(plain) > 0


def test_new_primordium_next_to_an_older_one():
    # a primordium is born 3 µm from where an older one was in the previous frame (same
    # azimuth ±8°, born one plastochron later): nearest neighbour may take the newborn for the
    # older one; predicting the older one's outward drift keeps them apart
    gamma = math.log(1.5) / 6.0
    births = [(-24.0, 10.0), (-18.0, 150.0), (-12.0, 290.0), (-6.0, 70.0), (0.5, 210.0), (5.0, 78.0),
              (12.0, 330.0), (18.0, 120.0)]
    det = spiral_points(births=births, gamma=gamma, n_frames=8, noise_um=0.05, r_max_um=80.0)
    tracks, info = link_tracks(det, 10.0, 1)
    assert identity_errors(tracks) == 0


def test_memory_bridges_a_missed_frame():
    det = spiral_points(noise_um=0.05)
    det = det[~((det["frame"] == 4) & (det["true_id"] == 3))]
    tracks, _ = link_tracks(det, 12.0, 2)
    ids = tracks.loc[tracks["true_id"] == 3, "track_id"].unique()
    assert len(ids) == 1
    assert int(tracks.loc[tracks["true_id"] == 3, "track_gaps"].iloc[0]) == 1


def test_jump_is_split_and_marked():
    det = spiral_points(noise_um=0.05).rename(columns={"true_id": "track_id"})
    tr = det.copy()
    jump = (tr["track_id"] == 6) & (tr["frame"] >= 6)
    tr.loc[jump, "x_um"] += 8.0
    m = fit_motion(det)
    res = step_residuals(tr, m)
    assert np.nanmax(res) > 7.0
    out, n_cut = split_jumps(tr, m, 4.0)
    assert n_cut == 1
    assert out["track_id"].nunique() == det["track_id"].nunique() + 1
    assert out.loc[out["_split"], "frame"].nunique() > 1


def test_quality_columns_mark_short_tracks_without_dropping_them():
    det = spiral_points(noise_um=0.05)
    spur = pd.DataFrame({"frame": [5], "time_h": [15.0], "x_um": [5.0], "y_um": [5.0], "radius_um": [3.0],
                         "snr": [5.0], "true_id": [-1]})
    det = pd.concat([det, spur], ignore_index=True)
    tracks, info = link_tracks(det, 12.0, 2, min_track_frames=2)
    assert len(tracks) == len(det)  # nothing dropped
    for c in QUALITY_COLUMNS:
        assert c in tracks
    row = tracks[tracks["true_id"] == -1].iloc[0]
    assert "short" in row["track_flags"]
    assert row["track_n_frames"] == 1
    assert row["track_mean_snr"] == pytest.approx(5.0)


def test_fallback_to_nearest_neighbour_with_too_few_tracks():
    det = spiral_points(n_before=0, n_frames=4)
    det = det[det["true_id"] <= 1]
    tracks, info = link_tracks(det, 12.0, 2)
    assert info["method"] == "nearest neighbour"
    assert identity_errors(tracks) == 0


def test_same_input_same_ids():
    det = spiral_points(rotation_deg_per_frame=3.0, noise_um=0.2)
    a, _ = link_tracks(det, 12.0, 2)
    b, _ = link_tracks(det.sample(frac=1.0, random_state=1), 12.0, 2)
    pd.testing.assert_frame_equal(a[["frame", "x_um", "track_id"]].sort_values(["frame", "x_um"]).reset_index(drop=True),
                                  b[["frame", "x_um", "track_id"]].sort_values(["frame", "x_um"]).reset_index(drop=True))


# ----------------------------------------------------------------------------- fast solvers
# The motion fit solves its linear sub-problem with a banded Schur complement and its rim fit
# with an analytic sparse Jacobian; both are checked against general-purpose references.


def _design_lstsq(t, z, fidx, tid, n_f, n, t_ref, lam, smooth):
    """Reference: dense complex least squares of the whole design matrix (numpy.linalg.lstsq)."""
    a = np.zeros((len(t), n_f + n), complex)
    a[np.arange(len(t)), fidx] = 1.0
    a[np.arange(len(t)), n_f + tid] = np.exp(lam * (t - t_ref))
    rhs = z
    if smooth > 0 and n_f > 2:
        d = np.diff(np.eye(n_f), 2, axis=0) * smooth
        a = np.vstack([a, np.hstack([d, np.zeros((n_f - 2, n))])])
        rhs = np.concatenate([z, np.zeros(n_f - 2)])
    coef = np.linalg.lstsq(a, rhs, rcond=None)[0]
    return coef, float(np.sum(np.abs(rhs - a @ coef) ** 2))


@pytest.mark.parametrize("n_frames", [3, 4, 12])
def test_profiled_solver_matches_dense_least_squares(n_frames):
    # reference: numpy.linalg.lstsq on the full design matrix (one column per frame centre
    # and per track offset, plus the second-difference rows of the centre prior)
    from apextrack.link import _ProfiledSolver

    det = spiral_points(n_frames=n_frames, rotation_deg_per_frame=2.0, drift_um_per_frame=(0.4, -0.3),
                        noise_um=0.2, seed=3)
    fidx = det["frame"].to_numpy()
    tid = pd.factorize(det["true_id"], sort=True)[0]
    n = int(tid.max()) + 1
    t = det["time_h"].to_numpy(float)
    z = det["x_um"].to_numpy(float) + 1j * det["y_um"].to_numpy(float)
    t_ref = float(t.mean())
    solver = _ProfiledSolver(t, z, fidx, tid, n_frames, n, t_ref, 0.2)
    for lam in (0.019 + 0.0j, 0.05 - 0.01j):
        coef, sse = solver(lam.real, lam.imag)
        ref, ref_sse = _design_lstsq(t, z, fidx, tid, n_frames, n, t_ref, lam, 0.2)
        assert sse == pytest.approx(ref_sse, rel=1e-9, abs=1e-9)
        np.testing.assert_allclose(coef, ref, atol=1e-5)


def test_rim_jacobian_matches_numerical_derivative():
    # reference: scipy.differentiate.jacobian (adaptive finite differences)
    from scipy.differentiate import jacobian

    from apextrack.link import _rim_problem

    rng = np.random.default_rng(0)
    n_f, n, nd = 6, 5, 24
    fidx, tid = rng.integers(0, n_f, nd), rng.integers(0, n, nd)
    tau = (fidx - 2.5) * 3.0
    z = (rng.normal(size=nd) + 1j * rng.normal(size=nd)) * 20.0
    zn, fn = z[:3] + 1.0, fidx[:3]
    pa, pb = np.array([0, 1, 2, 3]), np.array([1, 2, 3, 4])
    resid, jac = _rim_problem(tau, z, fidx, tid, n_f, n, zn, fn, pa, pb, 0.1, 0.5)
    p = np.concatenate([[0.02, -0.01, 20.0], rng.normal(size=2 * n_f) + 50.0, rng.normal(size=2 * n) * 20.0, [2.3]])
    num = jacobian(lambda x: np.apply_along_axis(resid, 0, x), p).df
    ana = jac(p).toarray()
    assert ana.shape == num.shape
    np.testing.assert_allclose(ana, num, rtol=1e-6, atol=1e-6 * np.max(np.abs(num)))


def test_covariance_diagonal_matches_pseudo_inverse():
    # reference: numpy.linalg.pinv of JᵀJ
    from scipy import sparse

    from apextrack.link import _covariance_diagonal

    rng = np.random.default_rng(1)
    j = sparse.random(60, 15, density=0.3, random_state=rng, format="csr") + sparse.eye(60, 15)
    idx = np.array([2, 3, 7, 11])
    ref = np.diag(np.linalg.pinv((j.T @ j).toarray()))[idx]
    np.testing.assert_allclose(_covariance_diagonal(j, idx), ref, rtol=1e-9)


# ----------------------------------------------------------------------------- frame-to-frame linking


def _random_walkers(rng, n_frames=30, n_alive=12, step_um=1.5, p_miss=0.15, p_die=0.05,
                    field_um=100.0, velocity=(0.0, 0.0)):
    """Points that appear, walk, are missed at random and vanish; one row per detection."""
    rows, pos, nxt = [], {}, 0
    for f in range(n_frames):
        for k in [k for k in pos if rng.random() < p_die]:
            del pos[k]
        while len(pos) < n_alive:
            pos[nxt] = rng.uniform(0.0, field_um, 2)
            nxt += 1
        for k in pos:
            pos[k] = pos[k] + rng.normal(0.0, step_um, 2) + np.asarray(velocity)
            if rng.random() > p_miss:
                rows.append((f, 3.0 * f, pos[k][0], pos[k][1]))
    return pd.DataFrame(rows, columns=["frame", "time_h", "x_um", "y_um"])


def _partition(labels) -> set:
    labels = np.asarray(labels)
    return {frozenset(np.flatnonzero(labels == v).tolist()) for v in np.unique(labels)}


@pytest.mark.parametrize("seed", range(8))
def test_frame_linking_matches_trackpy(seed):
    # reference library: trackpy.link (Crocker & Grier 1996 criterion: least summed squared
    # displacement, a source left unlinked costing search_range²) on scenes small enough that
    # trackpy solves every subnetwork exactly; the tracks must be the same sets of detections
    import warnings

    trackpy = pytest.importorskip("trackpy")
    trackpy.quiet()
    rng = np.random.default_rng(seed)
    det = _random_walkers(rng, n_alive=int(rng.integers(4, 20)), step_um=float(rng.uniform(0.5, 3.0)),
                          p_miss=float(rng.uniform(0.0, 0.3)))
    if seed % 2:
        det = det[det["frame"] != 11].reset_index(drop=True)  # a frame without detections
    search, memory = float(rng.uniform(3.0, 10.0)), int(seed % 4)
    ours = link_detections(det, search, memory)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = trackpy.link(det, search_range=search, memory=memory, pos_columns=["y_um", "x_um"],
                           t_column="frame")
    # link_detections returns rows sorted by track; map back by position
    key = ["frame", "x_um", "y_um"]
    ours = det.merge(ours[key + ["track_id"]], on=key, how="left", validate="one_to_one")
    assert _partition(ours["track_id"]) == _partition(ref.sort_index()["particle"])


def test_frame_linking_with_prediction_matches_trackpy():
    # reference library: trackpy.link with a predictor (positions moved by a known velocity
    # from the frame each particle was last seen in); fast drift that plain linking gets wrong
    import warnings

    trackpy = pytest.importorskip("trackpy")
    trackpy.quiet()
    from apextrack.link import _link_frames

    v = np.array([6.0, -4.0])  # µm per frame, more than the spacing allows without prediction
    for seed in range(4):
        rng = np.random.default_rng(100 + seed)
        det = _random_walkers(rng, n_alive=15, step_um=0.7, p_miss=0.1, velocity=v, field_um=150.0)
        memory = seed % 3

        def ref_predict(t1, particles):
            return [np.asarray(p.pos) + (t1 - p.t) * v[::-1] for p in particles]  # (y, x)

        def our_predict(x, y, from_frames, to_frame):
            dt = to_frame - np.asarray(from_frames, float)
            return x + dt * v[0], y + dt * v[1]

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = trackpy.link(det, search_range=4.0, memory=memory, pos_columns=["y_um", "x_um"],
                               t_column="frame", predictor=ref_predict)
        ours = _link_frames(det["frame"].to_numpy(np.int64), det["x_um"].to_numpy(float),
                            det["y_um"].to_numpy(float), 4.0, memory, our_predict)
        assert _partition(ours) == _partition(ref.sort_index()["particle"])
        plain = _link_frames(det["frame"].to_numpy(np.int64), det["x_um"].to_numpy(float),
                             det["y_um"].to_numpy(float), 4.0, memory)
        assert _partition(plain) != _partition(ours)


def test_frame_linking_is_the_least_squares_assignment():
    # worked example of the criterion: two sources 0 and 1 (at x = 0 and 4), two destinations
    # (x = 3 and 7), search range 5. Greedy nearest-first links 1→3 (d = 1) and leaves 0
    # unlinked (7 is out of its reach): 1² + 5² = 26. The least-squares links 0→3, 1→7:
    # 3² + 3² = 18.
    from apextrack.link import _link_frames

    frame = np.array([0, 0, 1, 1])
    x = np.array([0.0, 4.0, 3.0, 7.0])
    lab = _link_frames(frame, x, np.zeros(4), 5.0, 0)
    assert lab[2] == lab[0] and lab[3] == lab[1]
    # memory: a detection missed for `memory` frames is still continued, one frame more is not
    frame = np.array([0, 3, 7])  # frames 1-2 missed (two), then 4-6 (three)
    lab = _link_frames(frame, np.array([0.0, 0.5, 1.0]), np.zeros(3), 2.0, 2)
    assert lab[0] == lab[1] and lab[2] != lab[1]
