"""Stacks larger than memory: the pipeline streams frame by frame from a memory-mapped TIFF or a
zarr array; OME-Zarr and zarr arrays are read with their scale."""

from __future__ import annotations

import gc
import tracemalloc

import numpy as np
import pandas as pd
import pytest
import tifffile

from apextrack.errors import MetadataError
from apextrack.pipeline import analyse
from apextrack.stack import StackWarning, read_stack

PIXEL_UM, INTERVAL_H, Z_UM = 1.0, 3.0, 4.0


def _synth(n_frames, shape_zyx=(16, 128, 128), seed=1):
    from apextrack.model import make_synthetic_stack

    return make_synthetic_stack(n_frames=n_frames, shape_zyx=shape_zyx, pixel_size_um=PIXEL_UM,
                                z_step_um=Z_UM, interval_h=INTERVAL_H, apex_radius_um=20, seed=seed)


@pytest.fixture(scope="module")
def long_tiff(tmp_path_factory):
    """16 timepoints of 16×128×128 uint16 (8.4 MB), uncompressed ImageJ hyperstack."""
    from apextrack.model import write_synthetic

    d = tmp_path_factory.mktemp("long")
    return write_synthetic(_synth(16), d / "glasshouse_apex.tif")["stack"]


@pytest.fixture(scope="module")
def warmed_up(tmp_path_factory, long_tiff):
    """Run the pipeline once on a short stack of frames as large as the long stack's, so that
    imports, caches and the detector's work arrays (kept per thread, sized by the frame) do
    not count as the analysis' memory."""
    from apextrack.model import write_synthetic

    d = tmp_path_factory.mktemp("warm")
    p = write_synthetic(_synth(3, (4, 128, 128), seed=2), d / "warm.tif")["stack"]
    analyse(p, out=d / "res", progress=False, bootstrap_n=50, threads=1)
    gc.collect()
    return True


def _peak_of_analysis(stack, out, **kw) -> int:
    gc.collect()
    tracemalloc.start()
    try:
        analyse(stack, out=out, progress=False, bootstrap_n=50, **kw)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def _write_ome_zarr(path, data: np.ndarray, version: str, time_unit="hour", time_step=INTERVAL_H):
    """An OME-Zarr image (OME-NGFF 0.4: zarr v2 with ``multiscales`` in the group attributes;
    0.5: zarr v3 with them under ``ome``), one chunk per timepoint."""
    import zarr

    g = zarr.open_group(str(path), mode="w", zarr_format=2 if version == "0.4" else 3)
    arr = g.create_array("0", shape=data.shape, chunks=(1,) + data.shape[1:], dtype=data.dtype)
    arr[:] = data
    ms = [{"version": version, "name": "apex",
           "axes": [{"name": "t", "type": "time", "unit": time_unit},
                    {"name": "z", "type": "space", "unit": "micrometer"},
                    {"name": "y", "type": "space", "unit": "micrometer"},
                    {"name": "x", "type": "space", "unit": "micrometer"}],
           "datasets": [{"path": "0", "coordinateTransformations": [
               {"type": "scale", "scale": [time_step, Z_UM, PIXEL_UM, PIXEL_UM]}]}]}]
    omero = {"channels": [{"label": "reporter", "color": "00FF00", "window": {"start": 0, "end": 4000}}]}
    if version == "0.4":
        g.attrs.update({"multiscales": ms, "omero": omero})
    else:
        g.attrs.update({"ome": {"version": "0.5", "multiscales": ms, "omero": omero}})
    return path


@pytest.fixture(scope="module")
def memmap_run(long_tiff, warmed_up, tmp_path_factory):
    """The long stack analysed from its memory map under tracemalloc (its first 4 frames, then
    all 16: the first run takes what is set up once, e.g. work arrays sized by the frames)."""
    d = tmp_path_factory.mktemp("runs")
    stack = read_stack(long_tiff)
    is_memmap = isinstance(stack.data, np.memmap)
    mm = tifffile.memmap(long_tiff)
    # the first 4 frames as a file of their own: read like the long stack (a memory map with a
    # path, whose checksum is taken too), so that only the number of frames differs
    first4 = d / "first4.tif"
    tifffile.imwrite(first4, np.asarray(mm[:4]), imagej=True, resolution=(1.0 / PIXEL_UM, 1.0 / PIXEL_UM),
                     metadata={"axes": "TZYX", "spacing": Z_UM, "unit": "um", "finterval": INTERVAL_H * 3600.0})
    short = read_stack(first4)
    assert short.shape == (4,) + mm.shape[1:] and short.pixel_size_um == stack.pixel_size_um
    peak4 = _peak_of_analysis(short, d / "first4", report=False, threads=1)
    peak4_2 = _peak_of_analysis(short, d / "first4_2", report=False, threads=2)
    peak16 = _peak_of_analysis(stack, d / "all", report=False, threads=1)
    peak16_2 = _peak_of_analysis(stack, d / "all2", report=False, threads=2)
    return {"out": d / "all", "peak16": peak16, "peak16_2threads": peak16_2, "peak4": peak4,
            "peak4_2threads": peak4_2,
            "nbytes": stack.nbytes, "frame_bytes": mm[0].nbytes, "is_memmap": is_memmap}


def test_memory_mapped_stack_is_not_loaded_whole(memmap_run):
    assert memmap_run["is_memmap"]
    # the analysis holds far less than the 8.4 MB stack at any time (the report, drawn from the
    # tables and one top-view frame, needs a fixed few MB for its figures, whatever T)
    assert memmap_run["peak16"] < memmap_run["nbytes"] / 2, memmap_run


