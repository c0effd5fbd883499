"""The HTML report: every figure embedded, summary values and settings shown, no display needed,
missing values tolerated."""

from __future__ import annotations

import base64
import io
import json
import math
import re
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from matplotlib.collections import LineCollection

from apextrack import report
from apextrack.settings import describe


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """The bundled demo analysed once, report included (report_frame chosen)."""
    from apextrack.pipeline import analyse

    out = tmp_path_factory.mktemp("demo") / "results"
    res = analyse(None, out=out, progress=False, report_frame=5, bootstrap_n=200)
    return res, out


def _embedded_images(text: str) -> dict[str, bytes]:
    figs = re.findall(r'<figure id="fig-([a-z_]+)"><img alt="[^"]*" src="data:image/png;base64,([A-Za-z0-9+/=]+)"',
                      text)
    return {name: base64.b64decode(b64) for name, b64 in figs}


def test_report_embeds_every_figure(demo_run):
    res, out = demo_run
    html_text = (out / "report.html").read_text(encoding="utf-8")
    imgs = _embedded_images(html_text)
    assert list(imgs) == list(report.FIGURES)
    from matplotlib.image import imread

    for name, png in imgs.items():
        # PNG signature, ISO/IEC 15948 (PNG specification) section 5.2
        assert png[:8] == b"\x89PNG\r\n\x1a\n", name
        img = imread(io.BytesIO(png))
        assert img.shape[0] > 200 and img.shape[1] > 200, name
        assert float(np.std(img[..., :3])) > 0.01, name          # not a blank canvas
        # the same figure is saved beside the report, as PNG and as SVG
        assert (out / "figures" / f"{name}.png").read_bytes() == png
        root = ET.parse(out / "figures" / f"{name}.svg").getroot()
        assert root.tag == "{http://www.w3.org/2000/svg}svg", name   # W3C SVG 1.1 namespace
    # self-contained: nothing fetched from elsewhere
    assert "http://" not in html_text.replace("http://www.w3.org", "") and "https://" not in html_text
    assert "<script" not in html_text and "<link" not in html_text


def test_report_shows_summary_values_and_settings(demo_run):
    res, out = demo_run
    text = (out / "report.html").read_text(encoding="utf-8")
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert f"<td class=\"num\">{s['n_primordia']}</td>" in text
    for key, dec, unit, ci_key in (("divergence_mean_deg", 1, "°", "divergence_ci_deg"),
                                   ("plastochron_h", 2, " h", "plastochron_ci_h"),
                                   ("plastochron_ratio", 3, "", "plastochron_ratio_ci")):
        v = s.get(key)
        if v is None:
            assert s["reasons"][key] in text
            continue
        assert f"{v:.{dec}f}{unit}" in text, key
        ci = s.get(ci_key)
        if ci and None not in ci:
            assert f"{ci[0]:.{dec}f} – {ci[1]:.{dec}f}{unit}" in text, ci_key
    if s.get("chirality"):
        assert f">{s['chirality']}<" in text
    if s.get("parastichy_pair"):
        m, n = s["parastichy_pair"]
        assert f"({m}, {n})" in text
    for d in describe():                                           # every run setting is listed
        assert f"<td>{d['name']}</td>" in text, d["name"]
    assert "apextrack" in text and str(res.run["input_sha256"][next(iter(res.run["input_sha256"]))]) in text


