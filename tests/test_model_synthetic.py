"""Synthetic stacks: the public API, TIFF metadata round trip, truth tables, demo stacks."""

import math

import numpy as np
import pandas as pd
import pytest
import tifffile

from apextrack.errors import InputError, OutputError
from apextrack.model import (GOLDEN_ANGLE_DEG, demo_stack_path, make_synthetic_stack,
                             write_synthetic)
from apextrack.tables import read_json, read_table


def _read_meta(path):
    with tifffile.TiffFile(path) as tif:
        s = tif.series[0]
        ij = tif.imagej_metadata
        res = tif.pages[0].resolution
        return s.axes, s.shape, s.dtype, ij, res


@pytest.mark.parametrize("membrane", [False, True])
def test_imagej_metadata_round_trips_through_tifffile(tmp_path, membrane):
    # reference: tifffile (general-purpose library) reading the ImageJ hyperstack back
    s = make_synthetic_stack(n_frames=3, shape_zyx=(5, 40, 48), pixel_size_um=0.65, z_step_um=2.5,
                             interval_h=2.5, apex_radius_um=9.0, membrane=membrane)
    paths = write_synthetic(s, tmp_path / "run.tif")
    axes, shape, dtype, ij, res = _read_meta(paths["stack"])
    assert axes == s.axes == ("TZCYX" if membrane else "TZYX")
    assert shape == s.data.shape and dtype == np.uint16
    assert 1.0 / res[0] == pytest.approx(0.65) and 1.0 / res[1] == pytest.approx(0.65)
    assert ij["spacing"] == pytest.approx(2.5)
    assert ij["finterval"] == pytest.approx(2.5 * 3600.0)
    assert ij["unit"] in ("um", "micron", "\\u00B5m")
    labels = ij.get("Labels")
    assert labels[: len(s.channel_names)] == s.channel_names
    assert np.array_equal(tifffile.imread(paths["stack"]), s.data)
    # uncompressed: memory-mappable (tifffile)
    assert np.array_equal(np.asarray(tifffile.memmap(paths["stack"])), s.data)


def test_truth_tables_are_written_and_read_back(tmp_path):
    s = make_synthetic_stack(n_frames=4, shape_zyx=(5, 48, 48), apex_radius_um=10.0)
    paths = write_synthetic(s, tmp_path / "apex_a.tif")
    assert paths["truth"].name == "apex_a_truth.csv" and paths["primordia"].name == "apex_a_primordia.csv"
    prim = read_table(paths["primordia"], "primordia")
    for col in ("birth_rank", "track_id", "emergence_time_h", "emergence_frame", "x_um", "y_um",
                "r_um", "theta_deg", "co_initiated"):
        assert np.array_equal(prim[col].to_numpy(), s.primordia[col].to_numpy()), col
    truth = pd.read_csv(paths["truth"])
    assert list(truth.columns)[:12] == ["primordium", "birth_rank", "birth_time_h", "frame", "time_h", "x_um",
                                        "y_um", "z_um", "r_um", "theta_deg", "radius_um", "visible"]
    assert np.array_equal(truth["x_um"].to_numpy(), s.truth["x_um"].to_numpy())
    assert truth["visible"].dtype == bool
    params = read_json(paths["params"])
    assert params["pixel_size_um"] == s.pixel_size_um
    assert params["centre_um"]["x_um"] == s.centre_um["x_um"].tolist()
    with pytest.raises(OutputError):
        write_synthetic(s, tmp_path / "apex_a.png")


def test_default_stack_is_a_realistic_golden_spiral():
    s = make_synthetic_stack(n_frames=12, shape_zyx=(8, 96, 96))
    assert s.data.shape == (12, 8, 96, 96) and s.data.dtype == np.uint16 and s.axes == "TZYX"
    assert s.interval_h == 3.0 and s.channel_names == ["reporter"]
    p = s.primordia.sort_values("birth_rank")
    assert p["birth_rank"].tolist() == list(range(1, len(p) + 1))
    assert len(p) >= 8
    # successive azimuths differ by the golden angle; births one plastochron apart
    assert np.allclose(np.mod(np.diff(p["theta_deg"]), 360.0), GOLDEN_ANGLE_DEG)
    assert np.allclose(np.diff(p["emergence_time_h"]), 6.0)
    # plastochron ratio 1.12 (Arabidopsis-like; reported 1.08–1.15 for wild-type inflorescence
    # meristems, Refahi et al. 2016, eLife 5:e14093)
    assert s.params["plastochron_ratio"] == pytest.approx(1.12)
    # every primordium's emergence frame is the first frame at or after its birth in which it is seen
    t = s.truth
    for r in p.itertuples():
        rows = t[(t["primordium"] == r.primordium) & t["visible"]]
        assert r.emergence_frame == rows["frame"].min()
        assert r.emergence_time_h <= rows["time_h"].min()
        if r.emergence_time_h >= 0:
            assert r.emergence_frame == math.ceil(r.emergence_time_h / s.interval_h)
    # older primordia are farther out in the first frame
    f0 = t[t["frame"] == 0].sort_values("birth_rank")
    assert np.all(np.diff(f0["r_um"]) < 0)