def test_peak_memory_with_two_threads_does_not_grow_with_frames(memmap_run):
    # two threads hold one more frame in flight (its volume, float32 intermediates and the
    # second thread's detector work arrays) and a top view being warped: a bounded amount,
    # whose peak depends on how the threads happen to overlap (so up to a few frames more on
    # some runs), never the 12 frames (6 MB) more that holding the frames would take
    assert memmap_run["peak16_2threads"] - memmap_run["peak4_2threads"] < 6 * memmap_run["frame_bytes"], memmap_run


def test_peak_memory_does_not_grow_with_frames(memmap_run):
    # 4× the frames: the peak grows only by the (small) tables, not by the frames
    assert memmap_run["peak16"] - memmap_run["peak4"] < 2 * memmap_run["frame_bytes"], memmap_run


def test_topview_file_is_written_frame_by_frame(long_tiff, memmap_run):
    with tifffile.TiffFile(memmap_run["out"] / "topview.tif") as tif:
        s = tif.series[0]
        assert s.axes == "TYX" and s.shape == (16, 128, 128) and s.dtype == np.float32
        assert tif.imagej_metadata["finterval"] == pytest.approx(INTERVAL_H * 3600)
        assert 1.0 / tif.pages[0].resolution[0] == pytest.approx(PIXEL_UM)
        views = tif.asarray()
    raw = tifffile.imread(long_tiff)
    assert np.isfinite(views).all()
    for t in (0, 7, 15):
        # the top view may be registered (shifted, rotated), so compare levels, not pixels: the
        # background and the bright primordia of numpy's maximum over z are kept
        ref = raw[t].max(axis=0).astype(float)
        for q in (50, 99):
            assert np.percentile(views[t], q) == pytest.approx(np.percentile(ref, q), rel=0.25), (t, q)


def test_ome_zarr_is_read_with_its_scale_and_streams(long_tiff, memmap_run, tmp_path):
    raw = tifffile.imread(long_tiff)
    for version in ("0.5", "0.4"):
        path = _write_ome_zarr(tmp_path / f"apex_{version}.zarr", raw, version)
        stack = read_stack(path)
        assert stack.axes == "TZYX" and stack.shape == raw.shape, version
        assert stack.pixel_size_um == (PIXEL_UM, PIXEL_UM, Z_UM) and stack.interval_h == INTERVAL_H, version
        assert stack.channel_names == ["reporter"] and not stack.warnings, version
        assert np.array_equal(stack.timepoint(5), raw[5]), version
    # zarr-backed (one chunk per timepoint): streams like the memory map
    peak = _peak_of_analysis(stack, tmp_path / "res", report=False, threads=1)
    assert peak < stack.nbytes / 2, (peak, stack.nbytes)
    # same pixels, same scale → the same detections as from the TIFF
    from_zarr = pd.read_csv(tmp_path / "res" / "detections.csv")
    from_tiff = pd.read_csv(memmap_run["out"] / "detections.csv")
    pd.testing.assert_frame_equal(from_zarr, from_tiff)


def test_ome_zarr_time_units(tmp_path):
    small = np.zeros((3, 2, 16, 16), np.uint16)
    # OME-NGFF axis units are UDUNITS-2 names: 180 minutes = 3 h
    st = read_stack(_write_ome_zarr(tmp_path / "min.zarr", small, "0.4", "minute", 180.0))
    assert st.interval_h == pytest.approx(3.0)
    st = read_stack(_write_ome_zarr(tmp_path / "ms.zarr", small, "0.4", "millisecond", 3.6e6))
    assert st.interval_h == pytest.approx(1.0)
    # an unknown unit is not guessed silently
    with pytest.warns(StackWarning, match="frame interval not in the file"):
        st = read_stack(_write_ome_zarr(tmp_path / "odd.zarr", small, "0.4", "fortnight", 1.0))


def test_plain_zarr_arrays(tmp_path):
    import zarr

    data = np.arange(3 * 2 * 8 * 8, dtype=np.uint16).reshape(3, 2, 8, 8)
    a = zarr.create_array(str(tmp_path / "attr.zarr"), shape=data.shape, chunks=(1, 2, 8, 8), dtype=data.dtype)
    a[:] = data
    a.attrs["axes"] = "TZYX"
    st = read_stack(tmp_path / "attr.zarr", pixel_size_um=0.5, z_step_um=2.0, interval_h=1.5)
    assert st.axes == "TZYX" and np.array_equal(st.timepoint(2), data[2])
    # zarr v3 dimension names (zarr specification v3, "dimension_names")
    b = zarr.create_array(str(tmp_path / "named.zarr"), shape=(2, 8, 8, 3), chunks=(1, 8, 8, 3), dtype="u2",
                          dimension_names=["t", "y", "x", "c"])
    b[:] = np.arange(2 * 8 * 8 * 3, dtype=np.uint16).reshape(2, 8, 8, 3)
    st = read_stack(tmp_path / "named.zarr", pixel_size_um=1.0, interval_h=1.0)
    assert st.axes == "TCYX" and st.n_channels == 3
    assert np.array_equal(st.frame(1, 2), b[1, :, :, 2].astype(np.float32))
    # an array that does not say its axes is refused with a hint
    zarr.create_array(str(tmp_path / "bare.zarr"), shape=(2, 8, 8), dtype="u2")
    with pytest.raises(MetadataError, match="does not say its axes"):
        read_stack(tmp_path / "bare.zarr")
