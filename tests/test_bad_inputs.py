"""Every bad input gives one clear line, exit code 2 and no traceback.

The corpus is ``tests/bad_inputs/cases.py`` (one entry per kind of mistake: the command, how
its input is made, the expected exit code and message fragments). Each case is run through
``apextrack.cli.main`` in-process; a few are also run as a real ``apextrack`` process to check
that nothing else (library logs, warnings) reaches stderr. Commands that do not exist yet are
skipped with the reason, not dropped. The expected behaviours are project decisions (common
practice for command-line tools, no external source): one line on stderr, exit code 2 for a
user error.
"""

from __future__ import annotations

import json
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest

from apextrack.cli import build_parser, main
from apextrack.errors import ApextrackError, MetadataError, ResultsError
from bad_inputs import cases  # the corpus of bad inputs (tests/bad_inputs/cases.py)




def _commands() -> set[str]:
    parser = build_parser()
    for action in parser._actions:
        if getattr(action, "choices", None) and isinstance(action.choices, dict):
            return set(action.choices)
    return set()


COMMANDS = _commands()


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    folder = tmp_path_factory.mktemp("good")
    return cases.make_good_inputs(folder)


@pytest.fixture
def ctx(good, tmp_path):
    stack, results, truth = good
    return cases.Ctx(tmp=tmp_path, good_stack=stack, good_results=results, truth=truth)


def _param(case):
    marks = list(case.marks)
    if case.command not in COMMANDS:
        marks.append(pytest.mark.skip(reason=f"'apextrack {case.command}' does not exist yet; the case is kept "
                                             f"so that it runs as soon as the command is added"))
    return pytest.param(case, id=case.kind, marks=marks)


def _run_cli(argv, capsys) -> tuple[int, list[str], str]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            code = main(argv)
        except SystemExit as exc:  # argparse usage errors
            code = exc.code
    out = capsys.readouterr()
    return code, [line for line in out.err.splitlines() if line.strip()], out.out


def _check_error_line(lines, named, fragments, code, expected_code):
    assert code == expected_code, f"exit code {code}, stderr: {lines}"
    assert len(lines) == 1, f"expected exactly one stderr line, got {len(lines)}: {lines}"
    line = lines[0]
    assert line.startswith("apextrack: error: "), line
    assert "Traceback" not in line
    assert str(named) in line, f"the message does not name {named}: {line}"
    for frag in fragments:
        assert frag.lower() in line.lower(), f"'{frag}' not in: {line}"
    assert " — " in line, f"no hint after the message: {line}"


def test_the_corpus_covers_every_kind_the_issue_names():
    kinds = {c.kind for c in cases.CASES}
    assert len(kinds) == len(cases.CASES), "case kinds must be unique"
    required = {"not_a_tiff", "truncated_tiff", "empty_file", "folder_without_tiffs", "image_2d", "no_time_axis",
                "ambiguous_axes", "unknown_channel_name", "channel_index_out_of_range", "zero_pixel_size_option",
                "negative_interval_option", "constant_image", "nan_in_float_data", "single_timepoint_folder",
                "no_primordia_found", "centre_outside_image", "output_under_a_file",
                "existing_results_without_overwrite", "settings_unknown_key", "settings_bad_type",
                "settings_out_of_range", "results_missing_table_compare", "results_renamed_column_compare",
                "results_pixel_units_compare", "results_missing_table_view", "results_pixel_units_view"}
    assert required <= kinds, sorted(required - kinds)
    assert len(kinds) >= 25


@pytest.mark.parametrize("case", [_param(c) for c in cases.CASES if c.command != "view"])
def test_bad_input_gives_one_line(case, ctx, capsys):
    argv, named = case.build(ctx)
    code, lines, _ = _run_cli(argv, capsys)
    _check_error_line(lines, named, case.fragments, code, case.exit_code)


@pytest.mark.parametrize("case", [_param(c) for c in cases.CASES if c.command == "view"])
def test_bad_results_folder_for_view(case, ctx, capsys, monkeypatch):
    # a viewer must never open on a bad folder: opening one fails the test instead of blocking
    napari = pytest.importorskip("napari")

    def no_window(*a, **k):
        raise AssertionError("a napari window was opened for a bad folder")

    monkeypatch.setattr(napari, "Viewer", no_window)
    argv, named = case.build(ctx)
    code, lines, _ = _run_cli(argv, capsys)
    _check_error_line(lines, named, case.fragments, code, case.exit_code)


