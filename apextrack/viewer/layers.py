"""napari layer data for a stack and for the overlays of an analysis (no napari import here).

Every function returns napari *layer data tuples* ``(data, kwargs, layer_type)``. All layers sit
at physical scale: the world axes are hours (time), µm (y) and µm (x) — and µm (z) in front for
a 3D stack, which is shown with its axes ordered ``Z, T, Y, X`` so that every 2D overlay lines up
with the time axis of the image. Overlay coordinates are in image pixels of each frame with
``scale = (interval_h, pixel_size_um, pixel_size_um)``.

The colours and marker shapes of the overlays are defined once, in :data:`STYLE`; the legend
shown in the review widget is built from the same table.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

#: Key in ``layer.metadata`` under which apextrack keeps its layer role and results folder.
META_KEY = "apextrack"

#: Colours and marker shapes of the overlays (our own code), with the sentence of the legend.
STYLE: dict[str, dict] = {
    "detection": {"color": "#30d5c8", "symbol": "ring", "glyph": "○",
                  "text": "detection (every blob found, per frame)"},
    "primordium": {"color": "#3d8bff", "symbol": "disc", "glyph": "●",
                   "text": "primordium, labelled with its birth rank"},
    "co_initiated": {"color": "#ff3fd2", "symbol": "square", "glyph": "■",
                     "text": "co-initiated: birth order with a neighbour cannot be told apart"},
    "permuted": {"color": "#ffd400", "symbol": "triangle_up", "glyph": "▲",
                 "text": "in a permuted block of the birth order"},
    "low_confidence": {"color": "#ff7a00", "symbol": "diamond", "glyph": "◆",
                       "text": "low confidence: short track, uncertain rank or unexplained angle"},
    "centre": {"color": "#ffffff", "symbol": "cross", "glyph": "✚", "text": "apex centre"},
    "wedge": {"color": "#8ee000", "glyph": "◔", "text": "divergence angle between successive primordia"},
    "wedge_flagged": {"color": "#ff4040", "glyph": "◔", "text": "divergence angle not explained by the pattern"},
    "parastichy_m": {"color": "#b18cff", "glyph": "━", "text": "parastichy, first family (toggle)"},
    "parastichy_n": {"color": "#7fdcff", "glyph": "━", "text": "parastichy, second family (toggle)"},
}

#: Flag categories of a primordium, highest priority first.
FLAG_ORDER = ["co_initiated", "permuted", "low_confidence", "primordium"]

#: Layer name of each overlay role.
LAYER_NAMES = {
    "topview": "top view",
    "detections": "detections",
    "tracks": "tracks",
    "primordia": "primordia",
    "centre": "apex centre",
    "divergence": "divergence angles",
    "parastichies": "parastichies",
}


def _hex_rgba(color: str, alpha: float = 1.0) -> np.ndarray:
    c = color.lstrip("#")
    return np.array([int(c[i:i + 2], 16) / 255.0 for i in (0, 2, 4)] + [alpha])


def legend_html() -> str:
    """The legend of the overlay colours and shapes, as rich text for a Qt label."""
    rows = [f'<span style="color:{s["color"]}; font-size:14pt">{s["glyph"]}</span>&nbsp;{s["text"]}'
            for s in STYLE.values()]
    return "<br>".join(rows)


def _meta(role: str, folder) -> dict:
    return {META_KEY: {"role": role, "result": None if folder is None else str(folder)}}


# ----------------------------------------------------------------------------------------------
# images
# ----------------------------------------------------------------------------------------------
def stack_layers(stack, name: str | None = None, contrast: bool = True) -> list[tuple]:
    """Image layer(s) of a :class:`~apextrack.stack.Stack` at physical scale, read lazily.

    A 3D stack is shown with axes ``Z, T, Y, X`` (z slider in front), so that 2D overlays
    (``T, Y, X``) line up with its time axis. One layer per channel.
    """
    import dask
    import dask.array as da

    name = name or stack.name
    rest = stack.axes.replace("T", "")
    shape = tuple(stack.shape[stack.axes.index(a)] for a in rest)
    dtype = np.dtype(stack.data.dtype)
    frames = [da.from_delayed(dask.delayed(stack.timepoint)(t), shape=shape, dtype=dtype)
              for t in range(stack.n_frames)]
    data = da.stack(frames, axis=0)  # T + rest
    axes = "T" + rest
    px_x, px_y, px_z = stack.pixel_size_um
    order = [axes.index(a) for a in ("Z", "T", "C", "Y", "X") if a in axes]
    data = data.transpose(order)
    new_axes = "".join(axes[i] for i in order)
    scale = {"Z": px_z, "T": stack.interval_h, "Y": px_y, "X": px_x}
    units = {"Z": "um", "T": "h", "Y": "um", "X": "um"}
    spatial = [a for a in new_axes if a != "C"]
    kwargs: dict = {"scale": [float(scale[a]) for a in spatial],
                    "units": [units[a] for a in spatial],
                    "axis_labels": [a.lower() if a != "T" else "t" for a in spatial],
                    "metadata": {META_KEY: {"role": "stack", "path": str(stack.path) if stack.path else None,
                                            "axes": new_axes}},
                    "blending": "additive"}
    if "C" in new_axes and stack.n_channels > 1:
        kwargs["channel_axis"] = new_axes.index("C")
        kwargs["name"] = [f"{name} [{c}]" for c in stack.channel_names]
        kwargs["colormap"] = ["gray", "magenta", "green", "cyan"][: stack.n_channels] + \
            ["gray"] * max(0, stack.n_channels - 4)
    else:
        if "C" in new_axes:
            data = data[(slice(None),) * new_axes.index("C") + (0,)]
        kwargs["name"] = name
        kwargs["colormap"] = "gray"
    if contrast:
        mid = stack.timepoint(stack.n_frames // 2)
        lo, hi = float(np.min(mid)), float(np.max(mid))
        if hi > lo:
            kwargs["contrast_limits"] = [lo, hi]
    return [(data, kwargs, "image")]


def topview_layer(topview, pixel_size_um: float, interval_h: float, folder=None, name: str | None = None) -> tuple:
    """The top view (T, Y, X) as an image layer at physical scale.

    ``topview`` is an array or the path of ``topview.tif``.
    """
    if isinstance(topview, (str, Path)):
        import tifffile

        try:
            data = tifffile.memmap(str(topview), mode="r")
        except (ValueError, OSError):
            data = tifffile.imread(str(topview))
    else:
        data = topview
    finite = np.asarray(data[len(data) // 2])
    lo, hi = float(np.nanmin(finite)), float(np.nanmax(finite))
    kwargs = {"name": name or LAYER_NAMES["topview"], "scale": [interval_h, pixel_size_um, pixel_size_um],
              "units": ["h", "um", "um"], "axis_labels": ["t", "y", "x"], "colormap": "gray",
              "blending": "additive", "metadata": _meta("topview", folder)}
    if hi > lo:
        kwargs["contrast_limits"] = [lo, hi]
    return (data, kwargs, "image")


def topview_of_stack(stack, projection: str = "max", channel=None) -> tuple:
    """A lazily computed top view of a stack (one :func:`apextrack.projection.top_view` per frame)."""
    import dask
    import dask.array as da

    from ..projection import top_view

    ny, nx = stack.shape_yx

    def one(t):
        return np.asarray(top_view(stack.frame(t, channel), projection), dtype=np.float32)

    data = da.stack([da.from_delayed(dask.delayed(one)(t), shape=(ny, nx), dtype=np.float32)
                     for t in range(stack.n_frames)])
    return topview_layer(data, stack.pixel_size_um[0], stack.interval_h,
                         name=f"{LAYER_NAMES['topview']} ({projection})")


# ----------------------------------------------------------------------------------------------
# overlays
# ----------------------------------------------------------------------------------------------
def primordium_flags(primordia: pd.DataFrame, divergence: pd.DataFrame, min_track_frames: int = 2,
                     min_rank_confidence: float = 0.5) -> pd.DataFrame:
    """Flags of every primordium for display: co-initiated, permuted, low confidence.

    - co-initiated: the ``co_initiated`` column of the primordia table;
    - permuted: one end of a divergence angle inside a permuted block (``permutation_id > 0``);
    - low confidence: a track seen in fewer than ``min_track_frames`` frames, a
      ``rank_confidence`` below ``min_rank_confidence``, or an angle into it that no pattern
      explains (``unexplained``).

    Returns one row per primordium: ``track_id``, ``birth_rank``, the three flags and ``flag``
    (the highest-priority category of :data:`FLAG_ORDER`).
    """
    p = primordia[["track_id", "birth_rank"]].copy()
    p["co_initiated"] = primordia["co_initiated"].astype(bool).to_numpy() if "co_initiated" in primordia else False
    permuted_ranks: set[int] = set()
    unexplained_ranks: set[int] = set()
    if len(divergence):
        if "permutation_id" in divergence:
            perm = divergence[pd.to_numeric(divergence["permutation_id"], errors="coerce").fillna(0) > 0]
            permuted_ranks |= set(perm["from_rank"].astype(int)) | set(perm["to_rank"].astype(int))
        if "unexplained" in divergence:
            unx = divergence[divergence["unexplained"].astype(str).str.lower().isin(["true", "1"])]
            unexplained_ranks |= set(unx["to_rank"].astype(int))
    p["permuted"] = p["birth_rank"].astype(int).isin(permuted_ranks).to_numpy()
    low = np.array(p["birth_rank"].astype(int).isin(unexplained_ranks).to_numpy(), dtype=bool)
    if "n_frames" in primordia:
        low |= (pd.to_numeric(primordia["n_frames"], errors="coerce").fillna(0) < min_track_frames).to_numpy()
    if "rank_confidence" in primordia:
        rc = pd.to_numeric(primordia["rank_confidence"], errors="coerce").to_numpy(float)
        low |= np.where(np.isnan(rc), False, rc < min_rank_confidence)
    p["low_confidence"] = low
    flag = np.full(len(p), "primordium", dtype=object)
    for name in reversed(FLAG_ORDER[:-1]):
        flag[p[name].to_numpy(bool)] = name
    p["flag"] = flag
    return p.reset_index(drop=True)


def _yx_px(df: pd.DataFrame, px: float) -> np.ndarray:
    return np.column_stack([df["y_um"].to_numpy(float) / px, df["x_um"].to_numpy(float) / px])


def detections_layer(tracks: pd.DataFrame, px: float, interval_h: float, folder=None) -> tuple:
    """Points (frame, y, x) of every detection; ``features`` keep the whole tracks row."""
    tr = tracks.reset_index(drop=True)
    data = np.column_stack([tr["frame"].to_numpy(float), _yx_px(tr, px)]) if len(tr) else np.zeros((0, 3))
    radius = tr["radius_um"].to_numpy(float) / px if len(tr) else np.zeros(0)
    size = np.where(np.isfinite(radius), 2.0 * radius, 8.0)
    kwargs = {"name": LAYER_NAMES["detections"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"], "features": tr.copy(), "size": size,
              "symbol": STYLE["detection"]["symbol"], "face_color": STYLE["detection"]["color"],
              "border_width": 0.0, "opacity": 0.9, "metadata": _meta("detections", folder)}
    return (data, kwargs, "points")


def tracks_layer(tracks: pd.DataFrame, px: float, interval_h: float, folder=None) -> tuple:
    """Tracks (track_id, frame, y, x), rebuilt from the tracks table; ``detection_id`` kept in features."""
    tr = tracks.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    data = np.column_stack([tr["track_id"].to_numpy(float), tr["frame"].to_numpy(float), _yx_px(tr, px)])
    n_frames = int(tr["frame"].max()) + 1 if len(tr) else 1
    kwargs = {"name": LAYER_NAMES["tracks"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"],
              "features": tr[["detection_id", "track_id", "frame"]].copy(), "tail_length": n_frames,
              "tail_width": 2, "colormap": "hsv", "blending": "translucent", "metadata": _meta("tracks", folder)}
    return (data, kwargs, "tracks")


def primordia_layer(tracks: pd.DataFrame, primordia: pd.DataFrame, divergence: pd.DataFrame, px: float,
                    interval_h: float, min_track_frames: int = 2, folder=None) -> tuple:
    """Points at every detection of every primordium from its emergence on, labelled with the
    birth rank, coloured and shaped by its flag (:data:`STYLE`)."""
    flags = primordium_flags(primordia, divergence, min_track_frames)
    pts = tracks.merge(flags, on="track_id", how="inner", sort=False)
    pts = pts.sort_values(["birth_rank", "frame"], kind="stable").reset_index(drop=True)
    em = primordia.set_index("track_id")["emergence_frame"]
    pts["at_emergence"] = (pts["frame"].to_numpy() == pts["track_id"].map(em).to_numpy())
    data = np.column_stack([pts["frame"].to_numpy(float), _yx_px(pts, px)]) if len(pts) else np.zeros((0, 3))
    radius = pts["radius_um"].to_numpy(float) / px if len(pts) else np.zeros(0)
    size = np.where(np.isfinite(radius), radius, 4.0) * np.where(pts["at_emergence"].to_numpy(bool), 1.4, 1.0)
    colors = np.array([_hex_rgba(STYLE[f]["color"]) for f in pts["flag"]]) if len(pts) else np.zeros((0, 4))
    symbols = [STYLE[f]["symbol"] for f in pts["flag"]]
    feats = pts[["detection_id", "track_id", "frame", "birth_rank", "co_initiated", "permuted",
                 "low_confidence", "flag", "at_emergence"]].copy()
    kwargs = {"name": LAYER_NAMES["primordia"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"], "features": feats, "size": size,
              "symbol": symbols if len(symbols) else "disc", "face_color": colors if len(pts) else "white",
              "border_color": "black", "border_width": 0.05,
              "text": {"string": "{birth_rank}", "anchor": "upper_left", "color": "white", "size": 10},
              "metadata": _meta("primordia", folder)}
    return (data, kwargs, "points")


def centre_layer(centres: pd.DataFrame, px: float, interval_h: float, folder=None) -> tuple:
    """The apex centre of every frame."""
    c = centres.reset_index(drop=True)
    data = np.column_stack([c["frame"].to_numpy(float), _yx_px(c, px)])
    kwargs = {"name": LAYER_NAMES["centre"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"], "features": c.copy(), "size": 6.0,
              "symbol": STYLE["centre"]["symbol"], "face_color": STYLE["centre"]["color"],
              "border_width": 0.0, "metadata": _meta("centre", folder)}
    return (data, kwargs, "points")


def _arc(cx: float, cy: float, r: float, start_deg: float, sweep_deg: float, n: int = 16) -> np.ndarray:
    a = np.deg2rad(start_deg + np.linspace(0.0, sweep_deg, n))
    # theta is counter-clockwise on the displayed image: y = yc - r sin(theta)
    return np.column_stack([cy - r * np.sin(a), cx + r * np.cos(a)])


def divergence_layer(divergence: pd.DataFrame, primordia: pd.DataFrame, centres: pd.DataFrame, chirality,
                     n_frames: int, px: float, interval_h: float, folder=None) -> tuple:
    """Wedges from each primordium to the next (in birth order), spanning the divergence angle in
    the direction of the generative spiral, drawn about the apex centre of every frame from the
    frame where the angle was measured on. Labelled with the angle."""
    shapes, feats = [], []
    prim = primordia.set_index("birth_rank")
    cen = centres.set_index("frame")
    r_all = primordia["r_um"].to_numpy(float)
    r_max = float(np.nanmax(r_all)) if len(r_all) and np.isfinite(r_all).any() else 20.0
    n = max(len(divergence), 1)
    sign = -1.0 if str(chirality).lower() in ("cw", "clockwise") else 1.0
    for k, row in enumerate(divergence.itertuples(index=False)):
        a, b = int(row.from_rank), int(row.to_rank)
        if a not in prim.index or b not in prim.index or not math.isfinite(float(row.angle_deg)):
            continue
        start = getattr(row, "from_theta_deg", float("nan"))
        if start is None or not math.isfinite(float(start)):
            start = float(prim.loc[a, "theta_deg"])
        f0 = getattr(row, "frame", None)
        if f0 is None or pd.isna(f0):
            f0 = int(max(prim.loc[a, "emergence_frame"], prim.loc[b, "emergence_frame"]))
        radius = r_max * (0.3 + 0.6 * (k + 1) / n)
        flagged = bool(str(getattr(row, "unexplained", False)).lower() in ("true", "1")) or \
            (pd.notna(getattr(row, "permutation_id", 0)) and float(getattr(row, "permutation_id", 0) or 0) > 0)
        for f in range(int(f0), int(n_frames)):
            if f not in cen.index:
                continue
            cx, cy = float(cen.loc[f, "x_um"]), float(cen.loc[f, "y_um"])
            arc = _arc(cx, cy, radius, float(start), sign * float(row.angle_deg))
            poly = np.vstack([[cy, cx], arc]) / px
            shapes.append(np.column_stack([np.full(len(poly), float(f)), poly]))
            feats.append({"from_rank": a, "to_rank": b, "frame": f, "angle_deg": float(row.angle_deg),
                          "flagged": flagged})
    feats_df = pd.DataFrame(feats, columns=["from_rank", "to_rank", "frame", "angle_deg", "flagged"])
    edge = [STYLE["wedge_flagged" if f["flagged"] else "wedge"]["color"] for f in feats]
    face = [_hex_rgba(STYLE["wedge_flagged" if f["flagged"] else "wedge"]["color"], 0.12) for f in feats]
    kwargs = {"name": LAYER_NAMES["divergence"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"], "shape_type": "polygon", "features": feats_df,
              "edge_color": edge if edge else "white", "face_color": face if face else "transparent",
              "edge_width": 0.6, "opacity": 0.8,
              "text": {"string": "{angle_deg:.0f}°", "color": "white", "size": 8, "anchor": "center"},
              "metadata": _meta("divergence", folder)}
    return (shapes, kwargs, "shapes")


def parastichy_layer(parastichies: pd.DataFrame | None, primordia: pd.DataFrame, tracks: pd.DataFrame,
                     px: float, interval_h: float, visible: bool = False, folder=None) -> tuple:
    """The fitted contact parastichies: for each spiral (family, index), a path through its
    primordia in birth order, drawn in every frame where at least two of them are seen."""
    paths, feats = [], []
    if parastichies is not None and len(parastichies):
        rank_to_track = dict(zip(primordia["birth_rank"].astype(int), primordia["track_id"].astype(int)))
        pos = tracks.set_index(["track_id", "frame"])[["x_um", "y_um"]]
        frames = sorted(set(tracks["frame"].astype(int)))
        for (family, index), grp in parastichies.groupby(["family", "spiral_index"], sort=True):
            ranks = sorted(int(r) for r in grp["birth_rank"])
            tids = [rank_to_track[r] for r in ranks if r in rank_to_track]
            number = int(grp["parastichy_number"].iloc[0]) if "parastichy_number" in grp else 0
            for f in frames:
                pts = [pos.loc[(t, f)] for t in tids if (t, f) in pos.index]
                if len(pts) < 2:
                    continue
                yx = np.array([[float(p["y_um"]), float(p["x_um"])] for p in pts]) / px
                paths.append(np.column_stack([np.full(len(yx), float(f)), yx]))
                feats.append({"family": str(family), "spiral_index": int(index), "parastichy_number": number,
                              "frame": f})
    feats_df = pd.DataFrame(feats, columns=["family", "spiral_index", "parastichy_number", "frame"])
    colors = [STYLE["parastichy_m" if f["family"] == "m" else "parastichy_n"]["color"] for f in feats]
    kwargs = {"name": LAYER_NAMES["parastichies"], "scale": [interval_h, px, px], "units": ["h", "um", "um"],
              "axis_labels": ["t", "y", "x"], "shape_type": "path", "features": feats_df,
              "edge_color": colors if colors else "white", "edge_width": 0.8, "visible": visible,
              "metadata": _meta("parastichies", folder)}
    return (paths, kwargs, "shapes")


def overlay_layers(correction, parastichies_visible: bool = False) -> list[tuple]:
    """Every overlay of a :class:`~apextrack.edits.Correction`, bottom to top."""
    c = correction
    px, dt, folder = c.pixel_size_um, c.interval_h, c.source
    n_frames = int(c.summary.get("n_frames") or (int(c.centres["frame"].max()) + 1))
    return [
        tracks_layer(c.tracks, px, dt, folder),
        divergence_layer(c.divergence, c.primordia, c.centres, c.summary.get("chirality"), n_frames, px, dt, folder),
        parastichy_layer(c.tables.get("parastichies"), c.primordia, c.tracks, px, dt, parastichies_visible, folder),
        detections_layer(c.tracks, px, dt, folder),
        centre_layer(c.centres, px, dt, folder),
        primordia_layer(c.tracks, c.primordia, c.divergence, px, dt, c.settings.min_track_frames, folder),
    ]


def summary_html(summary: dict, notes: list[str] | None = None) -> str:
    """The measurements of a summary as short rich text (for the review widget)."""
    def num(key, nd=1, unit=""):
        v = summary.get(key)
        return "n/a" if v is None else f"{v:.{nd}f}{unit}"

    def ci(key, nd=1, unit=""):
        v = summary.get(key)
        if not v or any(x is None for x in v):
            return ""
        return f" [{v[0]:.{nd}f}, {v[1]:.{nd}f}]{unit}"

    pair = summary.get("parastichy_pair")
    lines = [
        f"<b>{summary.get('n_primordia', 'n/a')}</b> primordia, {summary.get('n_tracks', 'n/a')} tracks, "
        f"{summary.get('n_detections', 'n/a')} detections",
        f"divergence {num('divergence_mean_deg', 1, '°')} ± {num('divergence_sd_deg', 1, '°')}"
        f"{ci('divergence_ci_deg', 1, '°')} (chirality {summary.get('chirality', 'n/a')})",
        f"plastochron {num('plastochron_h', 2, ' h')}{ci('plastochron_ci_h', 2, ' h')}",
        f"plastochron ratio {num('plastochron_ratio', 3)}{ci('plastochron_ratio_ci', 3)}",
        f"parastichies {'n/a' if not pair else f'{pair[0]}:{pair[1]}'}"
        f" ({summary.get('parastichy_class') or 'n/a'}); mode {summary.get('mode') or 'n/a'}",
        f"co-initiated {summary.get('n_co_initiated', 'n/a')}, permuted {summary.get('n_permuted', 'n/a')}, "
        f"unexplained angles {summary.get('n_unexplained', 'n/a')}",
        f"birth order: {(summary.get('birth_order') or {}).get('method', 'n/a')}",
    ]
    for n in (notes or []):
        lines.append(f"<i>{n}</i>")
    return "<br>".join(lines)
