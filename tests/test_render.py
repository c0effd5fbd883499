"""Synthetic microscopy: blob positions, PSF, noise, bleaching, motion, missing/dim frames."""

import math

import numpy as np
import pytest
from scipy import ndimage

from apextrack.errors import SettingsError
from apextrack.model import make_synthetic_stack
from apextrack.model.render import Scene, dome_points, surface_height

FWHM = 2.0 * math.sqrt(2.0 * math.log(2.0))

# a small, fine-grained, noise-free configuration where blobs are well sampled in x, y and z
CLEAN = dict(n_frames=4, interval_h=3.0, plastochron_h=6.0, pixel_size_um=0.5, z_step_um=1.0,
             shape_zyx=(32, 96, 96), apex_radius_um=12.0, primordium_radius_um=2.5,
             primordium_max_radius_um=4.0, noise=False, dome_photons=0.0, background_photons=0.0,
             offset_adu=0.0, gain=1.0, peak_photons=5000.0, bleach_per_frame=0.0,
             dome_curvature_um=40.0, summit_z_um=22.0, brightness_at_birth=1.0, rise_h=0.0)


def _isolated(truth, min_sep_um):
    """Visible rows whose nearest other blob in the same frame is farther than min_sep_um."""
    keep = []
    for f, g in truth[truth["visible"]].groupby("frame"):
        xy = g[["x_um", "y_um"]].to_numpy()
        d = np.hypot(xy[:, None, 0] - xy[None, :, 0], xy[:, None, 1] - xy[None, :, 1])
        np.fill_diagonal(d, np.inf)
        keep.extend(g.index[d.min(axis=1) > min_sep_um])
    return truth.loc[keep]


@pytest.mark.parametrize("extra", [dict(), dict(drift_um_per_frame=(0.6, -0.4, 0.3), rotation_deg_per_frame=7.0),
                                   dict(tilt_deg=15.0, tilt_direction_deg=40.0)])
def test_truth_positions_match_rendered_blob_centres(extra):
    # reference: scipy.ndimage.center_of_mass of each rendered blob (general-purpose library)
    s = make_synthetic_stack(**dict(CLEAN, n_frames=8), **extra)
    rows = _isolated(s.truth, 12.0)
    rows = rows[(rows["x_px"] > 15) & (rows["x_px"] < 80) & (rows["y_px"] > 15) & (rows["y_px"] < 80)
                & (rows["z_px"] > 6) & (rows["z_px"] < 25.4)]
    assert len(rows) >= 6
    for r in rows.itertuples():
        vol = s.data[r.frame].astype(float)
        zc, yc, xc = int(round(r.z_px)), int(round(r.y_px)), int(round(r.x_px))
        # the brightest voxel of the blob is the voxel nearest to the true centre
        w, wz = 4, 3
        box = vol[zc - wz:zc + wz + 1, yc - w:yc + w + 1, xc - w:xc + w + 1]
        k = np.unravel_index(np.argmax(box), box.shape)
        assert (k[0] - wz, k[1] - w, k[2] - w) == (0, 0, 0)
        # sub-voxel centre: the logarithm of a sampled Gaussian is exactly a parabola, so the
        # three-point log-parabola peak estimate recovers the centre (common practice, no source)
        for axis, true in ((0, r.z_px), (1, r.y_px), (2, r.x_px)):
            idx = [zc, yc, xc]
            vals = []
            for off in (-1, 0, 1):
                j = list(idx)
                j[axis] += off
                vals.append(math.log(vol[tuple(j)]))
            lm, l0, lp = vals
            peak = idx[axis] + 0.5 * (lm - lp) / (lm - 2 * l0 + lp)
            assert peak == pytest.approx(true, abs=0.02)


def test_single_blob_centre_of_mass_is_the_truth():
    # reference: scipy.ndimage.center_of_mass (general-purpose library) of a lone blob
    import pandas as pd
    for theta, t_birth in ((35.0, -20.0), (250.0, -5.0)):
        hist = pd.DataFrame({"birth_time_h": [t_birth], "theta_deg": [theta]})
        s = make_synthetic_stack(**dict(CLEAN, n_frames=3), history=hist,
                                 drift_um_per_frame=(0.7, 0.4, 0.2), rotation_deg_per_frame=5.0)
        for f in range(3):
            r = s.truth[s.truth["frame"] == f].iloc[0]
            cz, cy, cx = ndimage.center_of_mass(s.data[f].astype(float))
            assert (cx, cy, cz) == pytest.approx((r.x_px, r.y_px, r.z_px), abs=0.05)


