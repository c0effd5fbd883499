"""Detection: localisation precision, blob size convention, agreement with reference detectors,
the pyramid LoG, bleaching, the apex region and 3D detection."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.special import erf

from apextrack.detect import (apex_region, detect_blobs, detect_blobs_3d, log_scale_space, log_stack, pyramid_log,
                              scales_px)


def _pixel_gaussian(shape, x0, y0, s, n_photons):
    """Expected photons per pixel of a 2D Gaussian spot integrated over unit pixels."""
    ny, nx = shape
    ex = np.diff(erf((np.arange(nx + 1) - 0.5 - x0) / (math.sqrt(2) * s))) / 2
    ey = np.diff(erf((np.arange(ny + 1) - 0.5 - y0) / (math.sqrt(2) * s))) / 2
    return n_photons * np.outer(ey, ex)


def _spots(rng, n_side, spacing, s, n_photons, bg, jitter=0.5):
    shape = (n_side * spacing, n_side * spacing)
    img = np.full(shape, float(bg))
    truth = []
    for i in range(n_side):
        for j in range(n_side):
            x0 = j * spacing + spacing // 2 + rng.uniform(-jitter, jitter)
            y0 = i * spacing + spacing // 2 + rng.uniform(-jitter, jitter)
            img += _pixel_gaussian(shape, x0, y0, s, n_photons)
            truth.append((x0, y0))
    return img, np.array(truth)


def _match(df, truth, tol=2.0):
    from scipy.spatial import cKDTree

    d, i = cKDTree(df[["x_px", "y_px"]].to_numpy()).query(truth)
    ok = d < tol
    return df.iloc[i[ok]][["x_px", "y_px"]].to_numpy() - truth[ok], ok


def _mortensen_bound(s: float, n_photons: float, b2: float, a: float = 1.0) -> float:
    """Mortensen, Churchman, Spudich & Flyvbjerg 2010, Nat. Methods 7:377, eq. (6): the s.d. of
    least-squares Gaussian fitting of a spot of N photons, PSF s.d. s, pixel a, background b²
    photons/pixel (Poisson camera, no EM gain):
    var_x = (s_a² / N) · (16/9 + 8π s_a² b² / (N a²)),   s_a² = s² + a²/12."""
    s_a2 = s ** 2 + a ** 2 / 12
    return math.sqrt(s_a2 / n_photons * (16 / 9 + 8 * math.pi * s_a2 * b2 / (n_photons * a ** 2)))


def _spot_rmse(seed: int, rounds: int, per_row: int, spacing: int, s: float, n_photons: float, b2: float,
               sigmas) -> float:
    """Per-axis RMSE of the detector on Poisson images of isolated Gaussian spots; every spot
    must be found."""
    rng = np.random.default_rng(seed)
    errors = []
    for _ in range(rounds):
        expected, truth = _spots(rng, per_row, spacing, s, n_photons, b2)
        img = rng.poisson(expected).astype(np.float32)
        df = detect_blobs(img, sigmas, min_snr=3)
        err, ok = _match(df, truth)
        assert ok.mean() == 1.0
        errors.append(err)
    return float(np.sqrt(np.mean(np.concatenate(errors) ** 2)))


def test_localisation_reaches_mortensen_least_squares_precision():
    # Mortensen et al. 2010, Nat. Methods 7:377, eq. (6) (see _mortensen_bound)
    s, n_photons, b2 = 1.5, 1500.0, 4.0
    bound = _mortensen_bound(s, n_photons, b2)
    rmse = _spot_rmse(1, 4, 6, 24, s, n_photons, b2, scales_px(2.5, 7, 1.0, 5))
    assert rmse <= 1.2 * bound, (rmse, bound)
    assert rmse >= 0.6 * bound, (rmse, bound)  # no estimator beats the information limit by that much


def test_gaussian_blob_size_and_disc_radius_convention():
    # Lindeberg 1998, IJCV 30: the scale-normalised LoG of a Gaussian of s.d. s peaks at σ = s;
    # scikit-image blob_log documentation: a flat disc of radius R is found at σ = R/√2 (r = √2·σ)
    yy, xx = np.mgrid[:96, :96]
    s = 3.0
    img = 200 * np.exp(-((xx - 40.3) ** 2 + (yy - 50.6) ** 2) / (2 * s ** 2)) + 10
    df = detect_blobs(img, np.geomspace(1.5, 8, 9), min_snr=3)
    assert len(df) == 1
    assert df.sigma_px[0] == pytest.approx(s, rel=0.06)
    assert df.radius_px[0] == pytest.approx(math.sqrt(2) * df.sigma_px[0])
    disc = np.where(np.hypot(xx - 48, yy - 47) <= 10.0, 100.0, 0.0)
    disc = disc + np.random.default_rng(0).normal(0, 1, disc.shape)
    dd = detect_blobs(disc, np.geomspace(3, 12, 9), min_snr=3)
    assert len(dd) == 1
    assert dd.radius_px[0] == pytest.approx(10.0, rel=0.15)


def test_positions_agree_with_trackpy_and_skimage_on_clean_spots():
    # reference libraries: trackpy.locate (centroid, Crocker & Grier) and skimage.feature.blob_log
    import trackpy
    from skimage.feature import blob_log

    rng = np.random.default_rng(3)
    expected, truth = _spots(rng, 4, 32, 2.0, 20000.0, 10.0, jitter=0.35)
    img = (expected + rng.normal(0, 1.0, expected.shape)).astype(np.float32)
    ours = detect_blobs(img, scales_px(3, 10, 1.0, 6))
    assert len(ours) == len(truth)
    trackpy.quiet()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tp = trackpy.locate(img, 11, minmass=1000, preprocess=False)
    bl = blob_log(img / img.max(), min_sigma=1.0, max_sigma=4.0, num_sigma=10, threshold=0.05)
    from scipy.spatial import cKDTree

    p = ours[["x_px", "y_px"]].to_numpy()
    d_tp, _ = cKDTree(tp[["x", "y"]].to_numpy()).query(p)
    d_bl, i_bl = cKDTree(bl[:, [1, 0]]).query(p)
    assert np.all(d_tp < 0.5)
    # blob_log reports whole pixels: compare per axis (spots sit within 0.35 px of a pixel centre)
    assert np.all(np.abs(bl[i_bl][:, [1, 0]] - p) < 0.5)
    d_truth, _ = cKDTree(truth).query(p)
    assert np.all(d_truth < 0.1)


def test_pyramid_log_matches_full_resolution_log():
    # the Gaussian semigroup makes the decimated evaluation equal to the full-resolution one
    # (common practice, no source): compare the responses at blob centres
    yy, xx = np.mgrid[:128, :128]
    img = sum(80 * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * s ** 2))
              for x, y, s in ((30, 30, 3.0), (90, 40, 6.0), (60, 95, 9.0))).astype(np.float32)
    sig = np.array([3.0, 6.0, 9.0])
    full = log_scale_space(img, sig)
    for k, (f, r) in enumerate(pyramid_log(img, sig)):
        x, y = ((30, 30), (90, 40), (60, 95))[k]
        assert r[round(y / f), round(x / f)] == pytest.approx(full[k, y, x], rel=0.05)


def test_detection_copes_with_bleaching():
    from apextrack.model import make_synthetic_stack
    from apextrack.projection import max_projection

    s = make_synthetic_stack(n_frames=10, shape_zyx=(6, 96, 96), bleach_per_frame=0.09, seed=2,
                             drift_um_per_frame=(0, 0, 0), peak_photons=200)
    recall = []
    for t in (0, 9):
        truth = s.truth[(s.truth.frame == t) & s.truth.visible & (s.truth.brightness > 0.5)]
        df = detect_blobs(max_projection(s.data[t].astype(np.float32)), scales_px(6, 20, 0.8, 6))
        from scipy.spatial import cKDTree

        d, _ = cKDTree(df[["x_px", "y_px"]].to_numpy()).query(truth[["x_px", "y_px"]].to_numpy())
        recall.append(float(np.mean(d < 2.0)))
    assert 0.91 ** 9 < 0.45  # the last frame holds less than half the first frame's signal
    assert recall[0] >= 0.8
    assert recall[1] >= recall[0] - 0.15


def test_blobs_outside_the_apex_region_are_rejected():
    yy, xx = np.mgrid[:160, :160]
    img = np.where(np.hypot(xx - 60, yy - 60) < 40, 30.0, 0.0)
    for x, y in ((50, 50), (75, 62), (55, 80)):
        img = img + 100 * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / 18.0)
    img = img + 100 * np.exp(-((xx - 145) ** 2 + (yy - 145) ** 2) / 18.0)   # debris far away
    img = img + np.random.default_rng(0).normal(0, 1, img.shape)
    region = apex_region(img)
    assert region[2] == pytest.approx(40, rel=0.15)
    sig = scales_px(5, 12, 1.0, 4)
    all_ = detect_blobs(img, sig)
    inside = detect_blobs(img, sig, region=region, region_factor=1.2)
    assert len(all_) == 4 and len(inside) == 3
    assert not np.any(inside.x_px > 120)


def test_3d_detection_finds_the_blob_centre():
    zz, yy, xx = np.mgrid[:16, :48, :48]
    z_ratio = 2.5  # z step / pixel size
    s = 3.0
    v = 100 * np.exp(-((xx - 21.4) ** 2 + (yy - 25.7) ** 2 + ((zz - 7.3) * z_ratio) ** 2) / (2 * s ** 2)) + 10
    v = v + np.random.default_rng(0).normal(0, 0.5, v.shape)
    df = detect_blobs_3d(v, np.geomspace(2, 5, 6), z_ratio=z_ratio)
    assert len(df) == 1
    assert abs(df.x_px[0] - 21.4) < 0.5 and abs(df.y_px[0] - 25.7) < 0.5 and abs(df.z_px[0] - 7.3) < 0.5
    assert df.radius_px[0] == pytest.approx(math.sqrt(3) * df.sigma_px[0])


def test_wide_blobs_reach_mortensen_least_squares_precision():
    # Mortensen, Churchman, Spudich & Flyvbjerg 2010, Nat. Methods 7:377, eq. (6), as above, for
    # primordium-sized spots (s = 6 px): their fit windows are averaged in 2×2 blocks, which
    # must not cost precision
    s, n_photons, b2 = 6.0, 20000.0, 10.0
    bound = _mortensen_bound(s, n_photons, b2)
    rmse = _spot_rmse(11, 5, 4, 72, s, n_photons, b2, scales_px(10, 30, 1.0, 6))
    assert 0.8 * bound <= rmse <= 1.2 * bound, (rmse, bound)


def test_spot_at_the_image_edge_is_not_pulled_outwards():
    # common practice, no source: pixels beyond the edge are unknown, not copies of the edge;
    # a spot 4 px from the border is found where it is
    yy, xx = np.mgrid[:64, :64]
    img = 200 * np.exp(-((xx - 59.6) ** 2 + (yy - 30.2) ** 2) / (2 * 4.0 ** 2)) + 20
    img = img + np.random.default_rng(2).normal(0, 1.0, img.shape)
    df = detect_blobs(img, scales_px(6, 20, 1.0, 6))
    assert len(df) == 1
    assert abs(df.x_px[0] - 59.6) < 0.1 and abs(df.y_px[0] - 30.2) < 0.1


def test_apex_region_search_finds_the_same_blobs_as_the_whole_frame():
    # common practice, no source: searching only the apex region's bounding box is a shortcut
    # that must not change which blobs inside the region are found, nor where
    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[:256, :256]
    img = np.full((256, 256), 20.0)
    for _ in range(25):
        x, y = rng.uniform(10, 246, 2)
        img += 150 * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * rng.uniform(3, 6) ** 2))
    img = (img + rng.normal(0, 2.0, img.shape)).astype(np.float32)
    sig = scales_px(6, 20, 1.0, 6)
    region = (90.0, 110.0, 50.0)
    whole = detect_blobs(img, sig)
    inside = np.hypot(whole.x_px - 90.0, whole.y_px - 110.0) <= 1.2 * 50.0
    cropped = detect_blobs(img, sig, region=region, region_factor=1.2)
    assert 3 <= len(cropped) < len(whole)
    assert len(cropped) == int(inside.sum())
    ref = whole[inside].reset_index(drop=True)
    np.testing.assert_allclose(cropped[["x_px", "y_px"]].to_numpy(), ref[["x_px", "y_px"]].to_numpy(), atol=0.02)


def test_log_stack_on_an_odd_sized_coarse_grid_matches_the_full_resolution_log():
    # reference library: scipy.ndimage.gaussian_laplace (via log_scale_space). A 96 px image
    # with σ up to 6 is padded to 150 px, a coarse grid of 75 (odd) rows and columns, whose
    # spectrum has one more non-negative than negative frequency row
    yy, xx = np.mgrid[:96, :96]
    img = (80 * np.exp(-((xx - 40) ** 2 + (yy - 50) ** 2) / (2 * 3.0 ** 2))).astype(np.float32)
    sig = np.array([3.0, 6.0])
    f, cube = log_stack(img, sig)
    full = log_scale_space(img, sig)
    assert f == 2 and cube.shape == (2, 48, 48)
    np.testing.assert_allclose(cube, full[:, ::2, ::2], atol=0.02 * float(np.abs(full).max()))


def test_scale_is_found_alike_on_grids_of_different_spacing():
    # Lindeberg 1998, IJCV 30: the scale-normalised LoG of a Gaussian of s.d. s peaks at σ = s.
    # These scales lie on grids decimated 2, 4 and 8 times; blobs between them, at arbitrary
    # subpixel positions, must get their own s whichever grids their neighbouring scales are on
    rng = np.random.default_rng(6)
    sig = np.geomspace(2.5, 10.0, 7)
    yy, xx = np.mgrid[:160, :160]
    for s in (3.0, 4.8, 6.5, 8.5):
        for _ in range(3):
            x0, y0 = rng.uniform(70, 90, 2)
            img = 200 * np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * s ** 2)) + 10
            img = img + rng.normal(0, 0.5, img.shape)
            df = detect_blobs(img, sig, min_snr=3)
            assert len(df) == 1
            assert df.sigma_px[0] == pytest.approx(s, rel=0.06)
            assert abs(df.x_px[0] - x0) < 0.05 and abs(df.y_px[0] - y0) < 0.05


def test_apex_region_closing_matches_reference_morphology():
    # reference library: scipy.ndimage (distance transform, binary closing with a disc, hole
    # filling, labelling) applied as apex_region's docstring describes, on a view whose bright
    # pieces are joined only by the closing
    from scipy import ndimage as ndi
    from skimage.filters import threshold_otsu

    rng = np.random.default_rng(8)
    yy, xx = np.mgrid[:512, :512]
    view = np.zeros((512, 512))
    for a in np.linspace(0, 2 * np.pi, 9)[:-1]:
        view += 100 * np.exp(-((xx - 256 - 90 * np.cos(a)) ** 2 + (yy - 250 - 90 * np.sin(a)) ** 2) / (2 * 14.0 ** 2))
    view += 100 * np.exp(-((xx - 60) ** 2 + (yy - 450) ** 2) / (2 * 10.0 ** 2))      # debris
    view = (view + rng.normal(0, 1, view.shape)).astype(np.float32)
    close = 25.0
    got = apex_region(view, close_px=close)
    f = 4
    img = ndi.gaussian_filter(view[::f, ::f], 3.0 / f)
    bg = float(np.percentile(img, 2))
    mask = img > bg + 0.25 * (threshold_otsu(img) - bg)
    rad = close / f
    p = int(np.ceil(rad)) + 1
    padded = np.pad(mask, p)
    grown = ndi.distance_transform_edt(~padded) <= rad
    closed = (ndi.distance_transform_edt(grown) > rad)[p:-p, p:-p] | mask
    filled = ndi.binary_fill_holes(closed)
    labels, n = ndi.label(filled)
    sizes = ndi.sum(filled, labels, index=np.arange(1, n + 1))
    region = labels == 1 + int(np.argmax(sizes))
    ry, rx = np.nonzero(region)
    cx, cy = rx.mean(), ry.mean()
    radius = np.percentile(np.hypot(rx - cx, ry - cy), 95) + 0.5
    assert n >= 2                                   # the debris stays apart
    assert got == pytest.approx((cx * f, cy * f, radius * f), abs=1e-9)
