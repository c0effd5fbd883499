"""Figures and the self-contained HTML report of one analysis, and of an experiment.

:func:`write_report` draws, from a results folder (or an :class:`~apextrack.pipeline.AnalysisResult`
and the folder it is being written to):

- ``topview``: the top view at one frame, primordia numbered by birth rank, the apex centre;
- ``divergence``: the divergence angle by rank, the expected angle and the angle classes of a
  permuted birth order, flagged permutations highlighted;
- ``polar``: a polar histogram of the divergence angles;
- ``growth``: ln r against time per primordium with the fitted radial growth;
- ``emergence``: emergence time against birth rank (the slope is the plastochron);
- ``parastichies``: the contact parastichies drawn on the top view of the analysis frame;

and writes them as PNG and SVG into ``figures/`` and embedded (base64 PNG) into ``report.html``
with the summary table (values with their confidence intervals) and the run settings.
:func:`write_experiment_report` compares the stacks of a batch.

Figures are drawn on :class:`matplotlib.figure.Figure` objects with the Agg canvas, never
through ``pyplot``: no display is needed and no global backend state is touched (safe in dask
workers and threads). The stack figures are placed by a fixed layout measured from their own
texts (no layout engine, which would draw each figure once more to measure it).
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from . import __version__
from .errors import ResultsError
from .tables import atomic_write_bytes, atomic_write_text

#: The figures of a stack report, in display order, with their captions.
FIGURES = {
    "topview": "Top view with the primordia numbered by birth rank (+: apex centre).",
    "divergence": "Divergence angle between successive primordia, by birth rank.",
    "polar": "Polar histogram of the divergence angles.",
    "growth": "Distance from the apex centre (ln r) against time, per primordium, with the fitted radial growth.",
    "emergence": "Emergence time against birth rank; the slope of the line is the plastochron.",
    "parastichies": "Contact parastichies drawn on the top view of the analysis frame.",
}

#: The figures of an experiment report.
EXPERIMENT_FIGURES = {
    "experiment_divergence": "Mean divergence angle per stack with its confidence interval.",
    "experiment_plastochron": "Plastochron per stack with its confidence interval.",
    "experiment_ratio": "Plastochron ratio and number of primordia per stack.",
}

#: Rows of the summary table: (label, key, unit, key of the interval, decimals).
SUMMARY_ROWS = [
    ("Primordia", "n_primordia", "", None, 0),
    ("Co-initiated primordia", "n_co_initiated", "", None, 0),
    ("Chirality of the generative spiral", "chirality", "", None, None),
    ("Mean divergence angle", "divergence_mean_deg", "°", "divergence_ci_deg", 1),
    ("Circular SD of divergence", "divergence_sd_deg", "°", None, 1),
    ("Expected divergence angle", "expected_angle_deg", "°", None, 2),
    ("Plastochron (emergence times)", "plastochron_h", "h", "plastochron_ci_h", 2),
    ("Plastochron (radial growth)", "plastochron_growth_h", "h", "plastochron_growth_ci_h", 2),
    ("Radial growth rate", "radial_growth_rate_per_h", "1/h", None, 4),
    ("Plastochron ratio", "plastochron_ratio", "", "plastochron_ratio_ci", 3),
    ("Phyllotaxis index", "phyllotaxis_index", "", None, 2),
    ("Contact parastichy pair", "parastichy_pair", "", None, None),
    ("Parastichy class", "parastichy_class", "", None, None),
    ("Pattern mode", "mode", "", None, None),
    ("Permuted blocks of birth order", "n_permutations", "", None, 0),
    ("Primordia in permuted blocks", "n_permuted", "", None, 0),
    ("Unexplained angles", "n_unexplained", "", None, 0),
    ("Frames", "n_frames", "", None, 0),
    ("Detections", "n_detections", "", None, 0),
    ("Tracks", "n_tracks", "", None, 0),
]

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2em auto;max-width:1100px;color:#222;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em}h2{font-size:1.2em;border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:1.6em}
.sub{color:#666;margin-top:0}
table{border-collapse:collapse;font-size:.9em;margin:.5em 0}
td,th{border:1px solid #ddd;padding:.25em .6em;text-align:left;vertical-align:top}
th{background:#f3f3f3}td.num{text-align:right;font-variant-numeric:tabular-nums}
.figs{display:grid;grid-template-columns:repeat(auto-fill,minmax(480px,1fr));gap:1.2em}
figure{margin:0}figure img{width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85em;color:#444}.na{color:#999}.failed{color:#b00}
ul.notes{font-size:.9em;color:#444}
"""


# ----------------------------------------------------------------------------------------------
# gathering what a report needs
# ----------------------------------------------------------------------------------------------
@dataclass
class ReportData:
    """Everything a stack report draws (tables may be empty; summary values may be ``None``)."""

    summary: dict
    run: dict = field(default_factory=dict)
    settings: dict = field(default_factory=dict)
    tracks: pd.DataFrame = field(default_factory=pd.DataFrame)
    primordia: pd.DataFrame = field(default_factory=pd.DataFrame)
    divergence: pd.DataFrame = field(default_factory=pd.DataFrame)
    centres: pd.DataFrame = field(default_factory=pd.DataFrame)
    parastichies: pd.DataFrame = field(default_factory=pd.DataFrame)
    topview: Path | None = None
    pixel_size_um: float = 1.0
    report_frame: int | None = None


def gather(source, folder: str | Path | None = None) -> ReportData:
    """What a report needs, from a results folder or an analysis result.

    Parameters
    ----------
    source : AnalysisResult, str or Path
        An analysis result (its tables are used as they are) or a results folder (read with
        :func:`apextrack.results.load_results`).
    folder : str or Path, optional
        Where ``topview.tif`` is found (default: ``source`` when it is a folder, else the
        result's ``out_dir``).
    """
    if isinstance(source, (str, Path)):
        from .results import load_results

        res = load_results(source)
        summary = dict(res["summary"])
        run = dict(res.get("run") or {})
        settings = dict(run.get("settings") or summary.get("settings") or {})
        data = ReportData(summary=summary, run=run, settings=settings, tracks=res["tracks"],
                          primordia=res["primordia"], divergence=res["divergence"],
                          centres=res.get("centres", pd.DataFrame()),
                          parastichies=res.get("parastichies", pd.DataFrame()), topview=res.get("topview"))
    else:
        summary = dict(source.summary)
        settings = source.settings.to_dict() if hasattr(source.settings, "to_dict") else dict(source.settings or {})
        folder = Path(folder) if folder is not None else getattr(source, "out_dir", None)
        tv = Path(folder) / "topview.tif" if folder is not None else None
        data = ReportData(summary=summary, run=dict(source.run or {}), settings=settings, tracks=source.tracks,
                          primordia=source.primordia, divergence=source.divergence, centres=source.centres,
                          parastichies=source.parastichies if source.parastichies is not None else pd.DataFrame(),
                          topview=tv if tv is not None and tv.exists() else None)
    px = summary.get("pixel_size_um")
    data.pixel_size_um = float(px) if isinstance(px, (int, float)) and px and math.isfinite(px) else 1.0
    data.report_frame = data.settings.get("report_frame")
    return data