@pytest.mark.parametrize("kind", ["truncated_tiff", "ambiguous_axes", "results_pixel_units_score"])
def test_real_process_prints_only_the_error(kind, ctx):
    # the whole program, as a user runs it: library logs and warnings must not reach stderr
    case = next(c for c in cases.CASES if c.kind == kind)
    if case.command not in COMMANDS:
        pytest.skip(f"'apextrack {case.command}' does not exist yet")
    argv, named = case.build(ctx)
    proc = subprocess.run([sys.executable, "-m", "apextrack", *argv], capture_output=True, text=True, timeout=120)
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    _check_error_line(lines, named, case.fragments, proc.returncode, case.exit_code)


def test_internal_error_exit_1_and_debug_shows_traceback(ctx, capsys, monkeypatch):
    import apextrack.pipeline as pipeline

    def broken(*a, **k):
        raise ZeroDivisionError("a bug")

    monkeypatch.setattr(pipeline, "measure_tracks", broken)
    argv = ["analyse", str(ctx.good_stack), "--out", str(ctx.tmp / "r"), "--quiet"]
    code, lines, _ = _run_cli(argv, capsys)
    assert code == 1
    assert len(lines) == 1 and lines[0].startswith("apextrack: internal error: ZeroDivisionError")
    with pytest.raises(ZeroDivisionError):
        main(["--debug", *argv])


def test_user_error_with_debug_raises_the_library_error(ctx):
    with pytest.raises(ApextrackError):
        main(["--debug", "analyse", str(cases.HERE / "not_a_tiff.tif"), "--out", str(ctx.tmp / "r"), "-q"])


# ----------------------------------------------------------------------------------------------
# results folders through the library (the commands call these)
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize("edit", sorted(cases.RESULT_EDITS))
def test_spoiled_results_folder_is_refused_by_every_reader(edit, ctx):
    from apextrack.comparison import read_result_folder
    from apextrack.results import load_results
    from apextrack.scoring import score_results

    fn, fragments = cases.RESULT_EDITS[edit]
    folder, named = cases._spoiled(ctx, fn)
    readers = [load_results, read_result_folder]
    if named.name in ("tracks.csv", "primordia.csv"):
        readers.append(lambda f: score_results(f, ctx.truth))
    for read in readers:
        with pytest.raises(ResultsError) as info:
            read(folder)
        line = info.value.one_line()
        assert str(named) in line
        for frag in fragments:
            assert frag.lower() in line.lower(), line


# ----------------------------------------------------------------------------------------------
# bad inputs that still give an answer (with its limits)
# ----------------------------------------------------------------------------------------------
def test_metadata_and_user_values_conflict_user_wins_with_a_warning(tmp_path):
    # Decision: a value the user types overrides the file; a warning names both values and is
    # kept in the run record, so the choice is visible afterwards.
    from apextrack.stack import StackWarning, read_stack

    p = cases._imagej(tmp_path / "s.tif", cases._noise((4, 2, 32, 32)), "TZYX", spacing=2.0, finterval=3 * 3600.0)
    with pytest.warns(StackWarning) as rec:
        s = read_stack(p, pixel_size_um=0.5, interval_h=5.0, z_step_um=2.0)
    assert s.interval_h == 5.0 and s.pixel_size_um[:2] == (0.5, 0.5) and s.pixel_size_um[2] == 2.0
    text = " | ".join(str(w.message) for w in rec)
    assert "5 h" in text and "3 h" in text  # interval: the user's and the file's
    assert "0.5 µm" in text and "1.5 µm" in text  # pixel size: the user's and the file's
    assert "z step" not in text  # an agreeing value is no conflict


def test_conflict_is_recorded_in_run_json(good, tmp_path):
    from apextrack.pipeline import analyse

    stack, _, _ = good
    res = analyse(stack, out=tmp_path / "r", progress=False, write_report=False, interval_h=4.0)
    run = json.loads((tmp_path / "r" / "run.json").read_text())
    assert any("4 h" in w and "3 h" in w for w in run["warnings"]), run["warnings"]
    assert res.summary["interval_h"] == 4.0


def test_blank_frame_in_the_middle_is_analysed_with_a_warning(tmp_path, capsys):
    # Decision: one blank frame (a shutter or focus failure) must not cost the whole time-lapse;
    # the analysis goes on, no primordium is detected in that frame, tracks bridge the gap
    # (link_memory), and the frame is named in a warning, summary.json and run.json.
    from apextrack.model import make_synthetic_stack, write_synthetic

    synth = make_synthetic_stack(**cases.GOOD_STACK)
    synth.data[4] = 0
    paths = write_synthetic(synth, tmp_path / "gap.tif")
    settings = tmp_path / "s.toml"
    settings.write_text("report = false\n")
    out = tmp_path / "r"
    code = main(["analyse", str(paths["stack"]), "--out", str(out), "--settings", str(settings)])
    err = capsys.readouterr().err
    assert code == 0
    assert "warning" in err and "frame(s) 4 of 8 are blank" in err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["blank_frames"] == [4]
    assert any("blank" in n for n in summary["notes"])
    assert any("blank" in w for w in json.loads((out / "run.json").read_text())["warnings"])
    det = pd.read_csv(out / "detections.csv")
    assert 4 not in set(det["frame"]) and summary["n_primordia"] >= 2


