"""Synthetic time-lapse stacks of a shoot apex with exact ground truth, and their TIFF output.

:func:`make_synthetic_stack` builds a primordium history (:mod:`apextrack.model.growth`), places it
on a dome and renders it (:mod:`apextrack.model.render`); :func:`write_synthetic` writes the stack
as an ImageJ hyperstack with correct metadata plus the truth tables; :func:`demo_stack_path`
finds the bundled demo stacks.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError, OutputError, SettingsError
from ..tables import atomic_write_bytes, write_json, write_table
from .growth import (GOLDEN_ANGLE_DEG, Growth, growth_rate_for_ratio, history_from_births,
                     intrinsic_truth, regular_history)
from .render import Optics, Scene, centres, motion, place, render_stack

TRUTH_COLUMNS = ["primordium", "birth_rank", "birth_time_h", "frame", "time_h", "x_um", "y_um",
                 "z_um", "r_um", "theta_deg", "radius_um", "visible", "age_h", "brightness",
                 "theta_image_deg", "x_px", "y_px", "z_px", "frame_status"]

PRIMORDIA_COLUMNS = ["birth_rank", "track_id", "emergence_time_h", "emergence_frame", "x_um", "y_um",
                     "r_um", "theta_deg", "co_initiated", "primordium", "born_before_record",
                     "birth_r_um", "theta_image_deg"]


@dataclass
class SyntheticStack:
    """A rendered synthetic time-lapse and its exact ground truth.

    Attributes
    ----------
    data : numpy.ndarray
        uint16 image, axes ``axes`` (``"TZYX"``, or ``"TZCYX"`` with a membrane channel).
    axes : str
    pixel_size_um, z_step_um, interval_h : float
        x/y pixel size, z step (µm) and time between frames (h).
    channel_names : list of str
    truth : pandas.DataFrame
        One row per (frame, primordium born by then): ``primordium`` (id = true birth rank),
        ``birth_rank``, ``birth_time_h``, ``frame``, ``time_h``, ``x_um``, ``y_um``, ``z_um``
        (image coordinates of that frame, µm = pixel index × pixel size), ``r_um`` and
        ``theta_deg`` (distance and azimuth about the apex centre in the apex's own frame:
        fixed azimuth, equal to the image azimuth of frame 0 when the dome is not tilted),
        ``radius_um`` (blob radius = √2·σ), ``visible`` (centre inside the field of view),
        plus ``age_h``, ``brightness``, ``theta_image_deg`` (azimuth seen in this frame's image
        about its true centre), ``x_px``, ``y_px``, ``z_px``, ``frame_status``.
    primordia : pandas.DataFrame
        One row per primordium, in the ``primordia`` table schema of :mod:`apextrack.tables`:
        ``birth_rank``, ``track_id`` (= primordium id), ``emergence_time_h`` (= true birth time,
        negative when born before the record), ``emergence_frame`` (first frame in which it is
        present and visible), ``x_um``, ``y_um``, ``r_um`` (position in that frame), ``theta_deg``
        (azimuth at birth about the true centre, counter-clockwise on the displayed image,
        apex frame), ``co_initiated``; plus ``primordium``, ``born_before_record``,
        ``birth_r_um``, ``theta_image_deg``.
    centre_um : pandas.DataFrame
        True apex centre per frame: ``frame, x_um, y_um, z_um`` and the specimen motion
        ``drift_x_um, drift_y_um, drift_z_um, rotation_deg`` and ``frame_status``
        (``ok``/``dim``/``missing``).
    params : dict
        Every parameter used (JSON-able).
    history : pandas.DataFrame
        The birth history of the primordia kept (visible in at least one frame).
    """

    data: np.ndarray
    axes: str
    pixel_size_um: float
    z_step_um: float
    interval_h: float
    channel_names: list[str]
    truth: pd.DataFrame
    primordia: pd.DataFrame
    centre_um: pd.DataFrame
    params: dict[str, Any] = field(default_factory=dict)
    history: pd.DataFrame | None = None

    @property
    def times_h(self) -> np.ndarray:
        return np.arange(self.data.shape[0]) * self.interval_h


def _pair(v, name):
    a = np.asarray(v, dtype=float).ravel()
    if a.size == 1:
        return float(a[0]), float(a[0])
    if a.size != 2:
        raise SettingsError(f"'{name}' must be one number or (z, xy)")
    return float(a[0]), float(a[1])


def make_synthetic_stack(n_frames: int = 12, interval_h: float = 3.0, plastochron_h: float = 6.0,
                         divergence_deg: float = GOLDEN_ANGLE_DEG, pixel_size_um: float = 0.8,
                         z_step_um: float = 5.0, shape_zyx=(8, 96, 96), apex_radius_um: float = 22.0,
                         growth_rate_per_h: float | None = None, plastochron_ratio: float = 1.12,
                         *, jugacy: int = 1, chirality: str = "ccw", theta0_deg: float = 0.0,
                         phase_h: float | None = None, permutation_prob: float = 0.0,
                         timing_jitter_h: float = 0.0, angle_jitter_deg: float = 0.0,
                         history: pd.DataFrame | None = None,
                         primordium_radius_um: float = 4.0, primordium_max_radius_um: float = 9.0,
                         brightness_at_birth: float = 0.6, rise_h: float | None = None,
                         noise: bool = True, peak_photons: float = 80.0, background_photons: float = 3.0,
                         dome_photons: float = 6.0, membrane_photons: float = 60.0,
                         gain: float = 2.0, offset_adu: float = 100.0, read_noise_adu: float = 3.0,
                         psf_fwhm_um=(2.5, 0.5), dome_curvature_um: float = 45.0,
                         drift_um_per_frame=(0.3, -0.2, 0.0), drift_jitter_um: float = 0.0,
                         rotation_deg_per_frame: float = 0.0, tilt_deg: float = 0.0,
                         tilt_direction_deg: float = 0.0, centre_xy_um=None, summit_z_um: float | None = None,
                         bleach_per_frame: float = 0.01, missing_frames=(), dim_frames=(),
                         dim_factor: float = 0.35, membrane: bool = False, seed: int = 0,
                         keep_invisible: bool = False) -> SyntheticStack:
    """Render a synthetic 3D+t stack of a shoot apex with exact ground truth.

    Defaults describe an Arabidopsis-like inflorescence meristem: primordia born every 6 h on a
    rim of radius 22 µm at the golden angle, plastochron ratio 1.12 (γ = ln 1.12 / 6 h), blob
    diameter 8 µm at birth growing to 18 µm, imaged every 3 h at 0.8 µm/pixel and 5 µm z steps.
    Primordia born before the first frame are already present, older ones farther out; only
    primordia visible in at least one frame are kept (ranked 1..n by birth time).

    Parameters
    ----------
    n_frames, interval_h : int, float
        Number of timepoints and time between them (h).
    plastochron_h, divergence_deg : float
        Time and angle between successive births (groups of ``jugacy`` primordia).
    pixel_size_um, z_step_um : float
        x/y pixel size and z step (µm).
    shape_zyx : tuple of int
        Size of each timepoint (Z, Y, X).
    apex_radius_um : float
        Radius of the rim circle where primordia are born (µm).
    growth_rate_per_h : float, optional
        Relative radial growth rate γ (1/h); default ``ln(plastochron_ratio) / plastochron_h``.
    plastochron_ratio : float
        Used when ``growth_rate_per_h`` is not given.
    jugacy : int
        1 spiral/distichous, 2 pairs (decussate with 90°), 3+ whorls.
    chirality : {"ccw", "cw"}
        Sense of the generative spiral on the displayed image.
    theta0_deg, phase_h : float
        Azimuth and time of the birth with index 0 of the regular sequence.
    permutation_prob, timing_jitter_h, angle_jitter_deg : float
        Irregularities of the history (see :func:`~apextrack.model.growth.regular_history`).
    history : pandas.DataFrame, optional
        Explicit births (columns ``birth_time_h``, ``theta_deg``, optional ``co_initiated``),
        e.g. from a simulation, or any primordia table (``emergence_time_h`` is then taken as
        the birth time); replaces the regular history.
    primordium_radius_um, primordium_max_radius_um : float
        Blob radius at birth and its cap (µm).
    brightness_at_birth, rise_h : float
        Reporter brightness at birth (fraction) and its rise time (h; default one plastochron).
    noise : bool
        Poisson + Gaussian camera noise (False: the expected values, rounded).
    peak_photons, background_photons, dome_photons, membrane_photons : float
        Signal levels in photons.
    gain, offset_adu, read_noise_adu : float
        Camera model.
    psf_fwhm_um : float or (z, xy)
        Full width at half maximum of the Gaussian PSF (µm).
    dome_curvature_um : float
        Curvature radius of the paraboloid dome at its summit (µm).
    drift_um_per_frame : (dx, dy) or (dx, dy, dz)
        Translation of the specimen per frame (µm); ``drift_jitter_um`` adds a random walk.
    rotation_deg_per_frame : float
        Rotation of the specimen per frame about the field centre (counter-clockwise on display).
    tilt_deg, tilt_direction_deg : float
        Tilt of the dome axis and the azimuth it leans towards.
    centre_xy_um : (x, y), optional
        Apex centre in frame 0 (default: centre of the field of view).
    summit_z_um : float, optional
        Height of the dome summit in frame 0 (default: 1.5 slices below the top slice).
    bleach_per_frame : float
        Fraction of signal lost per frame.
    missing_frames, dim_frames : sequence of int
        Frames with no signal (noise only) or with signal × ``dim_factor``.
    membrane : bool
        Add a membrane channel (axes ``TZCYX``, channels ``reporter``, ``membrane``).
    seed : int
        Seed of every random draw: the same arguments give the same stack.
    keep_invisible : bool
        Keep primordia that never enter the field of view.

    Returns
    -------
    SyntheticStack

    Examples
    --------
    >>> s = make_synthetic_stack(n_frames=3, shape_zyx=(4, 48, 48), apex_radius_um=10)
    >>> s.data.shape, s.axes
    ((3, 4, 48, 48), 'TZYX')
    """
    args = dict(locals())
    args.pop("history")
    if int(n_frames) != n_frames or n_frames < 1:
        raise SettingsError(f"n_frames must be a whole number ≥ 1, not {n_frames!r}")
    n_frames = int(n_frames)
    if not (interval_h > 0):
        raise SettingsError(f"interval_h must be greater than 0, not {interval_h!r}")
    rng = np.random.default_rng(seed)
    gamma = growth_rate_for_ratio(plastochron_ratio, plastochron_h) if growth_rate_per_h is None else float(growth_rate_per_h)
    growth = Growth(apex_radius_um=apex_radius_um, growth_rate_per_h=gamma,
                    radius_at_birth_um=primordium_radius_um, max_radius_um=primordium_max_radius_um,
                    brightness_at_birth=brightness_at_birth,
                    rise_h=plastochron_h if rise_h is None else rise_h)
    psf_z, psf_xy = _pair(psf_fwhm_um, "psf_fwhm_um")
    scene = Scene(shape_zyx=tuple(int(v) for v in shape_zyx), pixel_size_um=pixel_size_um,
                  z_step_um=z_step_um, centre_xy_um=None if centre_xy_um is None else tuple(map(float, centre_xy_um)),
                  dome_curvature_um=dome_curvature_um, tilt_deg=tilt_deg, summit_z_um=summit_z_um,
                  tilt_direction_deg=tilt_direction_deg,
                  drift_um_per_frame=tuple(float(v) for v in np.ravel(drift_um_per_frame)),
                  drift_jitter_um=drift_jitter_um, rotation_deg_per_frame=rotation_deg_per_frame)
    optics = Optics(psf_fwhm_xy_um=psf_xy, psf_fwhm_z_um=psf_z, peak_photons=peak_photons,
                    dome_photons=dome_photons, membrane_photons=membrane_photons,
                    background_photons=background_photons, gain=gain, offset_adu=offset_adu,
                    read_noise_adu=read_noise_adu, bleach_per_frame=bleach_per_frame, noise=noise)
    times = np.arange(n_frames) * float(interval_h)
    t_end = times[-1]
    if history is None:
        nz, ny, nx = scene.shape_zyx
        half_diag = 0.5 * math.hypot(nx, ny) * pixel_size_um
        drift = float(np.hypot(*np.ravel(drift_um_per_frame)[:2])) * n_frames + 3 * drift_jitter_um * math.sqrt(n_frames)
        r_far = half_diag + drift + primordium_max_radius_um + 2 * apex_radius_um
        back = math.log(max(r_far / apex_radius_um, 1.0)) / gamma if gamma > 0 else 4 * plastochron_h
        hist = regular_history(-back, t_end, divergence_deg=divergence_deg, plastochron_h=plastochron_h,
                               jugacy=jugacy, phase_h=phase_h, theta0_deg=theta0_deg, chirality=chirality,
                               permutation_prob=permutation_prob, timing_jitter_h=timing_jitter_h,
                               angle_jitter_deg=angle_jitter_deg, rng=rng)
    else:
        if "birth_time_h" not in history.columns and "emergence_time_h" in history.columns:
            history = history.rename(columns={"emergence_time_h": "birth_time_h"})  # a primordia table
        if not {"birth_time_h", "theta_deg"} <= set(history.columns):
            raise SettingsError("a history needs columns birth_time_h (or emergence_time_h) and theta_deg")
        hist = history_from_births(history["birth_time_h"], history["theta_deg"],
                                   history["co_initiated"] if "co_initiated" in history else None)
    hist = hist[hist["birth_time_h"] <= t_end + 1e-9].reset_index(drop=True)
    mot = motion(scene, n_frames, rng)
    truth = place(intrinsic_truth(hist, times, growth), scene, mot)
    if not keep_invisible:
        seen = np.unique(truth.loc[truth["visible"], "primordium"].to_numpy())
        hist = hist[hist["primordium"].isin(seen)].copy()
    # re-rank the kept primordia 1..n by birth order
    new_id = dict(zip(hist["primordium"].to_numpy(), np.arange(1, len(hist) + 1)))
    hist["primordium"] = hist["primordium"].map(new_id).astype(np.int64)
    hist["birth_rank"] = hist["primordium"]
    hist = hist.reset_index(drop=True)
    truth = truth[truth["primordium"].isin(list(new_id))].copy()
    truth["primordium"] = truth["primordium"].map(new_id).astype(np.int64)
    truth["birth_rank"] = truth["primordium"]
    # frame quality
    status = np.array(["ok"] * n_frames, dtype=object)
    factor = np.ones(n_frames)
    for f in dim_frames:
        if not 0 <= int(f) < n_frames:
            raise SettingsError(f"dim frame {f} is outside 0..{n_frames - 1}")
        status[int(f)], factor[int(f)] = "dim", dim_factor
    for f in missing_frames:
        if not 0 <= int(f) < n_frames:
            raise SettingsError(f"missing frame {f} is outside 0..{n_frames - 1}")
        status[int(f)], factor[int(f)] = "missing", 0.0
    truth["frame_status"] = status[truth["frame"].to_numpy()]
    truth = truth.sort_values(["frame", "birth_rank"], kind="stable").reset_index(drop=True)
    truth = truth[TRUTH_COLUMNS]
    cen = centres(scene, mot)
    cen["frame_status"] = status
    data = render_stack(truth, scene, optics, mot, n_frames=n_frames, membrane=membrane,
                        frame_factor=factor, rng=rng)
    primordia = _primordia_table(hist, truth, growth)
    args["growth_rate_per_h"] = gamma
    args["shape_zyx"] = list(scene.shape_zyx)
    args["psf_fwhm_um"] = [psf_z, psf_xy]
    args["drift_um_per_frame"] = list(scene.drift_um_per_frame)
    args["missing_frames"] = [int(v) for v in missing_frames]
    args["dim_frames"] = [int(v) for v in dim_frames]
    args["centre_xy_um"] = list(scene.summit_um[:2])
    args["summit_z_um"] = scene.summit_um[2]
    args["history_given"] = history is not None
    args["plastochron_ratio"] = math.exp(gamma * plastochron_h)
    return SyntheticStack(data=data, axes="TZCYX" if membrane else "TZYX",
                          pixel_size_um=float(pixel_size_um), z_step_um=float(z_step_um),
                          interval_h=float(interval_h),
                          channel_names=["reporter", "membrane"] if membrane else ["reporter"],
                          truth=truth, primordia=primordia, centre_um=cen, params=args,
                          history=hist)


def _primordia_table(hist: pd.DataFrame, truth: pd.DataFrame, growth: Growth) -> pd.DataFrame:
    ok = truth[truth["visible"] & (truth["frame_status"] != "missing")]
    first = ok.sort_values(["primordium", "frame"], kind="stable").groupby("primordium", sort=True).head(1)
    first = first.set_index("primordium")
    rows = []
    for h in hist.itertuples(index=False):
        pid = int(h.primordium)
        if pid in first.index:
            f = first.loc[pid]
            ef, x, y, r, thi = int(f["frame"]), float(f["x_um"]), float(f["y_um"]), float(f["r_um"]), float(f["theta_image_deg"])
        else:
            ef, x, y, r, thi = -1, math.nan, math.nan, math.nan, math.nan
        rows.append((int(h.birth_rank), pid, float(h.birth_time_h), ef, x, y, r, float(h.theta_deg) % 360.0,
                     bool(h.co_initiated), pid, bool(h.birth_time_h < 0), growth.apex_radius_um, thi))
    return pd.DataFrame(rows, columns=PRIMORDIA_COLUMNS)


def _stem_paths(path: Path) -> tuple[Path, Path, Path, Path]:
    name = path.name
    for suffix in (".ome.tiff", ".ome.tif", ".tiff", ".tif"):
        if name.lower().endswith(suffix):
            stem = name[: -len(suffix)]
            break
    else:
        raise OutputError("the stack must be written to a .tif or .tiff file", path, "give a name ending in .tif")
    d = path.parent
    return path, d / f"{stem}_truth.csv", d / f"{stem}_primordia.csv", d / f"{stem}_params.json"


def write_synthetic(synth: SyntheticStack, path: str | Path, compress: bool = False) -> dict[str, Path]:
    """Write a synthetic stack as an ImageJ hyperstack TIFF (or OME-TIFF) plus its ground truth.

    Writes ``path`` (uint16, axes as in ``synth.axes``). A name ending in ``.ome.tif(f)`` gives an
    OME-TIFF (PhysicalSizeX/Y/Z in µm, TimeIncrement in s, channel names); any other ``.tif``
    an ImageJ hyperstack (x/y pixel size in the resolution tags, z step as ``spacing``, frame
    interval as ``finterval`` in seconds, unit ``um``, one label per plane naming its channel).
    Beside it: ``<stem>_truth.csv`` (per frame), ``<stem>_primordia.csv`` (per primordium) and
    ``<stem>_params.json`` (every parameter and the apex centre per frame). Every file is written
    atomically.

    Parameters
    ----------
    synth : SyntheticStack
    path : str or Path
        Destination ``.tif`` file.
    compress : bool
        zlib compression (smaller file, but the stack can then not be memory-mapped).

    Returns
    -------
    dict
        Paths written, keys ``stack``, ``truth``, ``primordia``, ``params``.
    """
    import tifffile

    path = Path(path)
    stack_p, truth_p, prim_p, params_p = _stem_paths(path)
    n_c = len(synth.channel_names)
    n_t = synth.data.shape[0]
    n_z = synth.data.shape[synth.axes.index("Z")] if "Z" in synth.axes else 1
    buf = io.BytesIO()
    res = 1.0 / float(synth.pixel_size_um)
    if path.name.lower().endswith((".ome.tif", ".ome.tiff")):
        metadata = {"axes": synth.axes, "PhysicalSizeX": float(synth.pixel_size_um), "PhysicalSizeXUnit": "µm",
                    "PhysicalSizeY": float(synth.pixel_size_um), "PhysicalSizeYUnit": "µm",
                    "PhysicalSizeZ": float(synth.z_step_um), "PhysicalSizeZUnit": "µm",
                    "TimeIncrement": float(synth.interval_h) * 3600.0, "TimeIncrementUnit": "s",
                    "Channel": {"Name": list(synth.channel_names)}}
        tifffile.imwrite(buf, synth.data, ome=True, metadata=metadata, photometric="minisblack",
                         resolution=(res, res), resolutionunit="MICROMETER",
                         compression="zlib" if compress else None)
    else:
        metadata = {"axes": synth.axes, "spacing": float(synth.z_step_um), "unit": "um",
                    "finterval": float(synth.interval_h) * 3600.0,
                    "Labels": list(synth.channel_names) * (n_t * n_z)}
        if n_c > 1:
            metadata["mode"] = "composite"
        tifffile.imwrite(buf, synth.data, imagej=True, resolution=(res, res), metadata=metadata,
                         photometric="minisblack", compression="zlib" if compress else None)
    try:
        atomic_write_bytes(stack_p, buf.getvalue())
    except OSError as exc:
        raise OutputError(f"cannot write the stack ({exc.strerror or exc})", stack_p,
                          "choose another output folder") from None
    write_table(synth.truth, truth_p)
    write_table(synth.primordia, prim_p, table="primordia")
    write_json({"params": synth.params, "axes": synth.axes, "shape": list(synth.data.shape),
                "pixel_size_um": synth.pixel_size_um, "z_step_um": synth.z_step_um,
                "interval_h": synth.interval_h, "channel_names": synth.channel_names,
                "centre_um": synth.centre_um.to_dict(orient="list")}, params_p)
    return {"stack": stack_p, "truth": truth_p, "primordia": prim_p, "params": params_p}


DEMO_FILES = {"spiral": "coralbell_spiral.tif", "distichous": "coralbell_distichous.tif"}


def demo_stack_path(name: str = "spiral") -> Path:
    """Path of a bundled demo stack (``"spiral"`` or ``"distichous"``).

    The demo stacks are package data (``apextrack/sample_data``), found the same way from a
    source tree and from an installed package. Their truth tables sit beside them
    (``<stem>_truth.csv``, ``<stem>_primordia.csv``).
    """
    if name not in DEMO_FILES:
        raise InputError(f"no demo stack called '{name}'", hint=f"choose one of: {', '.join(DEMO_FILES)}")
    p = Path(str(resources.files("apextrack.sample_data").joinpath(DEMO_FILES[name])))
    if not p.exists():
        raise InputError("the bundled demo stack is missing", p,
                         "reinstall apextrack or run 'python sample_stacks/make_demo.py'")
    return p