def read_topview_frame(path: str | Path | None, frame: int) -> np.ndarray | None:
    """One frame of ``topview.tif`` (read alone from disk), or ``None`` when unavailable."""
    if path is None or not Path(path).exists():
        return None
    import tifffile

    with tifffile.TiffFile(path) as tif:
        series = tif.series[0]
        n = series.shape[0] if len(series.shape) == 3 else 1
        if not 0 <= frame < n:
            return None
        if len(series.shape) == 2:
            return series.asarray()
        return np.asarray(tif.pages[frame].asarray(), dtype=np.float32)


def _n_frames(data: ReportData) -> int:
    n = data.summary.get("n_frames")
    if isinstance(n, int) and n > 0:
        return n
    for df in (data.centres, data.tracks):
        if len(df) and "frame" in df:
            return int(df["frame"].max()) + 1
    return 0


def _rank_of_track(primordia: pd.DataFrame) -> dict[int, int]:
    if primordia.empty or not {"track_id", "birth_rank"} <= set(primordia.columns):
        return {}
    return {int(t): int(r) for t, r in zip(primordia["track_id"], primordia["birth_rank"]) if pd.notna(t)}


def _get(summary: dict, key: str):
    v = summary.get(key)
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


# ----------------------------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------------------------
_PT = 1.0 / 72.0          # one typographic point, in inches
_EDGE = 4 * _PT           # blank border kept between the outermost text and the figure's edge


def _outline():
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=2.2, foreground="black")]


def warm_up() -> None:
    """Load the plotting library and draw one small figure with text (the fonts and the
    renderer's first-use work), so that the report's figures are drawn at full speed. Worker
    processes call it while they would otherwise wait."""
    import matplotlib.backends.backend_svg  # noqa: F401

    fig = _figure((1.0, 1.0))
    ax = fig.add_subplot()
    ax.set_title("0")
    render_figure(fig, ("png",), 50)


def _figure(size=(6.4, 4.8), layout: str | None = None):
    """A figure on the Agg canvas. Stack figures are placed by :func:`_fixed_layout` (no layout
    engine: an engine draws the figure once more, without output, to measure it); the
    experiment figures, with tick labels of any length, keep ``layout="constrained"``."""
    import matplotlib as mpl
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if layout is None and (mpl.rcParams["figure.autolayout"] or mpl.rcParams["figure.constrained_layout.use"]):
        # layout=None means "the rcParams' engine": make sure none is attached
        with mpl.rc_context({"figure.autolayout": False, "figure.constrained_layout.use": False}):
            fig = Figure(figsize=size, dpi=100, layout=None)
    else:
        fig = Figure(figsize=size, dpi=100, layout=layout)
    FigureCanvasAgg(fig)
    return fig


def _text_size(fig, renderer, text: str, fontsize) -> tuple[float, float]:
    """Width and height (inches) of one line of ``text`` as it would be drawn (nothing is drawn)."""
    from matplotlib.text import Text

    if not text:
        return 0.0, 0.0
    t = Text(0, 0, text, fontsize=fontsize)
    t.set_figure(fig)
    bb = t.get_window_extent(renderer)
    return bb.width / fig.dpi, bb.height / fig.dpi


def _extent(artist, renderer, dpi: float) -> tuple[float, float]:
    """Width and height (inches) of a text artist (0 when empty or hidden)."""
    if not artist.get_visible() or not artist.get_text():
        return 0.0, 0.0
    bb = artist.get_window_extent(renderer)
    return bb.width / dpi, bb.height / dpi


def _tick_labels(axis, lim) -> list[str]:
    """The major tick labels ``axis`` will draw within the limits ``lim`` (ticks as placed now)."""
    lo, hi = sorted(float(v) for v in lim)
    tol = 1e-9 * (hi - lo)
    locs = [v for v in axis.get_majorticklocs() if lo - tol <= v <= hi + tol]
    return list(axis.get_major_formatter().format_ticks(locs)) if locs else []


def _fixed_layout(ax) -> None:
    """Place ``ax``, the only axes of its figure, so that its title, axis labels and tick labels
    just fit in the figure (with a border of :data:`_EDGE`).

    The margins are measured from the texts themselves (the tick labels are the locator's and
    formatter's for the final axes size), which costs a few text extents instead of the draw a
    layout engine makes. Legends and notes of the stack figures lie inside their axes. With
    ``set_aspect("equal")`` the box is shrunk (centred) here as drawing would shrink it, so the
    ticks measured are the ticks drawn. Call it last, once limits, labels and title are set.
    """
    import matplotlib as mpl
    from matplotlib.font_manager import FontProperties

    rc = mpl.rcParams
    fig = ax.get_figure()
    renderer = fig.canvas.get_renderer()
    dpi = fig.dpi
    W, H = (float(v) for v in fig.get_size_inches())
    xtick = (max(rc["xtick.major.size"], 0.0) + rc["xtick.major.pad"]) * _PT
    ytick = (max(rc["ytick.major.size"], 0.0) + rc["ytick.major.pad"]) * _PT
    labelpad = rc["axes.labelpad"] * _PT
    memo: dict = {}

    def widest(labels: list[str], fontsize) -> float:
        """Width (inches) of the widest of some one-line tick labels."""
        if not labels:
            return 0.0
        # a label two characters shorter than the longest is narrower (the widest glyph of a
        # number, a minus sign, is less than two digits wide): only the others are measured
        n = max(map(len, labels))
        out = 0.0
        for text in {s for s in labels if len(s) >= n - 1}:
            if (text, fontsize) not in memo:
                # the width matplotlib gives the text (Text lays one line out with this call)
                prop = FontProperties(size=fontsize)
                w = renderer.get_text_width_height_descent(text, prop, ismath=text.count("$") >= 2)[0]
                memo[text, fontsize] = w / dpi
            out = max(out, memo[text, fontsize])
        return out

    xtick_h = _text_size(fig, renderer, "0123456789", rc["xtick.labelsize"])[1]
    ytick_h = xtick_h if rc["ytick.labelsize"] == rc["xtick.labelsize"] else \
        _text_size(fig, renderer, "0123456789", rc["ytick.labelsize"])[1]
    xlab_h = _extent(ax.xaxis.label, renderer, dpi)[1]
    ylab_w = _extent(ax.yaxis.label, renderer, dpi)[0]          # rotated: its width is its height
    title_h = _extent(ax.title, renderer, dpi)[1]                # the stack figures' titles are centred
    bottom = _EDGE + xtick + xtick_h + (labelpad + xlab_h if xlab_h else 0.0)
    top = _EDGE + max(title_h + rc["axes.titlepad"] * _PT if title_h else 0.0, ytick_h / 2)

    def place(left: float, right: float) -> tuple[float, float]:
        """Put the axes ``left`` and ``right`` (inches) from the figure's sides; the margins its
        tick labels and labels need there."""
        ax.set_position([left / W, bottom / H, (W - left - right) / W, (H - bottom - top) / H])
        ax.apply_aspect()                                # the box drawing will use (no-op for "auto")
        yw = widest(_tick_labels(ax.yaxis, ax.get_ylim()), rc["ytick.labelsize"])
        xw = widest(_tick_labels(ax.xaxis, ax.get_xlim()), rc["xtick.labelsize"])
        # the last x tick label may stand out of the axes by half its width
        return _EDGE + ylab_w + (labelpad if ylab_w else 0.0) + yw + ytick, _EDGE + xw / 2

    margins = (0.8, 0.2)
    for _ in range(3):      # the ticks depend on the axes size: place, measure, place again
        needed = place(*margins)
        if max(abs(n - m) for n, m in zip(needed, margins)) <= 0.005:
            break
        margins = needed
    else:
        place(*margins)


