"""Linking detections into tracks (one track per primordium) with trackpy."""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd

from .apex import azimuth_deg


def link_detections(detections: pd.DataFrame, search_range_um: float, memory: int = 2) -> pd.DataFrame:
    """Link detections frame to frame; returns the detections with an integer ``track_id``.

    Uses :func:`trackpy.link` on the µm positions, so a primordium may move at most
    ``search_range_um`` between frames and be missed in up to ``memory`` frames. Track ids are
    renumbered from 0 in order of first appearance (frame, then y, then x), so the same input
    always gives the same ids.
    """
    import trackpy

    trackpy.quiet(suppress=True)
    logging.getLogger("trackpy").setLevel(logging.WARNING)
    if detections.empty:
        out = detections.copy()
        out["track_id"] = pd.Series(dtype=np.int64)
        return out
    df = detections.reset_index(drop=True).copy()
    df["_row"] = np.arange(len(df))
    linked = trackpy.link(df, search_range=float(search_range_um), memory=int(memory),
                          pos_columns=["y_um", "x_um"], t_column="frame",
                          adaptive_stop=0.2 * float(search_range_um), adaptive_step=0.9)
    linked = linked.sort_values("_row", kind="stable")
    df["track_id"] = linked["particle"].to_numpy()
    return renumber_tracks(df).drop(columns="_row")


def renumber_tracks(df: pd.DataFrame) -> pd.DataFrame:
    """Renumber ``track_id`` 0, 1, 2 … by first frame, then y, then x of the first detection."""
    first = (df.sort_values(["frame", "y_um", "x_um"], kind="stable")
             .drop_duplicates("track_id")["track_id"].tolist())
    mapping = {old: new for new, old in enumerate(first)}
    out = df.copy()
    out["track_id"] = out["track_id"].map(mapping).astype(np.int64)
    return out.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)


def add_polar(tracks: pd.DataFrame, centres: pd.DataFrame) -> pd.DataFrame:
    """Add ``r_um`` and ``theta_deg`` about the apex centre of each row's frame.

    ``centres`` has columns ``frame``, ``x_um``, ``y_um``.
    """
    c = centres.set_index("frame")
    xc = tracks["frame"].map(c["x_um"]).to_numpy(float)
    yc = tracks["frame"].map(c["y_um"]).to_numpy(float)
    out = tracks.copy()
    dx = out["x_um"].to_numpy(float) - xc
    dy = out["y_um"].to_numpy(float) - yc
    out["r_um"] = np.hypot(dx, dy)
    out["theta_deg"] = azimuth_deg(out["x_um"].to_numpy(float), out["y_um"].to_numpy(float), xc, yc)
    return out
