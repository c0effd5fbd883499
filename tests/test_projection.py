"""Projections and the dome surface height map."""

from __future__ import annotations

import numpy as np
import pytest

from apextrack.model import make_synthetic_stack
from apextrack.model.render import Scene, surface_height as true_surface
from apextrack.projection import max_projection, shell_projection, surface_height, surface_projection


def test_shell_projection_keeps_deep_autofluorescence_out():
    zz = np.arange(20.0)[:, None, None]
    yy, xx = np.mgrid[:40, :40]
    surface = 15.0 - ((xx - 20) ** 2 + (yy - 20) ** 2) / 150.0      # a dome, slices
    v = 5 * np.exp(-0.5 * (zz - surface) ** 2) + 1.0
    v[3, 18:23, 18:23] += 200.0                                      # deep, bright
    v[int(round(surface[10, 30])) - 1, 10, 30] += 50.0               # just under the surface
    view, hm = surface_projection(v, 1.0, 1.0, shell_depth_um=3.0, cell_um=2.0)
    assert hm.up == 1
    assert max_projection(v)[20, 20] > 100 and view[20, 20] < 10
    assert view[10, 30] > 40
    full = hm.full()
    assert np.nanmedian(np.abs(full - surface)) < 0.3


def test_height_map_follows_the_rendered_dome_surface():
    s = make_synthetic_stack(n_frames=1, shape_zyx=(20, 80, 80), z_step_um=1.5, tilt_deg=10,
                             tilt_direction_deg=120, membrane=True, seed=3)
    hm = surface_height(s.data[0][:, 1].astype(np.float32), 1.5, 0.8)
    x, y, z = hm.points_px()
    scene = Scene(shape_zyx=(20, 80, 80), pixel_size_um=0.8, z_step_um=1.5, tilt_deg=10, tilt_direction_deg=120)
    zt = true_surface(scene, x * 0.8, y * 0.8)
    inside = np.isfinite(zt) & (zt > 1.5) & (zt < 19 * 1.5)
    assert inside.mean() > 0.8
    assert np.median(np.abs(z[inside] - zt[inside])) < 0.5


def test_the_side_the_dome_faces_is_found():
    zz = np.arange(16.0)[:, None, None]
    yy, xx = np.mgrid[:32, :32]
    surface = 12.0 - ((xx - 16) ** 2 + (yy - 16) ** 2) / 100.0
    v = np.exp(-0.5 * (zz - surface) ** 2) * 10 + (zz < surface) * 2.0   # tissue under the surface
    up = surface_height(v, 1.0, 1.0, cell_um=2.0)
    down = surface_height(v[::-1], 1.0, 1.0, cell_um=2.0)
    assert up.up == 1 and down.up == -1
    assert np.nanmedian(np.abs(up.z_um + down.z_um - 15.0)) < 0.3    # mirrored heights


def test_columns_without_surface_fall_back_to_the_maximum():
    v = np.zeros((5, 8, 8), np.float32)
    hm = surface_height(v + 1.0, 1.0, 1.0, cell_um=2.0, up="+z")
    assert np.isnan(hm.z_um).all()
    v[2, 3, 3] = 7.0
    assert shell_projection(v, hm, 1.0, 2.0)[3, 3] == pytest.approx(7.0)


def test_height_map_and_shell_are_the_same_from_the_stacks_own_dtype():
    # common practice, no source: the volume is binned and projected in its own (integer)
    # dtype without a float copy; the results must equal those from a float32 copy
    s = make_synthetic_stack(n_frames=1, shape_zyx=(16, 64, 64), z_step_um=1.5, seed=5)
    raw = np.asarray(s.data[0])
    assert raw.dtype == np.uint16
    flt = raw.astype(np.float32)
    a = surface_height(raw, 1.5, 0.8)
    b = surface_height(flt, 1.5, 0.8)
    np.testing.assert_array_equal(a.z_um, b.z_um)
    np.testing.assert_array_equal(shell_projection(raw, a, 1.5, 6.0), shell_projection(flt, b, 1.5, 6.0))
    assert max_projection(raw).dtype == np.float32
    np.testing.assert_array_equal(max_projection(raw), flt.max(axis=0))