def test_figures_show_the_tables(demo_run):
    res, out = demo_run
    data = report.gather(out)
    figs = report.make_figures(data)
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    assert all(isinstance(f.canvas, FigureCanvasAgg) for f in figs.values())
    # top view: the frame asked for, read independently with tifffile
    import tifffile

    ax = figs["topview"].axes[0]
    assert ax.get_title().startswith("frame 5 ")
    shown = ax.images[0].get_array()
    assert np.array_equal(np.asarray(shown), tifffile.imread(out / "topview.tif")[5])
    # every primordium seen in frame 5 is numbered with its birth rank
    ranks = dict(zip(res.primordia["track_id"], res.primordia["birth_rank"]))
    expected = sorted(int(ranks[t]) for t in res.tracks.loc[res.tracks["frame"] == 5, "track_id"] if t in ranks)
    labels = sorted(int(s) for s in _drawn_labels(ax) if s.isdigit())
    assert labels == expected
    # divergence sequence: the plotted angles are the table's
    d = res.divergence
    ax = figs["divergence"].axes[0]
    pts = np.vstack([c.get_offsets() for c in ax.collections if len(c.get_offsets())])
    assert sorted(map(tuple, np.round(pts, 9))) == sorted(zip(d["to_rank"].astype(float), np.round(d["angle_deg"], 9)))
    # polar histogram: bar heights are numpy.histogram's counts of the angles in 10° bins (the
    # empty bins have no bar)
    ax = figs["polar"].axes[0]
    bars = [p for p in ax.patches if p.get_width() > 0]
    edges = np.deg2rad(np.arange(0, 370, 10))
    counts, _ = np.histogram(np.deg2rad(np.mod(d["angle_deg"], 360)), bins=edges)
    assert np.array_equal([p.get_height() for p in bars], counts[counts > 0])
    assert np.allclose([p.get_x() for p in bars], edges[:-1][counts > 0])
    # emergence times: the line's slope is the plastochron of the summary
    T = res.summary.get("plastochron_h")
    if T is not None:
        line = next(li for li in figs["emergence"].axes[0].lines if li.get_label().startswith("plastochron"))
        x, y = line.get_data()
        assert math.isclose((y[1] - y[0]) / (x[1] - x[0]), T, rel_tol=1e-9)
    # growth: each fitted line has the summary's growth rate as slope; every primordium is
    # drawn (its positions) and numbered
    k = res.summary.get("radial_growth_rate_per_h")
    ax = figs["growth"].axes[0]
    positions = [li for li in ax.lines if li.get_marker() == "o" and li.get_linestyle() in ("None", "none", "")]
    assert len(positions) == len(res.primordia)
    assert sorted(int(s) for s in _drawn_labels(ax)) == sorted(res.primordia["birth_rank"].astype(int))
    if k is not None:
        fitted = [seg for c in ax.collections if isinstance(c, LineCollection) for seg in c.get_segments()]
        fitted += [li.get_xydata() for li in ax.lines if li.get_linestyle() == "-"]
        assert fitted
        for xy in fitted:
            (x0, y0), (x1, y1) = xy[0], xy[-1]
            assert math.isclose((y1 - y0) / (x1 - x0), k, rel_tol=1e-6)


def _drawn_labels(ax) -> list[str]:
    """The texts written on an axes: text artists and collections of glyph outlines."""
    return [t.get_text() for t in ax.texts] + [s for c in ax.collections for s in getattr(c, "labels", [])]


def test_figures_fit_in_their_canvas(demo_run):
    """The fixed layout keeps every title, axis label, tick label and legend inside the figure,
    with the axes no smaller than needed, and no layout engine left to run at save time."""
    _, out = demo_run
    for data in (report.gather(out), report.ReportData(summary={"n_frames": 3})):
        for name, fig in report.make_figures(data).items():
            assert fig.get_layout_engine() is None, name
            renderer = fig.canvas.get_renderer()
            fig_box = fig.bbox
            for ax in fig.axes:
                box = ax.get_tightbbox(renderer)
                assert box.x0 >= fig_box.x0 - 0.5 and box.y0 >= fig_box.y0 - 0.5, name
                assert box.x1 <= fig_box.x1 + 0.5 and box.y1 <= fig_box.y1 + 0.5, name
                # the axes use the room: less than 0.6 inch left unused on the widest side
                unused = (box.x0 - fig_box.x0) + (fig_box.x1 - box.x1)
                unused_v = (box.y0 - fig_box.y0) + (fig_box.y1 - box.y1)
                assert min(unused, unused_v) < 0.6 * fig.dpi, name
                leg = ax.get_legend()
                if leg is not None:                   # legends clear of the tick labels
                    lb = leg.get_window_extent(renderer)
                    for t in ax.get_xticklabels() + ax.get_yticklabels():
                        if t.get_visible() and t.get_text():
                            assert not lb.overlaps(t.get_window_extent(renderer)), (name, t.get_text())