def _fixed_layout_polar(ax, legend_anchor: float) -> None:
    """Place a polar ``ax`` as large as fits with its angle labels, and with room below and left
    of it for a legend anchored at ``(-legend_anchor, -legend_anchor)`` in axes coordinates."""
    import matplotlib as mpl

    rc = mpl.rcParams
    fig = ax.get_figure()
    renderer = fig.canvas.get_renderer()
    W, H = (float(v) for v in fig.get_size_inches())
    size = rc["xtick.labelsize"]
    pad = (rc["xtick.major.pad"] + max(rc["xtick.major.size"], 0.0)) * _PT
    w_side = max(_text_size(fig, renderer, s, size)[0] for s in ("180°", "0°")) + pad
    h_side = max(_text_size(fig, renderer, s, size)[1] for s in ("90°", "270°")) + pad
    title_h = _extent(ax.title, renderer, fig.dpi)[1]
    top = _EDGE + max(h_side, title_h + rc["axes.titlepad"] * _PT + h_side if title_h else 0.0)
    # the legend's corner lies legend_anchor * d left of and below the axes
    d = min(W - 2 * _EDGE - w_side, H - 2 * _EDGE - top)
    for _ in range(2):
        left = _EDGE + max(w_side, legend_anchor * d)
        bottom = _EDGE + max(h_side, legend_anchor * d)
        d = min(W - left - _EDGE - w_side, H - bottom - top)
    ax.set_position([left / W, bottom / H, d / W, d / H])


def _title(ax, text: str, **kw) -> None:
    """``ax.set_title`` at the fixed height of a title over an axes whose x axis and its labels
    are at the bottom (as :func:`_fixed_layout` assumes): left to find it, matplotlib measures
    the y axis once more on every draw to lift the title clear of ticks that are not there."""
    ax.set_title(text, y=1.0, **kw)


def _legend(ax, **kw) -> None:
    if ax.get_legend_handles_labels()[0]:
        ax.legend(**kw)


def _no_data(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color="0.4", wrap=True)


def _path_labels(ax, xs, ys, texts, offset_pt: tuple[float, float], *, fontsize: float, colors,
                 fontweight=None, path_effects=None):
    """Short texts at data points as one collection of glyph outlines: one artist however many
    labels (a text artist costs a layout and a draw of its own per output).

    ``colors`` is one colour, or a list of one per text. As with ``annotate(...,
    textcoords="offset points")``, a label's left end and baseline lie ``offset_pt`` (points)
    from its point, and it is drawn only when the point lies within the axes limits (as they
    are when this is called). Returns the collection; ``collection.labels`` lists the texts
    drawn, in order.
    """
    from matplotlib.collections import PathCollection
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextPath
    from matplotlib.transforms import Affine2D

    xs = np.asarray(xs, float)
    ys = np.asarray(ys, float)
    colors = colors if isinstance(colors, list) else [colors] * len(xs)     # a list: one per label
    (x0, x1), (y0, y1) = sorted(ax.get_xlim()), sorted(ax.get_ylim())
    inside = [i for i in range(len(xs)) if x0 <= xs[i] <= x1 and y0 <= ys[i] <= y1]
    prop = FontProperties(size=fontsize, weight=fontweight)
    texts = [str(texts[i]) for i in inside]
    paths = [TextPath((0.0, 0.0), s, prop=prop) for s in texts]   # in points, baseline at 0
    # points -> inches -> pixels at the figure's dpi (so it follows a savefig dpi)
    glyphs = Affine2D().translate(*offset_pt).scale(_PT) + ax.get_figure().dpi_scale_trans
    offsets = np.column_stack([xs[inside], ys[inside]]) if inside else np.zeros((0, 2))
    coll = PathCollection(paths, offsets=offsets, offset_transform=ax.transData, transform=glyphs,
                          facecolors=[colors[i] for i in inside] or "none", edgecolors="none", linewidths=0,
                          zorder=3, clip_on=False)
    if path_effects:
        coll.set_path_effects(path_effects)
    coll.labels = texts
    ax.add_collection(coll, autolim=False)
    return coll


def _frame_points(data: ReportData, frame: int) -> pd.DataFrame:
    """Detections of one frame with their birth rank (``NaN`` when not a primordium)."""
    t = data.tracks
    if t.empty or "frame" not in t:
        return pd.DataFrame(columns=["x_um", "y_um", "track_id", "birth_rank"])
    pts = t[t["frame"] == frame].copy()
    ranks = _rank_of_track(data.primordia)
    pts["birth_rank"] = pts["track_id"].map(ranks) if "track_id" in pts else np.nan
    return pts


def _centre_at(data: ReportData, frame: int):
    c = data.centres
    if c.empty or "frame" not in c:
        return None
    row = c[c["frame"] == frame]
    if row.empty:
        return None
    return float(row["x_um"].iloc[0]), float(row["y_um"].iloc[0])


def _grey_image_class():
    """An image class that hands vector outputs a grey image as one channel.

    The SVG writer embeds an image as a PNG compressed at zlib's default level; a grey view as
    RGBA is four times the bytes to compress for the same picture. The raster (Agg) drawing is
    unchanged, and RGBA is kept whenever the pixels are not all opaque grey.
    """
    global _GreyImage
    if _GreyImage is None:
        import sys

        from matplotlib.image import AxesImage

        class GreyImage(AxesImage):
            def make_image(self, renderer, magnification=1.0, unsampled=False):
                im, l, b, trans = super().make_image(renderer, magnification, unsampled)
                svg = sys.modules.get("matplotlib.backends.backend_svg")
                # savefig wraps the SVG renderer: the one that will draw the image owns draw_image
                target = getattr(renderer.draw_image, "__self__", renderer)
                if (im is not None and svg is not None and isinstance(target, svg.RendererSVG)
                        and im.ndim == 3 and im.shape[2] == 4 and im.dtype == np.uint8):
                    g = im[..., 0]
                    if (im[..., 3] == 255).all() and (im[..., 1] == g).all() and (im[..., 2] == g).all():
                        im = np.ascontiguousarray(g)
                return im, l, b, trans

        _GreyImage = GreyImage
    return _GreyImage


_GreyImage = None


def _show_view(ax, view, px: float) -> None:
    if view is None:
        ax.set_facecolor("0.1")
        return
    from matplotlib.colors import Normalize

    ny, nx = view.shape
    lo, hi = np.percentile(view, [1.0, 99.7]) if view.size else (0.0, 1.0)
    # as ax.imshow(view, cmap="gray", vmin=lo, vmax=..., interpolation="nearest", extent=...); nearest
    # neighbours picked from the data then coloured are the pixels of coloured data picked (the
    # same picture), at half the cost of colouring every data pixel first
    im = _grey_image_class()(ax, cmap="gray", norm=Normalize(lo, hi if hi > lo else lo + 1),
                             interpolation="nearest", interpolation_stage="data",
                             extent=(-0.5 * px, (nx - 0.5) * px, (ny - 0.5) * px, -0.5 * px))
    im.set_data(view)
    im.set_clip_path(ax.patch)
    ax.add_image(im)


def _finish_view(ax, view, px, pts) -> None:
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")
    ax.set_aspect("equal")
    if view is not None:
        ny, nx = view.shape
        ax.set_xlim(-0.5 * px, (nx - 0.5) * px)
        ax.set_ylim((ny - 0.5) * px, -0.5 * px)
    elif len(pts):
        ax.invert_yaxis()