@pytest.mark.parametrize("b", [2, 3, 4, 6])
def test_lateral_binning_is_the_exact_block_mean_of_16_bit_data(b):
    # common practice, no source: the b × b block mean, checked against numpy's float64 mean
    # of the reshaped blocks; values up to 65535 (the 32-bit pair sums must not overflow)
    rng = np.random.default_rng(3)
    v = rng.integers(0, 65536, size=(3, 4 * b + 1, 5 * b + 3)).astype(np.uint16)
    v[0] = 65535
    ref = _block_mean(v, b)
    np.testing.assert_allclose(_binned_mean(v, b), ref, rtol=1e-6)
    np.testing.assert_array_equal(_binned_mean(v, b), _binned_mean(v.astype(np.int32), b))


def _block_mean(v: np.ndarray, b: int) -> np.ndarray:
    """numpy's float64 mean of the reshaped b × b blocks (the reference)."""
    nz, ny, nx = v.shape
    my, mx = (ny // b) * b, (nx // b) * b
    return v[:, :my, :mx].astype(np.float64).reshape(nz, my // b, b, mx // b, b).mean(axis=(2, 4))


def _binned_mean(v: np.ndarray, b: int) -> np.ndarray:
    """The height map's block sums (float32) divided by b²."""
    from apextrack.projection import _bin_sums

    out = np.empty((v.shape[0], v.shape[1] // b, v.shape[2] // b), np.float32)
    _bin_sums(v, b, out)
    return out / np.float32(b * b)



@pytest.mark.parametrize("b, dtype, shape", [(4, np.uint16, (6, 64, 72)), (3, np.uint16, (5, 61, 83)),
                                            (2, np.float32, (4, 40, 37)), (1, np.uint8, (3, 20, 24)),
                                            (4, np.uint16, (2, 9, 14))])
def test_binned_volume_is_smoothed_like_scipy_gaussian_filter(b, dtype, shape):
    # reference: scipy.ndimage.gaussian_filter (σ = 1 cell along y and x, its default truncation
    # at 4 σ, mode "nearest") of the b × b block means; ours runs in float32 on a padded layout
    from scipy import ndimage as ndi

    from apextrack.projection import _PAD, _binned_smoothed

    rng = np.random.default_rng(b)
    hi = 255 if dtype == np.uint8 else 65535
    v = rng.integers(0, hi + 1, size=shape).astype(dtype)
    ref = ndi.gaussian_filter(_block_mean(v, b), (0, 1.0, 1.0), mode="nearest")
    m = _PAD
    for group in (1, 4, 100):  # slices smoothed a few at a time must not change the cells
        got = _binned_smoothed(v, b, group)[:, m:-m, m:-m]
        assert got.shape == ref.shape
        np.testing.assert_allclose(got, ref, rtol=2e-6, atol=1e-6 * hi)


def test_percentiles_match_numpy():
    # reference: numpy.percentile (default linear interpolation)
    from apextrack.projection import _percentiles

    rng = np.random.default_rng(4)
    for n in (1, 2, 7, 1000, 65537):
        a = rng.normal(size=n).astype(np.float32)
        np.testing.assert_allclose(_percentiles(a, (5.0, 50.0, 75.0)), np.percentile(a, [5.0, 50.0, 75.0]),
                                   rtol=1e-6, atol=1e-7)


def test_height_map_of_a_dome_facing_down_is_the_mirror_of_the_upright_one_for_large_volumes():
    # common practice, no source: flipping the stack along z mirrors the heights, also in a
    # volume of more than 65536 cells (background and noise from a sample of them)
    s = make_synthetic_stack(n_frames=1, shape_zyx=(24, 240, 240), z_step_um=1.0, pixel_size_um=0.8, seed=2)
    v = np.asarray(s.data[0])
    up = surface_height(v, 1.0, 0.8, up="+z")
    down = surface_height(v[::-1], 1.0, 0.8, up="-z")
    assert 24 * 80 * 80 > 65536 and up.up == 1 and down.up == -1
    np.testing.assert_array_equal(np.isfinite(up.z_um), np.isfinite(down.z_um))
    assert np.nanmax(np.abs(up.z_um + down.z_um - 23.0)) < 1e-4