def test_analytic_psf_equals_convolution_with_scipy_gaussian_filter():
    # blurring a Gaussian by a Gaussian PSF adds the variances (standard property of the
    # Gaussian, common practice); reference: scipy.ndimage.gaussian_filter of the sharp rendering
    base = dict(CLEAN, n_frames=2, peak_photons=20000.0)
    sharp = make_synthetic_stack(**base, psf_fwhm_um=(0.0, 0.0)).data.astype(float)
    psf_z, psf_xy = 1.6, 0.9
    blurred = make_synthetic_stack(**base, psf_fwhm_um=(psf_z, psf_xy)).data.astype(float)
    sigma = (psf_z / FWHM / 1.0, psf_xy / FWHM / 0.5, psf_xy / FWHM / 0.5)
    for f in range(2):
        ref = ndimage.gaussian_filter(sharp[f], sigma, mode="constant", truncate=5.0)
        inner = (slice(4, -4), slice(8, -8), slice(8, -8))
        err = np.abs(ref[inner] - blurred[f][inner]).max()
        assert err < 0.01 * blurred[f].max()


def test_blob_width_is_object_and_psf_in_quadrature():
    # second moment of a rendered blob along x = σ_obj² + σ_psf² (variances of convolved
    # Gaussians add; common practice, no source)
    s = make_synthetic_stack(**dict(CLEAN, n_frames=1), psf_fwhm_um=(2.0, 1.2))
    r = _isolated(s.truth, 14.0)
    r = r[(r["x_px"] > 15) & (r["x_px"] < 80) & (r["y_px"] > 15) & (r["y_px"] < 80)].iloc[0]
    img = s.data[0].astype(float).max(axis=0)
    yc, xc = int(round(r.y_px)), int(round(r.x_px))
    row = img[yc, xc - 15:xc + 16]
    x = (np.arange(xc - 15, xc + 16) - r.x_px) * s.pixel_size_um
    # fit the log of a Gaussian profile: log I = a − x²/(2σ²)
    good = row > row.max() * 0.05
    coef = np.polyfit(x[good], np.log(row[good]), 2)
    sigma_fit = math.sqrt(-1.0 / (2.0 * coef[0]))
    expect = math.hypot(r.radius_um / math.sqrt(2.0), 1.2 / FWHM)
    assert sigma_fit == pytest.approx(expect, rel=0.02)


def test_camera_noise_is_poisson_times_gain_plus_read_noise():
    # camera model: variance = gain²·λ + read_noise² (photon shot noise is Poisson; common
    # practice, no source); mean = offset + gain·λ
    s = make_synthetic_stack(n_frames=2, shape_zyx=(4, 64, 64), dome_photons=0.0, peak_photons=0.0,
                             background_photons=20.0, gain=2.5, offset_adu=100.0, read_noise_adu=4.0,
                             seed=5)
    v = s.data.astype(float)
    assert v.mean() == pytest.approx(100.0 + 2.5 * 20.0, rel=0.01)
    assert v.var() == pytest.approx(2.5 ** 2 * 20.0 + 4.0 ** 2, rel=0.05)


def test_same_seed_same_stack_other_seed_other_noise():
    a = make_synthetic_stack(n_frames=3, shape_zyx=(4, 48, 48), apex_radius_um=10.0, seed=1)
    b = make_synthetic_stack(n_frames=3, shape_zyx=(4, 48, 48), apex_radius_um=10.0, seed=1)
    c = make_synthetic_stack(n_frames=3, shape_zyx=(4, 48, 48), apex_radius_um=10.0, seed=2)
    assert np.array_equal(a.data, b.data)
    assert a.truth.equals(b.truth)
    assert not np.array_equal(a.data, c.data)