def fig_topview(data: ReportData, frame: int | None = None):
    """Top view at ``frame`` (default: the settings' ``report_frame``, else the last frame) with
    the primordia numbered by birth rank and the apex centre."""
    n = _n_frames(data)
    if frame is None:
        frame = data.report_frame if data.report_frame is not None else max(n - 1, 0)
    frame = int(min(max(frame, 0), max(n - 1, 0)))
    fig = _figure((6.4, 6.0))
    ax = fig.add_subplot()
    view = read_topview_frame(data.topview, frame)
    px = data.pixel_size_um
    _show_view(ax, view, px)
    pts = _frame_points(data, frame)
    if len(pts):
        ranked = pts[pts["birth_rank"].notna()]
        other = pts[pts["birth_rank"].isna()]
        ax.scatter(other["x_um"], other["y_um"], s=18, facecolors="none", edgecolors="0.7", linewidths=0.8,
                   label="not a primordium")
        ax.scatter(ranked["x_um"], ranked["y_um"], s=26, facecolors="none", edgecolors="#ffb000", linewidths=1.2,
                   label="primordium")
    c = _centre_at(data, frame)
    if c is not None:
        ax.plot([c[0]], [c[1]], marker="+", color="#00e5ff", markersize=14, mew=2, linestyle="none",
                label="apex centre")
    if view is None and not len(pts):
        _no_data(ax, "no top view and no detections")
    time_h = frame * float(data.summary.get("interval_h") or 0.0)
    _title(ax, f"frame {frame} (t = {time_h:g} h)")
    _finish_view(ax, view, px, pts)
    if len(pts):
        _path_labels(ax, ranked["x_um"], ranked["y_um"], [str(int(r)) for r in ranked["birth_rank"]], (4, 4),
                     colors="#ffdd55", fontsize=9, fontweight="bold", path_effects=_outline())
    if len(pts) or c is not None:
        ax.legend(loc="lower right", fontsize=8, framealpha=0.7)
    _fixed_layout(ax)
    return fig


def fig_divergence(data: ReportData):
    """Divergence angle by rank with the expected angle α and the classes 2α and −α (mod 360) of
    a permuted birth order; angles in flagged permutations are highlighted."""
    fig = _figure()
    ax = fig.add_subplot()
    d = data.divergence
    alpha = _get(data.summary, "expected_angle_deg")
    if alpha is None:
        alpha = data.settings.get("expected_angle_deg")
    if alpha is not None:
        for val, lab, ls in ((alpha, f"expected α = {alpha:.1f}°", "-"),
                             ((2 * alpha) % 360, f"2α = {(2 * alpha) % 360:.1f}°", "--"),
                             ((-alpha) % 360, f"−α = {(-alpha) % 360:.1f}°", ":")):
            ax.axhline(val, color="0.5", linestyle=ls, linewidth=1, label=lab)
    if d.empty or "angle_deg" not in d:
        _no_data(ax, "no divergence angles (fewer than two primordia)")
    else:
        x = d["to_rank"] if "to_rank" in d else pd.Series(np.arange(2, len(d) + 2))
        y = d["angle_deg"]
        perm = d["permutation_id"].fillna(0).astype(int) > 0 if "permutation_id" in d else pd.Series(False, index=d.index)
        unexp = d["unexplained"].fillna(False).astype(bool) if "unexplained" in d else pd.Series(False, index=d.index)
        ax.plot(x, y, color="#1f77b4", linewidth=0.8, alpha=0.6)
        ax.scatter(x[~perm & ~unexp], y[~perm & ~unexp], color="#1f77b4", s=22, zorder=3, label="angle")
        if perm.any():
            ax.scatter(x[perm], y[perm], color="#d62728", s=40, marker="s", zorder=4, label="in a permuted block")
            for pid in sorted(set(d.loc[perm, "permutation_id"].astype(int))):
                xs = x[d["permutation_id"] == pid]
                ax.axvspan(xs.min() - 0.4, xs.max() + 0.4, color="#d62728", alpha=0.08)
        if unexp.any():
            ax.scatter(x[unexp], y[unexp], color="k", marker="x", s=40, zorder=4, label="unexplained")
        mean = _get(data.summary, "divergence_mean_deg")
        if mean is not None:
            ax.axhline(mean % 360, color="#2ca02c", linewidth=1.2, label=f"mean {mean % 360:.1f}°")
    ax.set_ylim(0, 360)
    ax.set_yticks(range(0, 361, 45))
    ax.set_xlabel("birth rank of the later primordium")
    ax.set_ylabel("divergence angle (°)")
    chir = data.summary.get("chirality")
    _title(ax, f"divergence angles ({chir or 'chirality n/a'})")
    _legend(ax, fontsize=7, loc="upper right", ncols=2, framealpha=0.8)
    _fixed_layout(ax)
    return fig


def fig_polar(data: ReportData, bin_deg: float = 10.0):
    """Polar histogram of the divergence angles (``bin_deg`` bins), expected angle and mean."""
    fig = _figure((5.6, 5.2))
    ax = fig.add_subplot(projection="polar")
    d = data.divergence
    edges = np.deg2rad(np.arange(0.0, 360.0 + bin_deg, bin_deg))
    if not d.empty and "angle_deg" in d and d["angle_deg"].notna().any():
        a = np.deg2rad(np.mod(d["angle_deg"].dropna().to_numpy(float), 360.0))
        counts, _ = np.histogram(a, bins=edges)
        full = counts > 0   # empty bins drawn as bars of height 0 show nothing and cost as much
        ax.bar(edges[:-1][full], counts[full], width=np.deg2rad(bin_deg), align="edge", color="#1f77b4",
               alpha=0.75, edgecolor="white", label="angles")
        top = max(counts.max(), 1)
    else:
        top = 1
        ax.set_title("no divergence angles", color="0.4")
    alpha = _get(data.summary, "expected_angle_deg")
    if alpha is not None:
        ax.plot([np.deg2rad(alpha)] * 2, [0, top], color="0.4", linewidth=1.5, label=f"expected {alpha:.1f}°")
    mean = _get(data.summary, "divergence_mean_deg")
    if mean is not None:
        ax.plot([np.deg2rad(mean % 360)] * 2, [0, top], color="#2ca02c", linewidth=2, label=f"mean {mean % 360:.1f}°")
    ax.set_theta_zero_location("E")
    ax.set_theta_direction(1)
    _legend(ax, fontsize=7, loc="lower left", bbox_to_anchor=(-0.1, -0.1))
    _fixed_layout_polar(ax, 0.1)
    return fig


