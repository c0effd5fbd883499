"""Settings: every parameter documented, TOML round trip, clear errors, reproducible runs."""

from __future__ import annotations

import dataclasses
import json
import math
import tomllib

import pytest

from apextrack import settings as st
from apextrack.cli import main
from apextrack.errors import SettingsError
from apextrack.settings import Settings


@pytest.fixture(scope="module")
def tiny_stack(tmp_path_factory):
    from apextrack.model import make_synthetic_stack, write_synthetic

    d = tmp_path_factory.mktemp("stack")
    synth = make_synthetic_stack(n_frames=5, shape_zyx=(5, 64, 64), pixel_size_um=1.0, apex_radius_um=14, seed=3)
    return write_synthetic(synth, d / "meadow_plant.tif")["stack"]


def test_every_setting_has_default_unit_and_meaning_in_the_file():
    text = st.to_toml()
    # the written file is TOML 1.0.0 (toml.io) as read by the standard library's tomllib
    parsed = tomllib.loads(text)
    lines = text.splitlines()
    for f in dataclasses.fields(Settings):
        assert f.metadata["meaning"], f.name
        assert f.name in parsed, f.name
        i = next(k for k, line in enumerate(lines) if line.startswith(f"{f.name} = "))
        comment = lines[i - 1]
        assert comment.startswith("# ") and f.metadata["meaning"] in comment, f.name
        if f.metadata["unit"]:
            assert comment.endswith(f"[{f.metadata['unit']}]"), f.name


def test_defaults_round_trip_exactly(tmp_path):
    p = st.save(Settings(), tmp_path / "defaults.toml")
    back = st.load(p)
    assert back == Settings()
    # floats are written with repr: bit-exact (the golden angle default included)
    assert back.expected_angle_deg == Settings().expected_angle_deg
    assert st.load(p).to_dict() == Settings().to_dict()


def test_changed_values_round_trip(tmp_path):
    s = Settings(channel="reporter", pixel_size_um=0.2075, interval_h=2.5, centre_um=(51.25, 48.0),
                 projection="surface", min_snr=3.25, link_memory=4, co_initiation_h=0.75, bootstrap_n=300,
                 seed=17, parastichy_frame=3, report=False, report_frame=2, time_axis="Z")
    back = st.load(st.save(s, tmp_path / "custom.toml"))
    assert back == s
    assert back.centre_um == (51.25, 48.0) and isinstance(back.centre_um, tuple)
    # a channel given by index stays an index
    s2 = Settings(channel=1)
    assert st.load(st.save(s2, tmp_path / "idx.toml")).channel == 1


def test_settings_table_and_partial_file(tmp_path):
    p = tmp_path / "partial.toml"
    p.write_text("[settings]\nmin_snr = 6.5\nlink_memory = 0\n", encoding="utf-8")
    s = st.load(p)
    assert s.min_snr == 6.5 and s.link_memory == 0
    assert s.replace(min_snr=Settings().min_snr, link_memory=Settings().link_memory) == Settings()


@pytest.mark.parametrize("line, key", [
    ("primordium_diamter_min_um = 5.0", "primordium_diamter_min_um"),   # misspelt
    ("n_scales = \"six\"", "n_scales"),                                   # text for a whole number
    ("n_scales = 2.5", "n_scales"),                                       # fraction for a whole number
    ("min_snr = true", "min_snr"),                                        # boolean for a number
    ("report = 3", "report"),                                             # number for a boolean
    ("projection = \"mean\"", "projection"),                              # not one of the choices
    ("confidence = 1.5", "confidence"),                                   # out of range
    ("centre_um = [1.0]", "centre_um"),                                   # pair with one value
    ("link_search_um = \"far\"", "link_search_um"),
])
def test_unknown_or_badly_typed_key_is_a_clear_error(tmp_path, line, key):
    p = tmp_path / "bad.toml"
    p.write_text(line + "\n", encoding="utf-8")
    with pytest.raises(SettingsError) as info:
        st.load(p)
    msg = str(info.value)
    assert f"'{key}'" in msg
    assert str(p) in msg
    assert "\n" not in msg


def test_broken_toml_and_missing_file(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("min_snr = = 3\n", encoding="utf-8")
    with pytest.raises(SettingsError, match="not a valid TOML file"):
        st.load(p)
    with pytest.raises(SettingsError, match="not found"):
        st.load(tmp_path / "nowhere.toml")


def test_cli_settings_write_and_check(tmp_path, capsys):
    p = tmp_path / "mine.toml"
    assert main(["settings", "--write", str(p)]) == 0
    assert st.load(p) == Settings()
    assert main(["settings", "--write", str(p)]) == 2          # refuses to replace
    assert "file exists" in capsys.readouterr().err
    assert main(["settings", "--write", str(p), "--overwrite"]) == 0
    assert main(["settings", "--check", str(p)]) == 0
    bad = tmp_path / "bad.toml"
    bad.write_text("min_snrr = 3\n", encoding="utf-8")
    assert main(["settings", "--check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "min_snrr" in err and err.count("\n") == 1


def test_run_record_holds_settings_that_reproduce_the_run(tmp_path, tiny_stack, capsys):
    cfg = tmp_path / "run.toml"
    cfg.write_text(st.to_toml(Settings(min_snr=3.5, bootstrap_n=150, seed=11, report=False, link_memory=1)),
                   encoding="utf-8")
    out1 = tmp_path / "first"
    assert main(["analyse", str(tiny_stack), "--out", str(out1), "--settings", str(cfg), "--quiet"]) == 0
    run = json.loads((out1 / "run.json").read_text(encoding="utf-8"))
    recorded = st.from_dict(run["settings"])
    # the file's values (and the pixel size/interval taken from the file's metadata, left unset)
    assert recorded == st.load(cfg)
    assert set(run["settings"]) == {f.name for f in dataclasses.fields(Settings)}
    assert not (out1 / "report.html").exists()                   # report = false was honoured
    # re-running with the recorded settings gives the same tables, byte for byte
    again = tmp_path / "again.toml"
    st.save(recorded, again)
    out2 = tmp_path / "second"
    assert main(["analyse", str(tiny_stack), "--out", str(out2), "--settings", str(again), "--quiet"]) == 0
    for name in ("detections", "tracks", "primordia", "divergence", "centres"):
        assert (out1 / f"{name}.csv").read_bytes() == (out2 / f"{name}.csv").read_bytes(), name
    s1 = json.loads((out1 / "summary.json").read_text(encoding="utf-8"))
    s2 = json.loads((out2 / "summary.json").read_text(encoding="utf-8"))
    assert s1 == s2


def test_command_line_options_override_the_file(tmp_path, tiny_stack):
    cfg = tmp_path / "run.toml"
    cfg.write_text("min_snr = 3.5\nreport = false\nbootstrap_n = 50\n", encoding="utf-8")
    out = tmp_path / "res"
    assert main(["analyse", str(tiny_stack), "--out", str(out), "--settings", str(cfg), "--min-snr", "5",
                 "--quiet"]) == 0
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    assert math.isclose(run["settings"]["min_snr"], 5.0)
    assert run["settings"]["bootstrap_n"] == 50