def test_few_primordia_summary_says_what_is_missing():
    # two primordia: one angle, no SD, no CI, and the reason for each missing value
    from apextrack.phyllotaxis import analyse_phyllotaxis

    p = pd.DataFrame({"birth_rank": [1, 2], "track_id": [0, 1], "emergence_time_h": [0.0, 6.0],
                      "theta_deg": [10.0, 147.5], "r_um": [30.0, 22.0], "co_initiated": [False, False]})
    s = analyse_phyllotaxis(p, None).summary
    assert s["n_angles"] == 1 and s["divergence_mean_deg"] == pytest.approx(137.5)
    for key in ("divergence_sd_deg", "divergence_ci_deg", "plastochron_ci_h", "parastichy_pair"):
        assert s[key] is None
        assert key in s["reasons"] and any(ch.isdigit() for ch in s["reasons"][key]), s["reasons"].get(key)
    assert "1 available" in s["reasons"]["divergence_ci_deg"]
    # one primordium: nothing is made up from one sample
    s1 = analyse_phyllotaxis(p.iloc[:1], None).summary
    assert s1["divergence_mean_deg"] is None and s1["plastochron_h"] is None
    assert "1 available" in s1["reasons"]["plastochron_h"]


def test_few_primordia_end_to_end_json_has_reasons_not_numbers(tmp_path):
    # a short record in which only two primordia are tracked: the run succeeds and summary.json
    # holds null with a reason wherever one sample cannot give a number
    from apextrack.model import history_from_births, make_synthetic_stack
    from apextrack.pipeline import analyse

    hist = history_from_births([1.0, 7.0], [20.0, 157.5])
    synth = make_synthetic_stack(n_frames=6, shape_zyx=(4, 64, 64), pixel_size_um=1.2, seed=5, history=hist,
                                 drift_um_per_frame=(0.0, 0.0, 0.0))
    from apextrack.stack import from_array

    stack = from_array(synth.data, synth.axes, pixel_size_um=synth.pixel_size_um, interval_h=synth.interval_h,
                       z_step_um=synth.z_step_um)
    res = analyse(stack, out=tmp_path / "r", progress=False, write_report=False)
    s = json.loads((tmp_path / "r" / "summary.json").read_text())
    assert 1 <= s["n_primordia"] <= 3, s["n_primordia"]
    assert s["divergence_ci_deg"] is None and "divergence_ci_deg" in s["reasons"]
    assert s["parastichy_pair"] is None and "parastichy_pair" in s["reasons"]
    assert res.summary["reasons"] == s["reasons"]


def test_reader_errors_are_library_errors(tmp_path):
    # the same cases through the library: the right subclass, the file named
    from apextrack.errors import InputError
    from apextrack.stack import read_stack

    ctx = cases.Ctx(tmp=tmp_path, good_stack=tmp_path, good_results=tmp_path, truth=tmp_path)
    for builder, kind in [(cases.b_truncated, InputError), (cases.b_ambiguous_axes, InputError),
                          (cases.b_file_negative_interval, MetadataError), (cases.b_image_2d, InputError)]:
        argv, named = builder(ctx)
        with pytest.raises(kind) as info:
            read_stack(argv[1])
        assert info.value.path == str(named)
    a = np.zeros((4, 16, 16), np.float32)
    a[1, 0, 0] = np.nan
    from apextrack.stack import from_array

    s = from_array(a, "TYX")
    s.frame(0)
    with pytest.raises(InputError, match="frame 1 holds NaN"):
        s.frame(1)


def test_errors_cross_to_another_process_whole():
    # an error raised where a frame is measured in a worker process is pickled back to the
    # analysis: its file, message and hint must survive (the one-line message is built from them)
    import pickle

    from apextrack.errors import AnalysisError, InputError

    for err in (InputError("the file ends inside frame 3", "plant_1.tif", "copy the file again"),
                AnalysisError("no primordia found in any frame")):
        back = pickle.loads(pickle.dumps(err))
        assert type(back) is type(err)
        assert (back.what, back.path, back.hint) == (err.what, err.path, err.hint)
        assert str(back) == str(err) == err.one_line()