def fig_growth(data: ReportData):
    """ln r against time per primordium; the fitted radial growth ``ln r = b_i + k t`` with the
    common rate ``k`` of the summary and each primordium's own offset ``b_i``."""
    fig = _figure()
    ax = fig.add_subplot()
    t = data.tracks
    ranks = _rank_of_track(data.primordia)
    k = _get(data.summary, "radial_growth_rate_per_h")
    drawn = 0
    if not t.empty and {"r_um", "time_h", "track_id"} <= set(t.columns) and ranks:
        from matplotlib import colormaps
        from matplotlib.collections import LineCollection
        from matplotlib.lines import Line2D

        cmap = colormaps["viridis"]
        n = max(ranks.values())
        fits, fit_c, ends = [], [], []
        # the positions of the primordia (r > 0), by track and time (stable: table order for ties)
        tids = t["track_id"].to_numpy()
        r_um = t["r_um"].to_numpy(float)
        keep = np.isin(tids, list(ranks)) & (r_um > 0)
        tids, r_um, t_h = tids[keep].astype(np.int64), r_um[keep], t["time_h"].to_numpy(float)[keep]
        order = np.lexsort((t_h, tids))
        tids, r_um, t_h = tids[order], r_um[order], t_h[order]
        starts = np.flatnonzero(np.r_[True, tids[1:] != tids[:-1]]) if len(tids) else np.array([], int)
        for i0, i1 in zip(starts, np.r_[starts[1:], len(tids)].astype(int)):
            rank = ranks[int(tids[i0])]
            colour = cmap((rank - 1) / max(n - 1, 1))
            lr = np.log(r_um[i0:i1])
            th = t_h[i0:i1]
            # the positions: one marker line per primordium, as ax.plot(th, lr, "o", markersize=3)
            # (markers of one style are cheaper to draw, in SVG above all, than a collection
            # with a colour per point)
            ax.add_line(Line2D(th, lr, linestyle="none", marker="o", color=colour, markersize=3))
            if k is not None and len(th) >= 2:
                b = float(np.mean(lr - k * th))
                ends_t = th[[0, -1]]                   # a straight line: its two ends
                fits.append(np.column_stack([ends_t, b + k * ends_t]))
                fit_c.append(colour)
            ends.append((th[-1], lr[-1], str(rank), colour))
            drawn += 1
        if fits:   # the fitted lines, one collection
            ax.add_collection(LineCollection(fits, colors=fit_c, linewidths=1, zorder=2))
    if not drawn:
        _no_data(ax, "no primordium positions")
    if k is None:
        reason = (data.summary.get("reasons") or {}).get("radial_growth_rate_per_h", "not estimable")
        _title(ax, "radial growth: no fit", fontsize=10)
        ax.text(0.02, 0.02, f"no growth fit: {reason}", transform=ax.transAxes, fontsize=7, color="0.35",
                wrap=True)
    else:
        _title(ax, f"radial growth: k = {k:.4f} /h (lines: common k, one offset per primordium)", fontsize=10)
    ax.set_xlabel("time (h)")
    ax.set_ylabel("ln (r / 1 µm)")
    if drawn:   # each primordium's rank beside its last position
        _path_labels(ax, [e[0] for e in ends], [e[1] for e in ends], [e[2] for e in ends], (3, 0),
                     fontsize=7, colors=[e[3] for e in ends])
    _fixed_layout(ax)
    return fig


def fig_emergence(data: ReportData):
    """Emergence time against birth rank with the plastochron line and its interval."""
    fig = _figure()
    ax = fig.add_subplot()
    p = data.primordia
    T = _get(data.summary, "plastochron_h")
    if p.empty or not {"birth_rank", "emergence_time_h"} <= set(p.columns):
        _no_data(ax, "no primordia")
    else:
        p = p.sort_values("birth_rank", kind="stable")
        r = p["birth_rank"].to_numpy(float)
        te = p["emergence_time_h"].to_numpy(float)
        sd = p["emergence_time_sd_h"].to_numpy(float) if "emergence_time_sd_h" in p else None
        co = p["co_initiated"].fillna(False).astype(bool).to_numpy() if "co_initiated" in p else np.zeros(len(p), bool)
        ax.errorbar(r[~co], te[~co], yerr=None if sd is None else np.nan_to_num(sd[~co]), fmt="o", color="#1f77b4",
                    markersize=5, capsize=2, label="emergence")
        if co.any():
            ax.errorbar(r[co], te[co], yerr=None if sd is None else np.nan_to_num(sd[co]), fmt="D", color="#ff7f0e",
                        markersize=5, capsize=2, label="co-initiated")
        ok = np.isfinite(te)
        if T is not None and ok.any():
            t0 = float(np.mean(te[ok] - T * r[ok]))
            xs = np.array([r.min(), r.max()])
            ax.plot(xs, t0 + T * xs, color="#2ca02c", label=f"plastochron {T:.2f} h")
            ci = _get(data.summary, "plastochron_ci_h")
            if isinstance(ci, (list, tuple)) and len(ci) == 2 and None not in ci:
                xm = float(np.mean(r[ok]))
                ym = t0 + T * xm
                ax.fill_between(xs, ym + ci[0] * (xs - xm), ym + ci[1] * (xs - xm), color="#2ca02c", alpha=0.15,
                                label=f"interval {ci[0]:.2f}–{ci[1]:.2f} h")
        ax.legend(fontsize=8, loc="upper left")
    ax.set_xlabel("birth rank")
    ax.set_ylabel("emergence time (h)")
    _title(ax, "emergence times" + ("" if T is not None else " (plastochron not estimable)"), fontsize=10)
    _fixed_layout(ax)
    return fig


def fig_parastichies(data: ReportData):
    """The contact parastichies (primordia of one spiral joined in birth order) on the top view
    of the frame they were found in."""
    fig = _figure((6.4, 6.0))
    ax = fig.add_subplot()
    par = data.parastichies
    frame = None
    if not par.empty and "frame" in par:
        frame = int(par["frame"].iloc[0])
    elif isinstance(data.summary.get("analysis_frame"), int):
        frame = int(data.summary["analysis_frame"])
    if frame is None:
        frame = max(_n_frames(data) - 1, 0)
    view = read_topview_frame(data.topview, frame)
    px = data.pixel_size_um
    _show_view(ax, view, px)
    pts = _frame_points(data, frame)
    ranked = pts[pts["birth_rank"].notna()].drop_duplicates("birth_rank").set_index("birth_rank")
    if len(ranked):
        ax.scatter(ranked["x_um"], ranked["y_um"], s=22, color="#ffb000", zorder=3)
    colours = {"m": "#ff4f9a", "n": "#4fc3ff"}
    drawn = False
    if not par.empty and {"birth_rank", "family", "spiral_index"} <= set(par.columns) and len(ranked):
        from matplotlib.collections import LineCollection

        spirals, spiral_c = [], []
        for (fam, _), g in par.groupby(["family", "spiral_index"], sort=True):
            g = g.sort_values("birth_rank", kind="stable")
            members = [int(r) for r in g["birth_rank"] if int(r) in ranked.index]
            if len(members) < 2:
                continue
            spirals.append(ranked.loc[members, ["x_um", "y_um"]].to_numpy(float))
            spiral_c.append(colours.get(str(fam), "w"))
        if spirals:   # every spiral in one collection, drawn as ax.plot(..., "-") lines would be
            ax.add_collection(LineCollection(spirals, colors=spiral_c, linewidths=1.6, alpha=0.9, zorder=2,
                                             capstyle="projecting", joinstyle="round"), autolim=False)
            drawn = True
        for fam, g in par.groupby("family", sort=True):
            number = int(g["parastichy_number"].iloc[0]) if "parastichy_number" in g else "?"
            wind = g["winding"].iloc[0] if "winding" in g else ""
            ax.plot([], [], "-", color=colours.get(str(fam), "w"), label=f"{number} parastichies ({wind})")
    c = _centre_at(data, frame)
    if c is not None:
        ax.plot([c[0]], [c[1]], marker="+", color="#00e5ff", markersize=14, mew=2, linestyle="none")
    pair = data.summary.get("parastichy_pair")
    if not drawn:
        reason = (data.summary.get("reasons") or {}).get("parastichy_pair", "no contact parastichies found")
        _no_data(ax, f"no parastichies drawn: {reason}")
    title = f"frame {frame}: contact parastichies " + (f"({pair[0]}, {pair[1]})" if isinstance(pair, (list, tuple))
                                                       and len(pair) == 2 else "n/a")
    _title(ax, title)
    _finish_view(ax, view, px, pts)
    if len(ranked):
        _path_labels(ax, ranked["x_um"], ranked["y_um"], [str(int(r)) for r in ranked.index], (3, 3),
                     colors="#ffdd55", fontsize=8, path_effects=_outline())
    if drawn:
        ax.legend(loc="lower right", fontsize=8, framealpha=0.7)
    _fixed_layout(ax)
    return fig