def test_history_from_a_table_is_rendered_as_given():
    hist = pd.DataFrame({"birth_time_h": [-4.0, 2.0, 2.0, 9.0], "theta_deg": [10.0, 100.0, 280.0, 190.0]})
    s = make_synthetic_stack(n_frames=5, shape_zyx=(5, 64, 64), apex_radius_um=12.0, history=hist)
    p = s.primordia
    assert p["theta_deg"].tolist() == [10.0, 100.0, 280.0, 190.0]
    assert p["co_initiated"].tolist() == [False, True, True, False]
    assert p["emergence_frame"].tolist() == [0, 1, 1, 3]


@pytest.mark.parametrize("name", ["spiral", "distichous"])
def test_demo_stacks_are_bundled_current_and_readable(name):
    path = demo_stack_path(name)
    assert path.exists()
    axes, shape, dtype, ij, res = _read_meta(path)
    prim = read_table(path.with_name(path.stem + "_primordia.csv"), "primordia")
    truth = pd.read_csv(path.with_name(path.stem + "_truth.csv"))
    params = read_json(path.with_name(path.stem + "_params.json"))
    assert shape == tuple(params["shape"]) and axes == params["axes"]
    assert 1.0 / res[0] == pytest.approx(params["pixel_size_um"])
    assert ij["finterval"] == pytest.approx(params["interval_h"] * 3600.0)
    if name == "spiral":
        assert axes == "TZYX" and 12 <= shape[0] <= 16
        assert len(prim) >= 10
        d = np.mod(np.diff(prim.sort_values("birth_rank")["theta_deg"]), 360.0)
        assert np.allclose(d, GOLDEN_ANGLE_DEG)
    else:
        assert axes == "TZCYX" and ij["Labels"][:2] == ["reporter", "membrane"]
        d = np.mod(np.diff(prim.sort_values("birth_rank")["theta_deg"]), 360.0)
        assert np.allclose(d, 180.0)
    # the committed files are what the generator makes now (same seed, same arguments)
    import importlib.util
    from pathlib import Path
    script = Path(__file__).resolve().parent.parent / "sample_stacks" / "make_demo.py"
    if script.exists():
        spec = importlib.util.spec_from_file_location("make_demo", script)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        s = make_synthetic_stack(**mod.DEMOS[path.name])
        assert np.array_equal(s.data, tifffile.imread(path))
        assert np.allclose(s.truth["x_um"].to_numpy(), truth["x_um"].to_numpy(), rtol=0, atol=1e-12)
    with pytest.raises(InputError):
        demo_stack_path("no-such-demo")


def test_ome_tiff_metadata_round_trips(tmp_path):
    # reference: tifffile's OME-XML reader (OME data model: PhysicalSize*, TimeIncrement)
    s = make_synthetic_stack(n_frames=3, shape_zyx=(4, 40, 40), pixel_size_um=0.7, z_step_um=3.0,
                             interval_h=2.0, apex_radius_um=9.0, membrane=True)
    paths = write_synthetic(s, tmp_path / "run.ome.tif")
    assert paths["truth"].name == "run_truth.csv"
    with tifffile.TiffFile(paths["stack"]) as tif:
        assert tif.is_ome
        assert tif.series[0].axes == "TZCYX" and tif.series[0].shape == s.data.shape
        pix = tifffile.xml2dict(tif.ome_metadata)["OME"]["Image"]["Pixels"]
    assert float(pix["PhysicalSizeX"]) == pytest.approx(0.7)
    assert float(pix["PhysicalSizeZ"]) == pytest.approx(3.0)
    assert float(pix["TimeIncrement"]) == pytest.approx(7200.0)
    assert [c["Name"] for c in pix["Channel"]] == ["reporter", "membrane"]
    assert np.array_equal(tifffile.imread(paths["stack"]), s.data)


def test_any_primordia_table_can_be_rendered():
    prim = pd.DataFrame({"birth_rank": [1, 2, 3], "emergence_time_h": [-6.0, 0.5, 7.0],
                         "theta_deg": [30.0, 167.5, 305.0], "co_initiated": [False] * 3})
    s = make_synthetic_stack(n_frames=4, shape_zyx=(5, 64, 64), apex_radius_um=12.0, history=prim)
    assert s.primordia["theta_deg"].tolist() == [30.0, 167.5, 305.0]
    assert s.primordia["emergence_time_h"].tolist() == [-6.0, 0.5, 7.0]
