"""The command-line contract: files and columns, --overwrite, one-line errors."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import tifffile

from apextrack.cli import main
from apextrack.tables import columns_of


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("cli") / "demo"
    assert main(["analyse", "--out", str(out), "--quiet"]) == 0
    return out


def test_analyse_demo_writes_the_contract(demo_out):
    for table in ["detections", "tracks", "primordia", "divergence"]:
        df = pd.read_csv(demo_out / f"{table}.csv")
        missing = set(columns_of(table, required_only=True)) - set(df.columns)
        assert not missing, f"{table}.csv lacks {missing}"
        assert len(df) > 0
    summary = json.loads((demo_out / "summary.json").read_text())
    for key in ["n_primordia", "chirality", "divergence_mean_deg", "divergence_sd_deg",
                "plastochron_h", "plastochron_ratio", "settings"]:
        assert key in summary
    assert summary["chirality"] in ("ccw", "cw")
    run = json.loads((demo_out / "run.json").read_text())
    for key in ["version", "settings", "input_sha256", "started", "finished", "timings_s"]:
        assert key in run
    (name, digest), = run["input_sha256"].items()
    assert name.endswith(".tif") and len(digest) == 64
    # the checksum (computed in a thread of its own during the analysis) is the file's SHA-256
    # (reference: Python's hashlib, FIPS 180-4)
    import hashlib

    from apextrack.pipeline import demo_stack_path

    assert digest == hashlib.sha256(demo_stack_path().read_bytes()).hexdigest()
    prim = pd.read_csv(demo_out / "primordia.csv")
    assert prim["birth_rank"].tolist() == list(range(1, len(prim) + 1))


def test_existing_folder_needs_overwrite(demo_out, capsys):
    before = (demo_out / "primordia.csv").read_bytes()
    code = main(["analyse", "--out", str(demo_out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("apextrack: error:") and "--overwrite" in err[0]
    assert (demo_out / "primordia.csv").read_bytes() == before
    assert main(["analyse", "--out", str(demo_out), "--quiet", "--overwrite"]) == 0
    # same input and settings: the same tables, byte for byte
    assert (demo_out / "primordia.csv").read_bytes() == before


def test_not_a_tiff_is_one_line_error(tmp_path):
    bad = tmp_path / "notes.tif"
    bad.write_text("hello")
    proc = subprocess.run([sys.executable, "-m", "apextrack", "analyse", str(bad), "--out", str(tmp_path / "o")],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "notes.tif" in lines[0] and "TIFF" in lines[0]
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "o").exists()


def test_2d_image_is_refused(tmp_path, capsys):
    p = tmp_path / "one_plane.tif"
    tifffile.imwrite(p, np.zeros((64, 64), np.uint16))
    assert main(["analyse", str(p), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "single 2D image" in err[0] and "one_plane.tif" in err[0]


def test_settings_write_and_check(tmp_path, capsys):
    p = tmp_path / "s.toml"
    assert main(["settings", "--write", str(p)]) == 0
    assert main(["settings", "--check", str(p)]) == 0
    p.write_text(p.read_text() + "\nnot_a_setting = 3\n")
    assert main(["settings", "--check", str(p)]) == 2
    assert "not_a_setting" in capsys.readouterr().err