_FIGURE_FUNCS = {"topview": fig_topview, "divergence": fig_divergence, "polar": fig_polar,
                 "growth": fig_growth, "emergence": fig_emergence, "parastichies": fig_parastichies}


def _make_figure(data: ReportData, name: str, frame: int | None = None):
    """Figure ``name`` of :data:`FIGURES` (the top view at ``frame``)."""
    func = _FIGURE_FUNCS[name]
    return func(data, frame) if name == "topview" else func(data)


def make_figures(data: ReportData, frame: int | None = None) -> dict[str, Any]:
    """Every figure of :data:`FIGURES` as a matplotlib Figure (Agg canvas), by name."""
    return {name: _make_figure(data, name, frame) for name in _FIGURE_FUNCS}


def figure_bytes(fig, fmt: str = "png", dpi: int = 100) -> bytes:
    """A figure rendered to PNG or SVG bytes."""
    from matplotlib import rc_context

    if fmt == "png":
        return _png_bytes(fig, dpi)
    buf = io.BytesIO()
    kw = {"metadata": {"Creator": f"apextrack {__version__}", "Date": None}}
    # a fixed salt for the ids of SVG elements (random by default): the same figure gives the same file
    with rc_context({"svg.hashsalt": "apextrack"}):
        fig.savefig(buf, format=fmt, dpi=dpi, **kw)
    return buf.getvalue()


def _png_bytes(fig, dpi: int) -> bytes:
    """The figure as PNG: the Agg pixels, encoded as RGB when all opaque (a quarter less to
    compress than RGBA, for the same picture), zlib level 1 (lossless like the default 6,
    several times faster to encode, files ~8 % larger)."""
    from PIL import Image, PngImagePlugin

    raw = io.BytesIO()
    fig.savefig(raw, format="rgba", dpi=dpi)         # drawn as for PNG, left unencoded
    raw = raw.getbuffer()
    w, h = (int(v) for v in fig.get_size_inches() * dpi)   # the canvas size savefig drew
    if len(raw) != 4 * w * h:                          # not the size expected: let matplotlib encode
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": f"apextrack {__version__}"},
                    pil_kwargs={"compress_level": 1})
        return buf.getvalue()
    img = Image.frombuffer("RGBA", (w, h), raw, "raw", "RGBA", 0, 1)
    if np.frombuffer(raw, np.uint8)[3::4].min() == 255:
        img = img.convert("RGB")
    info = PngImagePlugin.PngInfo()
    info.add_text("Software", f"apextrack {__version__}")
    buf = io.BytesIO()
    img.save(buf, format="png", pnginfo=info, dpi=(dpi, dpi), compress_level=1)
    return buf.getvalue()


def _lay_out_once(fig, dpi: float | None = None) -> None:
    """Run the figure's layout engine now, once (at ``dpi``, default the figure's), and detach it.

    While a figure has a layout engine (even the placeholder ``set_layout_engine("none")``
    leaves), every ``savefig`` first draws it once more with rendering disabled; laid out here
    and detached, each saved format costs one draw, and all formats share one layout.
    """
    from matplotlib import rc_context

    engine = fig.get_layout_engine()
    if engine is None:
        return
    own_dpi = fig.dpi
    if dpi is not None and dpi != own_dpi:
        fig.set_dpi(dpi)  # as savefig(dpi=...) would lay it out
    try:
        engine.execute(fig)  # a no-op for the placeholder engine
    finally:
        if fig.dpi != own_dpi:
            fig.set_dpi(own_dpi)
    # None means "no engine" unless the user's rcParams ask for one
    with rc_context({"figure.autolayout": False, "figure.constrained_layout.use": False}):
        fig.set_layout_engine(None)


def render_figure(fig, formats: Iterable[str] = ("png", "svg"), dpi: int = 100) -> dict[str, bytes]:
    """A figure rendered once per format (always PNG, for the HTML page), laid out once.

    Returns ``{format: bytes}``; the figure's layout engine is run and detached (see
    :func:`_lay_out_once`), so the figure keeps the layout it was saved with.
    """
    _lay_out_once(fig, dpi)
    out = {"png": figure_bytes(fig, "png", dpi)}
    for fmt in formats:
        fmt = fmt.lower()
        if fmt not in out:
            out[fmt] = figure_bytes(fig, fmt, dpi)
    return out


