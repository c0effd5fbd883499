"""Apex centre and dome tilt: paraboloid fit, tilt-corrected azimuths, pattern-regularity centre."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.apex import (azimuth_deg, choose_centres, centre_from_pattern, dome_height, fit_dome,
                            image_from_level, level_offsets)
from apextrack.model import make_synthetic_stack
from apextrack.model.render import Scene, dome_points
from apextrack.projection import surface_height

GOLDEN = 360.0 * (2 - (1 + math.sqrt(5)) / 2)  # 137.5077…°, common practice


def _wrap(a):
    return (np.asarray(a) + 180.0) % 360.0 - 180.0


def test_paraboloid_fit_recovers_an_exact_tilted_dome():
    # geometry of a tilted paraboloid of revolution, points made by the renderer's own placement
    scene = Scene(shape_zyx=(30, 100, 100), pixel_size_um=1.0, z_step_um=1.0, tilt_deg=15, tilt_direction_deg=70,
                  dome_curvature_um=40.0)
    r, th = np.meshgrid(np.linspace(0, 35, 15), np.arange(0, 360, 15))
    x, y, z = dome_points(scene, r.ravel(), th.ravel(), depth_um=0.0)
    d = fit_dome(x, y, z)
    sx, sy, sz = scene.summit_um
    assert d["tilt_deg"] == pytest.approx(15.0, abs=0.05)
    assert d["tilt_direction_deg"] == pytest.approx(70.0, abs=0.1)
    assert d["curvature_um"] == pytest.approx(40.0, rel=1e-3)
    assert (d["x_um"], d["y_um"], d["z_um"]) == pytest.approx((sx, sy, sz), abs=0.02)
    assert dome_height(x, y, d) == pytest.approx(z, abs=1e-3)


def test_tilt_found_and_corrected_angles_match_truth():
    s = make_synthetic_stack(n_frames=4, shape_zyx=(22, 96, 96), z_step_um=1.5, tilt_deg=15,
                             tilt_direction_deg=40, membrane=True, seed=1, drift_um_per_frame=(0, 0, 0))
    fits = []
    for t in range(4):
        hm = surface_height(s.data[t][:, 1].astype(np.float32), s.z_step_um, s.pixel_size_um)
        x, y, z = hm.points_px()
        fits.append(fit_dome(x * s.pixel_size_um, y * s.pixel_size_um, z, up=hm.up, robust_um=0.75))
    for d in fits:  # every single frame
        assert d["tilt_deg"] == pytest.approx(15.0, abs=2.0)
        assert abs(_wrap(d["tilt_direction_deg"] - 40.0)) < 8.0
    # the tilt is the specimen's: the median over frames steadies it (as the pipeline does)
    dome = dict(fits[-1], tilt_deg=float(np.median([d["tilt_deg"] for d in fits])),
                tilt_direction_deg=float(np.median([d["tilt_direction_deg"] for d in fits])))
    t = 3
    tr = s.truth[(s.truth.frame == t) & s.truth.visible].sort_values("birth_rank")
    # corrected: offsets from the apex centre (the true summit here: the centre estimates are
    # tested on their own), z from the fitted surface, projected onto the plane ⟂ the fitted axis
    cx, cy = s.centre_um.x_um[t], s.centre_um.y_um[t]
    zz = dome_height(tr.x_um, tr.y_um, dome)
    zc = dome_height(cx, cy, dome)
    u, v = level_offsets(tr.x_um - cx, tr.y_um - cy, zz - zc,
                         dome["tilt_deg"], dome["tilt_direction_deg"], dome["up"])
    theta_c = azimuth_deg(u, v, 0.0, 0.0)
    theta_raw = azimuth_deg(tr.x_um, tr.y_um, s.centre_um.x_um[t], s.centre_um.y_um[t])
    div_true = np.mod(np.diff(tr.theta_deg.to_numpy()), 360)
    div_c = np.mod(np.diff(theta_c), 360)
    div_raw = np.mod(np.diff(theta_raw), 360)
    assert div_true == pytest.approx(np.full(len(div_true), GOLDEN))  # the synthetic history
    assert np.max(np.abs(_wrap(div_c - div_true))) < 2.0
    # without the correction (image azimuths about the true summit) the angles are off
    assert np.max(np.abs(_wrap(div_raw - div_true))) > 2.0


def test_level_coordinates_invert():
    dome = {"x_um": 10.0, "y_um": 20.0, "z_um": 30.0, "curvature_um": 40.0, "tilt_deg": 12.0,
            "tilt_direction_deg": 100.0, "up": 1}
    xl, yl = 17.0, 9.0
    x, y = image_from_level(xl, yl, dome)
    u, v = level_offsets(x - 10.0, y - 20.0, float(dome_height(x, y, dome)) - 30.0, 12.0, 100.0)
    assert (10.0 + float(u), 20.0 + float(v)) == pytest.approx((xl, yl), abs=1e-5)
    assert level_offsets(3.0, 4.0, 5.0, 0.0, 0.0) == pytest.approx((3.0, 4.0))


def _pattern_tracks(noise_um=0.1, seed=0):
    s = make_synthetic_stack(n_frames=8, shape_zyx=(4, 64, 64), drift_um_per_frame=(0, 0, 0), seed=seed,
                             keep_invisible=True)
    # exact positions of the synthetic history (the rendering is not needed here)
    tr = s.truth[s.truth.r_um < 70].rename(columns={"primordium": "track_id"}).copy()
    rng = np.random.default_rng(seed)
    tr["x_um"] += rng.normal(0, noise_um, len(tr))
    tr["y_um"] += rng.normal(0, noise_um, len(tr))
    return s, tr


def test_pattern_centre_recovers_a_centre_offset_by_a_tenth_of_the_radius():
    # Okabe, arXiv:1212.3377: a centre offset δ at radius r biases azimuths by (δ/r)·sin(θ − ψ);
    # the fit removes that irregularity. Start 10 % of the rim radius away; expect ≤ 2 %.
    s, tr = _pattern_tracks()
    r_rim = s.params["apex_radius_um"]
    cx, cy = s.centre_um.x_um[0], s.centre_um.y_um[0]
    for ang in (0.0, 130.0, 250.0):
        start = (cx + 0.1 * r_rim * math.cos(math.radians(ang)), cy + 0.1 * r_rim * math.sin(math.radians(ang)))
        fit = centre_from_pattern(tr, start)
        assert math.hypot(fit["x_um"] - cx, fit["y_um"] - cy) <= 0.02 * r_rim
        assert abs(abs(fit["angle_deg"]) - GOLDEN) < 1.0
        # plastochron ratio 1.12 of the synthetic history: Δ ln r = −ln 1.12 per rank
        assert fit["log_ratio"] == pytest.approx(-math.log(s.params["plastochron_ratio"]), abs=0.01)


def test_choose_centres_reports_every_estimate():
    s, tr = _pattern_tracks()
    frames = pd.DataFrame({"frame": np.arange(8), "time_h": np.arange(8) * 3.0,
                           "x_um": 40.0, "y_um": 45.0, "method": "dome"})
    out, info = choose_centres(tr, frames, "pattern")
    assert info["used"] == "pattern" and (out["method"] == "pattern").all()
    for col in ("motion_x_um", "pattern_x_um", "dome_x_um", "view_x_um"):
        assert col in out.columns
    cx, cy = s.centre_um.x_um[0], s.centre_um.y_um[0]
    assert np.hypot(out.x_um - cx, out.y_um - cy).max() < 0.5
    assert np.isfinite(out.motion_x_um).all()
    auto, info = choose_centres(tr, frames, "auto")
    assert info["used"] == "motion" and "distance_motion_pattern_um" in info


@pytest.mark.parametrize("every", [1, 3])
def test_image_stage_dome_every_k_frames_keeps_the_tilt(tmp_path, every):
    # the 15° dome of the synthetic renderer (its own tilt parameter is the truth) is found
    # within 2° on every frame whether the dome is fitted on every frame or on every third
    # (frames between interpolated); the summit in the first frame's frame of reference stays on
    # the true one, and the detections keep a z on the surface
    from apextrack.imaging import image_stage
    from apextrack.model import write_synthetic
    from apextrack.settings import Settings
    from apextrack.stack import read_stack

    s = make_synthetic_stack(n_frames=7, shape_zyx=(22, 96, 96), z_step_um=1.5, tilt_deg=15,
                             tilt_direction_deg=40, membrane=True, seed=1, drift_um_per_frame=(0.4, -0.3, 0))
    paths = write_synthetic(s, tmp_path / "tilted.tif")
    st = read_stack(paths["stack"])
    try:
        det, cen = image_stage(st, Settings(membrane_channel="membrane", dome_every_frames=every), progress=False)
    finally:
        st.close()
    assert cen["dome_fitted"].tolist() == [t % every == 0 for t in range(7)]
    assert np.all(np.abs(cen["measured_tilt_deg"] - 15.0) < 2.0)
    assert np.all(np.abs(_wrap(cen["tilt_direction_deg"] - 40.0)) < 8.0)
    # frame 0 has no drift: the reference frame is the first frame's own
    err = np.hypot(cen["dome_x_um"] - s.centre_um.x_um[0], cen["dome_y_um"] - s.centre_um.y_um[0])
    assert err.max() < 2.0, err.tolist()
    z = det["z_um"].dropna()
    assert len(z) >= 0.9 * len(det)
    truth_z = s.truth[s.truth.visible]["z_um"]
    assert z.between(truth_z.min() - 5.0, truth_z.max() + 5.0).all()


def _tilted_surface_points(frame=0):
    s = make_synthetic_stack(n_frames=frame + 1, shape_zyx=(22, 96, 96), z_step_um=1.5, tilt_deg=15,
                             tilt_direction_deg=40, membrane=True, seed=1, drift_um_per_frame=(0.4, -0.3, 0))
    hm = surface_height(s.data[frame][:, 1].astype(np.float32), s.z_step_um, s.pixel_size_um)
    x, y, z = hm.points_px()
    return x * s.pixel_size_um, y * s.pixel_size_um, z, hm.up


def test_dome_cost_derivatives_match_numerical_derivatives():
    # reference: scipy.differentiate.jacobian and .hessian (adaptive finite differences) of the
    # soft-L1 cost; the fit's Newton steps use the analytic gradient and exact Hessian
    from scipy.differentiate import hessian, jacobian

    from apextrack.apex import _dome_cost_derivatives, _dome_residual, _soft_l1

    rng = np.random.default_rng(2)
    q = rng.uniform(-30, 30, (3, 200))
    q[2] = -(q[0] ** 2 + q[1] ** 2) / 80.0 + 0.3 * q[0] + rng.normal(0, 1.0, 200)
    p = np.array([0.4, 0.25, -0.2, -0.011, 0.2, -0.1])
    scale = np.array([1.0, 0.1, 0.1, 0.001, 0.1, 0.1])  # steps of a size that suits each parameter

    def cost(xs):
        return np.apply_along_axis(lambda v: _soft_l1(_dome_residual(v * scale, q), 0.8), 0, xs)

    c, g, h, _, r = _dome_cost_derivatives(p, q, 0.8)
    assert c == pytest.approx(_soft_l1(r, 0.8))
    num_g = jacobian(cost, p / scale, initial_step=0.05).df / scale
    num_h = hessian(cost, p / scale, initial_step=0.05).ddf / np.outer(scale, scale)
    np.testing.assert_allclose(g, num_g, rtol=1e-6, atol=1e-6 * np.abs(num_g).max())
    np.testing.assert_allclose(h, num_h, rtol=1e-5, atol=1e-6 * np.abs(num_h).max())


def test_dome_fit_reaches_the_least_squares_minimum():
    # reference: scipy.optimize.least_squares (loss="soft_l1", tight tolerances) on the model as
    # the docstring states it: algebraic distance along the axis of a paraboloid of revolution,
    # parametrised by summit, ln Rc and the horizontal components of the axis; started from the
    # rendered truth, on the rendered tilted stack's height map (primordia bulges included)
    from scipy.optimize import least_squares

    x, y, z, up = _tilted_surface_points()
    assert len(x) < 1000  # all points are used by the fit
    robust = 0.75

    def resid(p):
        sx, sy, sz, log_rc, ax, ay = p
        cb = math.sqrt(1.0 - ax * ax - ay * ay)
        px, py, pz = x - sx, y - sy, up * (z - sz)
        w = px * ax + py * ay + cb * pz
        return w + (px * px + py * py + pz * pz - w * w) / (2.0 * math.exp(log_rc))

    a = math.sin(math.radians(15)) * np.array([math.cos(math.radians(40)), -math.sin(math.radians(40))])
    ref = least_squares(resid, [40.0, 36.0, 28.0, math.log(45.0), a[0], a[1]], loss="soft_l1", f_scale=robust,
                        x_scale=[10, 10, 5, 0.3, 0.1, 0.1], ftol=1e-14, xtol=1e-14, gtol=1e-14, max_nfev=2000)
    d = fit_dome(x, y, z, up=up, robust_um=robust)
    sx, sy, sz, log_rc, ax, ay = ref.x
    assert (d["x_um"], d["y_um"], d["z_um"]) == pytest.approx((sx, sy, sz), abs=1e-4)
    assert d["curvature_um"] == pytest.approx(math.exp(log_rc), rel=1e-5)
    assert d["tilt_deg"] == pytest.approx(math.degrees(math.asin(math.hypot(ax, ay))), abs=1e-4)
    assert d["tilt_direction_deg"] == pytest.approx(math.degrees(math.atan2(-ay, ax)) % 360, abs=1e-3)


def test_dome_fit_does_not_depend_on_the_previous_fit():
    # common practice, no source: frames are measured independently, so a fit must be the same
    # with no previous fit, another frame's fit, or a poor one (tilted 25° the other way) as init
    x, y, z, up = _tilted_surface_points(frame=2)
    alone = fit_dome(x, y, z, up=up, robust_um=0.75)
    other = fit_dome(*_tilted_surface_points(frame=0)[:3], up=up, robust_um=0.75)
    poor = dict(other, tilt_deg=25.0, tilt_direction_deg=220.0, x_um=10.0, y_um=60.0, curvature_um=300.0)
    keys = ["x_um", "y_um", "z_um", "curvature_um", "tilt_deg", "tilt_direction_deg"]
    for init in (other, poor):
        d = fit_dome(x, y, z, up=up, init=init, robust_um=0.75)
        assert [d[k] for k in keys] == pytest.approx([alone[k] for k in keys], abs=1e-6)