def test_figures_are_reproducible(demo_run):
    """The same tables give the same bytes, PNG and SVG."""
    _, out = demo_run
    data = report.gather(out)
    once = {n: report.render_figure(f) for n, f in report.make_figures(data).items()}
    again = {n: report.render_figure(f) for n, f in report.make_figures(data).items()}
    assert once == again


def test_report_renders_without_a_display(demo_run, tmp_path):
    """Drawn on the Agg canvas without pyplot: works with no display and a GUI backend requested."""
    res, out = demo_run
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    shutil.rmtree(copy / "figures")
    (copy / "report.html").unlink()
    env = {k: v for k, v in __import__("os").environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY")}
    env["MPLBACKEND"] = "QtAgg"
    code = ("import sys; from apextrack.report import write_report; p = write_report(sys.argv[1]); "
            "print(p.name, 'matplotlib.pyplot' in sys.modules)")
    r = subprocess.run([sys.executable, "-c", code, str(copy)], env=env, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert r.stdout.split() == ["report.html", "False"]
    assert len(_embedded_images((copy / "report.html").read_text(encoding="utf-8"))) == len(report.FIGURES)


def test_report_tolerates_missing_and_none_values(demo_run, tmp_path):
    res, out = demo_run
    copy = tmp_path / "sparse"
    shutil.copytree(out, copy)
    summary = json.loads((copy / "summary.json").read_text(encoding="utf-8"))
    for key in ("divergence_mean_deg", "divergence_ci_deg", "plastochron_h", "plastochron_ci_h",
                "radial_growth_rate_per_h", "parastichy_pair", "chirality"):
        summary[key] = None
    summary["reasons"] = {"plastochron_h": "too few primordia for a plastochron"}
    for key in ("plastochron_ratio", "phyllotaxis_index", "mode", "permutations", "expected_angle_deg"):
        summary.pop(key, None)
    (copy / "summary.json").write_text(json.dumps(summary), encoding="utf-8")
    (copy / "topview.tif").unlink()
    (copy / "parastichies.csv").unlink(missing_ok=True)
    p = report.write_report(copy)
    text = p.read_text(encoding="utf-8")
    assert len(_embedded_images(text)) == len(report.FIGURES)
    assert "too few primordia for a plastochron" in text
    assert text.count('class="num na">n/a<') >= 5


def test_empty_tables_still_give_every_figure():
    data = report.ReportData(summary={"n_primordia": 0, "n_frames": 3, "notes": ["no primordia"]})
    figs = report.make_figures(data)
    assert list(figs) == list(report.FIGURES)
    pngs = {k: report.figure_bytes(f) for k, f in figs.items()}
    text = report.render_html(data, pngs)
    assert len(_embedded_images(text)) == len(report.FIGURES)
    assert "no primordia" in text


def test_experiment_report_compares_stacks(tmp_path):
    from apextrack.batch import experiment_table

    rows = [{"stack": "north_bed_1", "status": "ok", "results_dir": "north_bed_1", "n_primordia": 12,
             "divergence_mean_deg": 137.9, "divergence_ci_low_deg": 134.0, "divergence_ci_high_deg": 141.2,
             "plastochron_h": 6.1, "plastochron_ci_low_h": 5.2, "plastochron_ci_high_h": 7.0, "plastochron_ratio": 1.11},
            {"stack": "north_bed_2", "status": "failed", "results_dir": "north_bed_2",
             "error": "north_bed_2.tif: file is truncated — copy the file again"},
            {"stack": "north_bed_3", "status": "ok", "results_dir": "north_bed_3", "n_primordia": 9,
             "divergence_mean_deg": None, "plastochron_h": 5.4}]
    df = experiment_table(rows)
    p = report.write_experiment_report(df, tmp_path, expected_angle_deg=137.5)
    text = p.read_text(encoding="utf-8")
    imgs = re.findall(r'<figure id="fig-([a-z_]+)">', text)
    assert imgs == list(report.EXPERIMENT_FIGURES)
    assert "file is truncated" in text and 'href="north_bed_1/report.html"' in text
    assert "137.9°" in text and "6.10 h" in text
    assert "3 stack(s), 2 analysed, 1 failed" in text
    ax = report.make_experiment_figures(df[df["status"] == "ok"])["experiment_divergence"].axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == ["north_bed_1", "north_bed_3"]