# ----------------------------------------------------------------------------------------------
# HTML
# ----------------------------------------------------------------------------------------------
def format_value(value, decimals: int | None = None, unit: str = "") -> str:
    """A summary value as text (``n/a`` for ``None``/NaN; pairs as ``m:n``)."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        if len(value) == 2 and all(isinstance(v, (int, np.integer)) for v in value):
            return f"({value[0]}, {value[1]})"
        return ", ".join(format_value(v, decimals) for v in value)
    if isinstance(value, (int, np.integer)):
        return f"{int(value)}{(' ' + unit) if unit and unit != '°' else unit}"
    if isinstance(value, (float, np.floating)):
        d = 3 if decimals is None else decimals
        text = f"{float(value):.{d}f}"
        return text + ((" " + unit) if unit and unit != "°" else unit)
    return str(value)


def _interval_text(ci, decimals, unit) -> str:
    if not isinstance(ci, (list, tuple)) or len(ci) != 2 or any(v is None for v in ci):
        return ""
    return f"{format_value(float(ci[0]), decimals)} – {format_value(float(ci[1]), decimals, unit)}"


def summary_rows(summary: dict) -> list[tuple[str, str, str, str]]:
    """``(label, value, interval, note)`` for every row of the summary table."""
    reasons = summary.get("reasons") or {}
    conf = summary.get("confidence")
    rows = []
    for label, key, unit, ci_key, dec in SUMMARY_ROWS:
        value = summary.get(key)
        ci = _interval_text(summary.get(ci_key), dec, unit) if ci_key else ""
        note = reasons.get(key, "") if value is None else ""
        if key not in summary and not note:
            note = "not computed"
        rows.append((label, format_value(value, dec, unit), ci, note))
    if isinstance(conf, (int, float)):
        rows.append(("Confidence level of the intervals", f"{100 * conf:g} %", "", ""))
    return rows


def _table(headers: Iterable[str], rows: Iterable[Iterable[Any]], num_cols: Iterable[int] = ()) -> str:
    num_cols = set(num_cols)
    out = ["<table>", "<tr>" + "".join(f"<th>{html.escape(str(h))}</th>" for h in headers) + "</tr>"]
    for row in rows:
        cells = []
        for i, v in enumerate(row):
            text = html.escape(str(v))
            cls = []
            if i in num_cols:
                cls.append("num")
            if text == "n/a":
                cls.append("na")
            cells.append(f"<td class=\"{' '.join(cls)}\">{text}</td>" if cls else f"<td>{text}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


def _img_tag(name: str, png: bytes, caption: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return (f'<figure id="fig-{html.escape(name)}"><img alt="{html.escape(caption)}" '
            f'src="data:image/png;base64,{b64}"><figcaption>{html.escape(caption)}</figcaption></figure>')


def _settings_rows(settings: dict) -> list[tuple[str, str, str, str]]:
    from .settings import describe

    info = {d["name"]: d for d in describe()}
    rows = []
    for k, v in settings.items():
        d = info.get(k, {})
        rows.append((k, "none" if v is None else format_value(v, 6) if isinstance(v, float) else format_value(v),
                     d.get("unit", ""), d.get("meaning", "")))
    return rows


def render_html(data: ReportData, pngs: dict[str, bytes], title: str | None = None) -> str:
    """The report as one self-contained HTML page (figures embedded as base64 PNG)."""
    s = data.summary
    name = s.get("stack") or data.run.get("input") or "stack"
    title = title or f"apextrack report: {name}"
    parts = ["<!DOCTYPE html>", "<html lang=\"en\"><head><meta charset=\"utf-8\">",
             f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
             f"<h1>{html.escape(title)}</h1>"]
    sub = [f"{s.get('n_frames', 'n/a')} frames"]
    if s.get("interval_h") is not None:
        sub.append(f"every {format_value(s.get('interval_h'), 2)} h")
    if s.get("pixel_size_um") is not None:
        sub.append(f"{format_value(s.get('pixel_size_um'), 3)} µm/pixel")
    sub.append(f"apextrack {html.escape(str(data.run.get('version', __version__)))}")
    parts.append(f"<p class=\"sub\">{html.escape(', '.join(sub))}</p>")
    parts.append("<h2>Summary</h2>")
    parts.append(_table(["quantity", "value", "interval", "note"], summary_rows(s), num_cols=(1,)))
    notes = s.get("notes") or []
    if notes:
        parts.append("<ul class=\"notes\">" + "".join(f"<li>{html.escape(str(n))}</li>" for n in notes) + "</ul>")
    perms = s.get("permutations") or []
    if perms:
        parts.append("<h2>Permutations of birth order</h2>")
        parts.append(_table(["id", "kind", "ranks", "corrected order", "likelihood ratio"],
                            [(p.get("id"), p.get("kind"), format_value(p.get("ranks")),
                              format_value(p.get("corrected_order")), format_value(p.get("likelihood_ratio"), 2))
                             for p in perms]))
    parts.append("<h2>Figures</h2><div class=\"figs\">")
    for fname, png in pngs.items():
        parts.append(_img_tag(fname, png, FIGURES.get(fname, fname)))
    parts.append("</div>")
    parts.append("<h2>Run settings</h2>")
    parts.append(_table(["setting", "value", "unit", "meaning"], _settings_rows(data.settings)))
    run = data.run
    if run:
        info = [("input", run.get("input", "")), ("started", run.get("started", "")),
                ("finished", run.get("finished", "")), ("python", run.get("python", "")),
                ("platform", run.get("platform", ""))]
        for f, h in (run.get("input_sha256") or {}).items():
            info.append((f"sha256 {f}", h))
        for k, v in (run.get("timings_s") or {}).items():
            info.append((f"time: {k}", f"{v:.2f} s" if isinstance(v, (int, float)) else v))
        for w in run.get("warnings") or []:
            info.append(("warning", w))
        parts.append("<h2>Run record</h2>")
        parts.append(_table(["item", "value"], info))
    parts.append("</body></html>")
    return "\n".join(parts)


def _draw_figure(data: ReportData, name: str, frame: int | None, formats, dpi: int) -> dict[str, bytes]:
    """Figure ``name`` of :data:`FIGURES` drawn and rendered to ``{format: bytes}``."""
    # the figure is dropped, not cleared: Figure.clear() resets every axes first, a cost for nothing
    return render_figure(_make_figure(data, name, frame), formats, dpi)


def write_report(source, folder: str | Path | None = None, *, frame: int | None = None,
                 formats: Iterable[str] = ("png", "svg"), dpi: int = 100, run_record=None, pool=None) -> Path:
    """Write ``report.html`` and ``figures/<name>.png|svg`` for one analysis.

    Parameters
    ----------
    source : AnalysisResult, str or Path
        The analysis (or its results folder).
    folder : str or Path, optional
        Where to write (default: the results folder). ``topview.tif`` is read from here, one
        frame at a time.
    frame : int, optional
        Frame of the top-view figure (default: ``settings.report_frame``, else the last).
    formats : iterable of str
        File formats of the saved figures (``png``, ``svg``, ``pdf``).
    run_record : callable, optional
        Called once the figures are drawn; the run record it returns is the one the page shows
        (an analysis hands over this way what it was still computing, e.g. the input checksum).
    pool : FramePool, optional
        Worker processes (:class:`apextrack.frame_pool.FramePool`) that draw the figures side by
        side; the files are the same as drawn here.

    Returns
    -------
    Path
        The HTML file.

    Examples
    --------
    >>> from apextrack.pipeline import analyse            # doctest: +SKIP
    >>> res = analyse(None, out="demo_results")           # doctest: +SKIP
    >>> write_report("demo_results")                      # doctest: +SKIP
    PosixPath('demo_results/report.html')
    """
    if folder is None:
        if isinstance(source, (str, Path)):
            folder = Path(source)
        elif getattr(source, "out_dir", None) is not None:
            folder = Path(source.out_dir)
        else:
            raise ResultsError("no folder to write the report into", hint="give folder=...")
    folder = Path(folder)
    data = gather(source, folder)
    pngs = {}
    fig_dir = folder / "figures"
    formats = [f.lower() for f in formats]
    drawn = {name: pool.call(_draw_figure, data, name, frame, formats, dpi) for name in _FIGURE_FUNCS} \
        if pool is not None else {}
    for name in _FIGURE_FUNCS:  # here, one figure alive at a time: memory stays small
        files = drawn[name].result() if drawn else _draw_figure(data, name, frame, formats, dpi)
        pngs[name] = files["png"]
        for fmt in formats:
            atomic_write_bytes(fig_dir / f"{name}.{fmt}", files[fmt])
    out = folder / "report.html"
    if run_record is not None:
        data.run = dict(run_record())
    atomic_write_text(out, render_html(data, pngs))
    return out


# ----------------------------------------------------------------------------------------------
# experiment report
# ----------------------------------------------------------------------------------------------
def _errorbar_figure(df: pd.DataFrame, key: str, lo: str, hi: str, ylabel: str, ref: float | None = None):
    fig = _figure((max(5.0, 0.6 * len(df) + 2.5), 4.0), layout="constrained")
    ax = fig.add_subplot()
    names = df["stack"].astype(str).tolist()
    x = np.arange(len(df))
    y = pd.to_numeric(df.get(key), errors="coerce").to_numpy(float) if key in df else np.full(len(df), np.nan)
    if lo in df and hi in df:
        l = pd.to_numeric(df[lo], errors="coerce").to_numpy(float)
        h = pd.to_numeric(df[hi], errors="coerce").to_numpy(float)
        err = np.vstack([np.where(np.isfinite(l), y - l, 0), np.where(np.isfinite(h), h - y, 0)])
        err = np.clip(np.nan_to_num(err), 0, None)
    else:
        err = None
    ok = np.isfinite(y)
    if ok.any():
        ax.errorbar(x[ok], y[ok], yerr=None if err is None else err[:, ok], fmt="o", capsize=4, color="#1f77b4")
    if (~ok).any():
        for xi in x[~ok]:
            ax.annotate("n/a", (xi, 0), xycoords=("data", "axes fraction"), xytext=(0, 4),
                        textcoords="offset points", ha="center", color="0.5", fontsize=8)
    if ref is not None:
        ax.axhline(ref, color="0.5", linestyle="--", linewidth=1)
    ax.set_xticks(x, names, rotation=30, ha="right", fontsize=8)
    ax.set_xlim(-0.6, len(df) - 0.4)
    ax.set_ylabel(ylabel)
    return fig


def _fig_experiment_divergence(df: pd.DataFrame, expected_angle_deg: float | None):
    return _errorbar_figure(df, "divergence_mean_deg", "divergence_ci_low_deg", "divergence_ci_high_deg",
                            "mean divergence angle (°)", expected_angle_deg)


def _fig_experiment_plastochron(df: pd.DataFrame, expected_angle_deg: float | None):
    return _errorbar_figure(df, "plastochron_h", "plastochron_ci_low_h", "plastochron_ci_high_h", "plastochron (h)")


def _fig_experiment_ratio(df: pd.DataFrame, expected_angle_deg: float | None):
    fig = _errorbar_figure(df, "plastochron_ratio", "plastochron_ratio_ci_low", "plastochron_ratio_ci_high",
                           "plastochron ratio")
    ax2 = fig.axes[0].twinx()
    n = pd.to_numeric(df.get("n_primordia"), errors="coerce").to_numpy(float) if "n_primordia" in df else None
    if n is not None and np.isfinite(n).any():
        ax2.bar(np.arange(len(df)), np.nan_to_num(n), color="0.8", alpha=0.5, zorder=0, width=0.5)
        ax2.set_ylabel("primordia (bars)")
        fig.axes[0].set_zorder(ax2.get_zorder() + 1)
        fig.axes[0].patch.set_visible(False)
    return fig


_EXPERIMENT_FIGURE_FUNCS = {"experiment_divergence": _fig_experiment_divergence,
                            "experiment_plastochron": _fig_experiment_plastochron,
                            "experiment_ratio": _fig_experiment_ratio}


def make_experiment_figures(experiment: pd.DataFrame, expected_angle_deg: float | None = None) -> dict[str, Any]:
    """The figures of :data:`EXPERIMENT_FIGURES` comparing the stacks of ``experiment``."""
    df = experiment.reset_index(drop=True)
    return {name: func(df, expected_angle_deg) for name, func in _EXPERIMENT_FIGURE_FUNCS.items()}


def _analysed(experiment: pd.DataFrame) -> pd.DataFrame:
    """The stacks of an experiment table that were analysed (``status`` ok)."""
    return experiment[experiment["status"] == "ok"] if "status" in experiment else experiment


def draw_experiment_figure(experiment: pd.DataFrame, name: str, expected_angle_deg: float | None = None,
                           formats: Iterable[str] = ("png", "svg")) -> dict[str, bytes]:
    """One figure of the experiment report (a name of :data:`EXPERIMENT_FIGURES`) drawn for the
    analysed stacks of ``experiment``: its file contents by format. The figures can thus be
    drawn side by side (e.g. by the workers of a batch) and handed to
    :func:`write_experiment_report`."""
    fig = _EXPERIMENT_FIGURE_FUNCS[name](_analysed(experiment).reset_index(drop=True), expected_angle_deg)
    return render_figure(fig, [f.lower() for f in formats])  # dropped, not cleared (see _draw_figure)


def write_experiment_report(experiment: pd.DataFrame, folder: str | Path, *, title: str = "apextrack experiment",
                            formats: Iterable[str] = ("png", "svg"), expected_angle_deg: float | None = None,
                            drawn: dict[str, dict[str, bytes]] | None = None) -> Path:
    """Write ``experiment_report.html`` comparing the stacks of a batch.

    Parameters
    ----------
    experiment : DataFrame
        One row per stack, as in ``experiment.csv`` (``stack``, ``status``, ``error``,
        ``results``, summary figures).
    folder : str or Path
        The batch output folder; figures go to ``figures/``.
    drawn : dict, optional
        The figures already drawn (:func:`draw_experiment_figure`, by name, with every format
        of ``formats``); the others are drawn here.

    Returns
    -------
    Path
        The HTML file.
    """
    folder = Path(folder)
    formats = [f.lower() for f in formats]
    ok = _analysed(experiment)
    pngs = {}
    if len(ok):
        for name in EXPERIMENT_FIGURES:
            files = (drawn or {}).get(name) or draw_experiment_figure(experiment, name, expected_angle_deg, formats)
            pngs[name] = files["png"]
            for fmt in formats:
                atomic_write_bytes(folder / "figures" / f"{name}.{fmt}", files[fmt])
    n_ok, n = int(len(ok)), int(len(experiment))
    parts = ["<!DOCTYPE html>", "<html lang=\"en\"><head><meta charset=\"utf-8\">",
             f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
             f"<h1>{html.escape(title)}</h1>",
             f"<p class=\"sub\">{n} stack(s), {n_ok} analysed, {n - n_ok} failed; apextrack {__version__}</p>",
             "<h2>Stacks</h2>"]
    cols = [("stack", "stack", None, ""), ("status", "status", None, ""),
            ("primordia", "n_primordia", 0, ""), ("chirality", "chirality", None, ""),
            ("divergence", "divergence_mean_deg", 1, "°"), ("plastochron", "plastochron_h", 2, "h"),
            ("plastochron ratio", "plastochron_ratio", 3, ""), ("parastichies", "parastichy_pair", None, ""),
            ("mode", "mode", None, ""), ("permuted blocks", "n_permutations", 0, "")]
    rows_html = ["<table>", "<tr>" + "".join(f"<th>{html.escape(c[0])}</th>" for c in cols) + "<th>report / error</th></tr>"]
    for _, r in experiment.iterrows():
        cells = []
        for _, key, dec, unit in cols:
            v = r.get(key)
            if v is None or (not isinstance(v, (list, tuple)) and pd.isna(v)):
                v = None
            if dec == 0 and v is not None:
                v = int(v)
            text = format_value(v, dec, unit) if v is not None else "n/a"
            cells.append(f"<td>{html.escape(text)}</td>")
        if r.get("status") == "ok":
            rel = f"{r.get('results_dir', r.get('stack'))}/report.html"
            last = f"<a href=\"{html.escape(rel)}\">{html.escape(rel)}</a>"
        else:
            last = f"<span class=\"failed\">{html.escape(str(r.get('error') or ''))}</span>"
        rows_html.append("<tr>" + "".join(cells) + f"<td>{last}</td></tr>")
    rows_html.append("</table>")
    parts.extend(rows_html)
    if pngs:
        parts.append("<h2>Comparison</h2><div class=\"figs\">")
        for name, png in pngs.items():
            parts.append(_img_tag(name, png, EXPERIMENT_FIGURES[name]))
        parts.append("</div>")
    parts.append("</body></html>")
    out = folder / "experiment_report.html"
    atomic_write_text(out, "\n".join(parts))
    return out