def test_bleaching_missing_and_dim_frames():
    # a single old primordium that no longer moves (γ = 0) and no drift: only bleaching, a dim
    # frame and a missing frame change its signal
    import pandas as pd
    hist = pd.DataFrame({"birth_time_h": [-50.0], "theta_deg": [30.0]})
    kw = dict(CLEAN, n_frames=6, growth_rate_per_h=0.0, drift_um_per_frame=(0, 0, 0), history=hist,
              bleach_per_frame=0.05, dim_frames=[3], missing_frames=[4], dim_factor=0.4)
    s = make_synthetic_stack(**kw)
    total = s.data.reshape(6, -1).astype(float).sum(axis=1)
    expect = total[0] * 0.95 ** np.arange(6)
    assert total[1] == pytest.approx(expect[1], rel=1e-3)
    assert total[2] == pytest.approx(expect[2], rel=1e-3)
    assert total[5] == pytest.approx(expect[5], rel=1e-3)
    assert total[3] == pytest.approx(0.4 * expect[3], rel=1e-3)
    assert total[4] == 0.0
    assert s.centre_um["frame_status"].tolist() == ["ok", "ok", "ok", "dim", "missing", "ok"]
    assert (s.truth.loc[s.truth["frame"] == 4, "frame_status"] == "missing").all()


def test_motion_moves_the_centre_and_rotates_azimuths():
    s = make_synthetic_stack(n_frames=5, shape_zyx=(6, 80, 80), apex_radius_um=15.0,
                             drift_um_per_frame=(0.5, -0.25, 0.1), rotation_deg_per_frame=3.0, noise=False)
    c = s.centre_um
    fx = (80 - 1) / 2 * s.pixel_size_um
    assert np.allclose(c["x_um"] - fx, 0.5 * c["frame"])
    assert np.allclose(c["y_um"] - fx, -0.25 * c["frame"])
    assert np.allclose(c["rotation_deg"], 3.0 * c["frame"])
    t = s.truth
    turned = np.mod(t["theta_image_deg"] - t["theta_deg"] + 180.0, 360.0) - 180.0
    assert np.allclose(turned, 3.0 * t["frame"], atol=1e-9)
    # distance to the moving centre is unchanged by the motion
    cc = c.set_index("frame").loc[t["frame"]]
    r_img = np.hypot(t["x_um"].to_numpy() - cc["x_um"].to_numpy(), t["y_um"].to_numpy() - cc["y_um"].to_numpy())
    assert np.allclose(r_img, t["r_um"])


def test_tilted_dome_points_lie_on_the_surface():
    sc = Scene(shape_zyx=(10, 100, 100), pixel_size_um=0.5, tilt_deg=25.0, tilt_direction_deg=120.0,
               dome_curvature_um=30.0)
    r = np.linspace(0, 30, 16)
    th = np.linspace(0, 720, 16)
    x, y, z = dome_points(sc, r, th, depth_um=0.0)
    assert np.allclose(surface_height(sc, x, y), z, atol=1e-9)
    # the dome axis leans towards the tilt direction, so the surface rises on the opposite side:
    # the highest point of the rotated paraboloid z' = −s²/(2Rc) lies at s = −Rc·tan β, i.e.
    # X_d = −Rc·sin β·(1 + tan²β / 2) (derived here from the rotation; no source)
    cx, cy, cz = sc.summit_um
    xs = cx + np.linspace(-20, 20, 401) * math.cos(math.radians(120.0))
    ys = cy - np.linspace(-20, 20, 401) * math.sin(math.radians(120.0))
    top = np.nanargmax(surface_height(sc, xs, ys))
    b = math.radians(25.0)
    assert np.linspace(-20, 20, 401)[top] == pytest.approx(-30.0 * math.sin(b) * (1 + math.tan(b) ** 2 / 2), abs=0.1)


def test_membrane_channel_axes_and_bad_settings():
    s = make_synthetic_stack(n_frames=2, shape_zyx=(5, 40, 40), apex_radius_um=8.0, membrane=True)
    assert s.axes == "TZCYX" and s.data.shape == (2, 5, 2, 40, 40)
    assert s.channel_names == ["reporter", "membrane"]
    assert s.data[:, :, 1].max() > s.data[:, :, 1].min() + 50
    with pytest.raises(SettingsError):
        make_synthetic_stack(n_frames=0)
    with pytest.raises(SettingsError):
        make_synthetic_stack(n_frames=3, bleach_per_frame=1.5)
    with pytest.raises(SettingsError):
        make_synthetic_stack(n_frames=3, missing_frames=[7])
