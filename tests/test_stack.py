"""Reading stacks: ImageJ, OME, plain and folder inputs round-trip axes, µm and hours.

Fixtures are written with tifffile (a general-purpose reference library) following its
documented ImageJ and OME metadata conventions; the reader must give the same values back.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import tifffile

from apextrack.errors import InputError, MetadataError
from apextrack.stack import StackWarning, from_array, read_stack


def test_imagej_hyperstack_round_trip(tmp_path, small_stack_array):
    p = tmp_path / "apex_imagej.tif"
    tifffile.imwrite(p, small_stack_array, imagej=True, resolution=(1 / 0.25, 1 / 0.25),
                     metadata={"axes": "TZCYX", "spacing": 1.5, "unit": "um", "finterval": 3 * 3600.0,
                               "Labels": ["venus", "membrane"] * 12})
    with warnings.catch_warnings():
        warnings.simplefilter("error", StackWarning)
        s = read_stack(p)
    assert s.axes == "TZCYX"
    assert s.shape == small_stack_array.shape
    assert s.pixel_size_um[0] == pytest.approx(0.25)
    assert s.pixel_size_um[1] == pytest.approx(0.25)
    assert s.pixel_size_um[2] == pytest.approx(1.5)
    assert s.interval_h == pytest.approx(3.0)
    assert s.channel_names == ["venus", "membrane"]
    assert s.source_format == "imagej"
    # lazy: memory-mapped, not read into memory
    assert isinstance(s.data, np.memmap)
    np.testing.assert_array_equal(s.frame(2, "membrane"), small_stack_array[2, :, 1].astype(np.float32))
    np.testing.assert_array_equal(s.frame(3, 0), small_stack_array[3, :, 0].astype(np.float32))
    s.close()


def test_imagej_nanometre_unit(tmp_path, small_stack_array):
    p = tmp_path / "nm.tif"
    tifffile.imwrite(p, small_stack_array[:, :, 0], imagej=True, resolution=(1 / 250.0, 1 / 250.0),
                     metadata={"axes": "TZYX", "spacing": 1000.0, "unit": "nm", "finterval": 1800.0})
    s = read_stack(p)
    assert s.pixel_size_um[:2] == pytest.approx((0.25, 0.25))
    assert s.pixel_size_um[2] == pytest.approx(1.0)
    assert s.interval_h == pytest.approx(0.5)


def test_ome_tiff_round_trip(tmp_path, small_stack_array):
    p = tmp_path / "apex.ome.tif"
    tifffile.imwrite(p, small_stack_array, ome=True, photometric="minisblack",
                     metadata={"axes": "TZCYX", "PhysicalSizeX": 0.4, "PhysicalSizeY": 0.4,
                               "PhysicalSizeZ": 2.0, "TimeIncrement": 120.0, "TimeIncrementUnit": "min",
                               "Channel": {"Name": ["reporter", "membrane"]}})
    s = read_stack(p)
    assert s.axes == "TZCYX" and s.source_format == "ome-tiff"
    assert s.pixel_size_um == pytest.approx((0.4, 0.4, 2.0))
    assert s.interval_h == pytest.approx(2.0)
    assert s.channel_names == ["reporter", "membrane"]
    np.testing.assert_array_equal(s.frame(1, "reporter"), small_stack_array[1, :, 0])


def test_ome_tiff_other_axis_order(tmp_path, small_stack_array):
    # OME DimensionOrder other than the canonical one: ZTYX on disk
    data = np.ascontiguousarray(np.transpose(small_stack_array[:, :, 0], (1, 0, 2, 3)))
    p = tmp_path / "zt.ome.tif"
    tifffile.imwrite(p, data, ome=True, photometric="minisblack",
                     metadata={"axes": "ZTYX", "PhysicalSizeX": 0.5, "PhysicalSizeY": 0.5,
                               "PhysicalSizeZ": 1.0, "TimeIncrement": 3600.0, "TimeIncrementUnit": "s"})
    s = read_stack(p)
    assert s.axes == "TZYX"
    assert s.n_frames == 4
    np.testing.assert_array_equal(s.frame(2), small_stack_array[2, :, 0])


def test_plain_multipage_tiff_guesses_with_warning(tmp_path, small_stack_array):
    p = tmp_path / "plain.tif"
    data = small_stack_array[:, 0, 0]
    tifffile.imwrite(p, data, photometric="minisblack", metadata=None)
    with pytest.warns(StackWarning):
        s = read_stack(p)
    assert s.axes == "TYX" and s.n_frames == 4
    assert s.pixel_size_um[0] == 1.0 and s.interval_h == 1.0
    s2 = read_stack(p, pixel_size_um=0.3, interval_h=4.0)
    assert s2.pixel_size_um[0] == 0.3 and s2.interval_h == 4.0
    np.testing.assert_array_equal(s2.frame(3), data[3])


def test_plain_tiff_resolution_tag_in_centimetres(tmp_path, small_stack_array):
    # TIFF 6.0 baseline: ResolutionUnit 3 = centimetre; 40000 px/cm = 0.25 µm/px
    p = tmp_path / "cm.tif"
    tifffile.imwrite(p, small_stack_array[:, 0, 0], photometric="minisblack", metadata=None,
                     resolution=(40000, 40000), resolutionunit="CENTIMETER")
    s = read_stack(p, interval_h=1)
    assert s.pixel_size_um[0] == pytest.approx(0.25)


def test_folder_of_timepoints_sorted_numerically(tmp_path, small_stack_array):
    folder = tmp_path / "series"
    folder.mkdir()
    vols = small_stack_array[:, :, 0]
    names = ["apex_t1.tif", "apex_t2.tif", "apex_t10.tif", "apex_t3.tif"]
    order = [0, 1, 3, 2]  # t1, t2, t10 -> last, t3
    for name, k in zip(names, order):
        tifffile.imwrite(folder / name, vols[k], imagej=True, resolution=(2.0, 2.0),
                         metadata={"axes": "ZYX", "spacing": 2.0, "unit": "um"})
    s = read_stack(folder, interval_h=2.5)
    assert s.axes == "TZYX" and s.n_frames == 4
    assert s.pixel_size_um == pytest.approx((0.5, 0.5, 2.0))
    for t in range(4):
        np.testing.assert_array_equal(s.frame(t), vols[t])


def test_array_source_and_channel_errors(small_stack_array):
    s = from_array(small_stack_array, "TZCYX", pixel_size_um=0.5, interval_h=2.0)
    assert s.channel_names == ["ch0", "ch1"]
    with pytest.raises(InputError, match="no channel named 'gfp'"):
        s.frame(0, "gfp")
    with pytest.raises(InputError, match="out of range"):
        s.frame(0, 5)


def test_refuses_2d_image_and_stack_without_time(tmp_path):
    p = tmp_path / "single.tif"
    tifffile.imwrite(p, np.zeros((32, 32), np.uint16))
    with pytest.raises(InputError, match="single 2D image"):
        read_stack(p)
    q = tmp_path / "zstack.tif"
    tifffile.imwrite(q, np.zeros((5, 32, 32), np.uint16), imagej=True, metadata={"axes": "ZYX"})
    with pytest.raises(InputError, match="no time axis"):
        read_stack(q)
    # unless the user says which axis is time
    s = read_stack(q, time_axis="Z", pixel_size_um=1, interval_h=1)
    assert s.axes == "TYX" and s.n_frames == 5


def test_not_a_tiff_and_empty(tmp_path):
    p = tmp_path / "notes.tif"
    p.write_text("this is not an image")
    with pytest.raises(InputError, match="not a readable TIFF"):
        read_stack(p)
    e = tmp_path / "empty.tif"
    e.write_bytes(b"")
    with pytest.raises(InputError, match="empty"):
        read_stack(e)


def test_bad_metadata_values(tmp_path, small_stack_array):
    p = tmp_path / "x.tif"
    tifffile.imwrite(p, small_stack_array[:, 0, 0], photometric="minisblack")
    with pytest.raises(MetadataError, match="positive"):
        read_stack(p, pixel_size_um=0)
    with pytest.raises(MetadataError, match="positive"):
        read_stack(p, interval_h=-1)


def test_nan_frame_is_refused():
    a = np.zeros((3, 16, 16), np.float32)
    a[1, 3, 3] = np.nan
    s = from_array(a, "TYX")
    s.frame(0)
    with pytest.raises(InputError, match="NaN"):
        s.frame(1)
    assert math.isnan(s.pixel_size_um[2])


@pytest.mark.parametrize("byteorder", ["<", ">"])
def test_frames_read_from_a_mapped_file_equal_the_reference_reader(tmp_path, byteorder):
    """Frames of a memory-mapped stack are read from the file by positional reads (not copied
    out of the map): the values must equal tifffile's (the reference reader), channel by
    channel, in either byte order; a frame that is not contiguous in the file falls back to
    copying out of the map."""
    from apextrack.stack import _read_mapped

    rng = np.random.default_rng(7)
    data = rng.integers(0, 65535, size=(3, 4, 2, 16, 24), dtype=np.uint16)  # T Z C Y X
    path = tmp_path / "hyper.tif"
    tifffile.imwrite(path, data, imagej=True, byteorder=byteorder, metadata={"axes": "TZCYX"})
    ref = tifffile.imread(path)
    st = read_stack(path)
    assert isinstance(st.data, np.memmap)
    for t in range(3):
        for c in range(2):
            np.testing.assert_array_equal(st.frame(t, c, native=True), ref[t, :, c])
    # a view that is not contiguous: no positional read, the caller copies from the map
    assert _read_mapped(st.data, st.data[:, 0]) is None
    # the positional read itself, not the fallback, gave the frames above
    whole = _read_mapped(st.data, st.data[1])
    assert whole is not None and whole.dtype == st.data.dtype
    np.testing.assert_array_equal(whole, np.asarray(st.data[1]))
