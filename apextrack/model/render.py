"""Synthetic microscopy: place primordia on a dome and render 3D+t fluorescence stacks.

Geometry
--------
Image coordinates: ``x_um = column · pixel_size``, ``y_um = row · pixel_size`` (rows run
downward), ``z_um = slice · z_step`` (slice 0 at the bottom of the stack, the dome summit near
the top). In the apex's own frame the surface is the paraboloid ``z' = −ρ²/(2·Rc)`` below the
summit (``Rc`` the curvature radius at the summit). A primordium at distance ``r`` and azimuth
``θ`` (counter-clockwise on the displayed image) sits at ``(r cos θ, −r sin θ, −r²/(2Rc) − depth)``.
The dome may be tilted by ``tilt_deg``: a rigid rotation about the summit point that leans the
dome axis towards the azimuth ``tilt_direction_deg`` (so the surface rises on the opposite side;
the summit point, where the axis meets the surface, stays the apex centre of the truth tables). Between timepoints the specimen moves: frame ``f`` is translated by the
cumulative drift and rotated by ``f × rotation_deg_per_frame`` (counter-clockwise on the display)
about the centre of the field of view. Frame 0 has no drift and no rotation.

Rendering
---------
Primordia are 3D Gaussian reporter blobs of standard deviation ``radius_um / √2`` (so that a
2D Laplacian-of-Gaussian detector on a projection finds radius √2·σ = ``radius_um``, Lindeberg
1998, IJCV 30), the dome surface is a faint shell (reporter channel) or a bright shell with a
cell-wall pattern (membrane channel). The anisotropic Gaussian point-spread function is applied
analytically: a Gaussian object convolved with a Gaussian PSF is a Gaussian whose variance is the
sum and whose peak falls by σ_obj/√(σ_obj² + σ_psf²) per axis (exact, no discretisation error).
Signals are converted to photons, bleached by ``(1 − bleach)^frame``, drawn from a Poisson
distribution, multiplied by the camera gain, and given an offset and Gaussian read noise.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from ..errors import SettingsError

_FWHM_TO_SIGMA = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))


@dataclass(frozen=True)
class Scene:
    """Where the apex is, how its dome is shaped and how the specimen moves between frames.

    Lengths in µm, angles in degrees (counter-clockwise on the displayed image).
    """

    shape_zyx: tuple[int, int, int] = (8, 96, 96)
    pixel_size_um: float = 0.8
    z_step_um: float = 5.0
    centre_xy_um: tuple[float, float] | None = None  # default: centre of the field of view
    summit_z_um: float | None = None  # default: 1.5 slices below the top slice
    dome_curvature_um: float = 45.0
    blob_depth_um: float = 1.0
    tilt_deg: float = 0.0
    tilt_direction_deg: float = 0.0
    drift_um_per_frame: tuple[float, float, float] = (0.0, 0.0, 0.0)
    drift_jitter_um: float = 0.0
    rotation_deg_per_frame: float = 0.0

    def __post_init__(self):
        if len(self.shape_zyx) != 3 or min(self.shape_zyx) < 1:
            raise SettingsError(f"shape_zyx must be three sizes ≥ 1, not {self.shape_zyx!r}")
        for name in ("pixel_size_um", "z_step_um", "dome_curvature_um"):
            if not (getattr(self, name) > 0):
                raise SettingsError(f"'{name}' must be greater than 0, not {getattr(self, name)!r}")
        if not (0 <= abs(self.tilt_deg) < 80):
            raise SettingsError("'tilt_deg' must be between −80 and 80 degrees")

    @property
    def field_centre_um(self) -> tuple[float, float]:
        z, y, x = self.shape_zyx
        return ((x - 1) / 2.0 * self.pixel_size_um, (y - 1) / 2.0 * self.pixel_size_um)

    @property
    def summit_um(self) -> tuple[float, float, float]:
        cx, cy = self.centre_xy_um if self.centre_xy_um is not None else self.field_centre_um
        nz = self.shape_zyx[0]
        sz = self.summit_z_um if self.summit_z_um is not None else max(nz - 2.5, 0.0) * self.z_step_um
        return (float(cx), float(cy), float(sz))

    def to_dict(self) -> dict:
        d = asdict(self)
        d["shape_zyx"] = list(self.shape_zyx)
        d["drift_um_per_frame"] = list(self.drift_um_per_frame)
        return d


def motion(scene: Scene, n_frames: int, rng: np.random.Generator | None = None) -> pd.DataFrame:
    """Drift and rotation of the specimen in each frame (frame 0: none).

    Returns a DataFrame ``frame, drift_x_um, drift_y_um, drift_z_um, rotation_deg``.
    """
    d = np.asarray(scene.drift_um_per_frame, dtype=float).ravel()
    if d.size == 2:
        d = np.append(d, 0.0)
    if d.size != 3:
        raise SettingsError("drift_um_per_frame must be (dx, dy) or (dx, dy, dz) in µm")
    f = np.arange(n_frames, dtype=float)
    steps = np.tile(d, (n_frames, 1))
    if scene.drift_jitter_um > 0:
        if rng is None:
            rng = np.random.default_rng(0)
        steps = steps + rng.normal(0.0, scene.drift_jitter_um, steps.shape)
    steps[0] = 0.0
    cum = np.cumsum(steps, axis=0)
    return pd.DataFrame({"frame": np.arange(n_frames, dtype=np.int64), "drift_x_um": cum[:, 0],
                         "drift_y_um": cum[:, 1], "drift_z_um": cum[:, 2],
                         "rotation_deg": f * scene.rotation_deg_per_frame})


def _tilt_basis(scene: Scene):
    psi = math.radians(scene.tilt_direction_deg)
    d = np.array([math.cos(psi), -math.sin(psi)])  # tilt direction in image (x, y)
    e = np.array([math.sin(psi), math.cos(psi)])   # perpendicular in image (x, y)
    b = math.radians(scene.tilt_deg)
    return d, e, math.cos(b), math.sin(b)


def dome_points(scene: Scene, r_um, theta_deg, depth_um: float | None = None):
    """Specimen-frame (x, y, z) of points at distance ``r`` and azimuth ``θ`` on the dome
    (before drift and rotation), ``depth_um`` below the surface."""
    r = np.asarray(r_um, dtype=float)
    th = np.radians(np.asarray(theta_deg, dtype=float))
    depth = scene.blob_depth_um if depth_um is None else depth_um
    u = r * np.cos(th)          # image x offset in the dome frame
    v = -r * np.sin(th)         # image y offset (rows run downward)
    zp = -r ** 2 / (2.0 * scene.dome_curvature_um) - depth
    d, e, cb, sb = _tilt_basis(scene)
    s = u * d[0] + v * d[1]
    w = u * e[0] + v * e[1]
    sd = s * cb + zp * sb
    z = -s * sb + zp * cb
    cx, cy, cz = scene.summit_um
    x = cx + sd * d[0] + w * e[0]
    y = cy + sd * d[1] + w * e[1]
    return x, y, cz + z


def to_image(scene: Scene, mot_row, x, y, z):
    """Specimen coordinates → image coordinates of one frame (rotation about the field centre,
    counter-clockwise on the display, then drift)."""
    fx, fy = scene.field_centre_um
    phi = math.radians(float(mot_row["rotation_deg"]))
    c, s = math.cos(phi), math.sin(phi)
    dx, dy = np.asarray(x) - fx, np.asarray(y) - fy
    xi = fx + c * dx + s * dy + float(mot_row["drift_x_um"])
    yi = fy - s * dx + c * dy + float(mot_row["drift_y_um"])
    return xi, yi, np.asarray(z) + float(mot_row["drift_z_um"])


def to_specimen(scene: Scene, mot_row, xi, yi):
    """Image (x, y) of one frame → specimen (x, y) (inverse of :func:`to_image`)."""
    fx, fy = scene.field_centre_um
    phi = math.radians(float(mot_row["rotation_deg"]))
    c, s = math.cos(phi), math.sin(phi)
    dx = np.asarray(xi) - float(mot_row["drift_x_um"]) - fx
    dy = np.asarray(yi) - float(mot_row["drift_y_um"]) - fy
    return fx + c * dx - s * dy, fy + s * dx + c * dy


def surface_height(scene: Scene, xs, ys):
    """Height (µm, specimen frame) of the dome surface above specimen points (x, y); NaN where a
    strongly tilted dome has no surface above the point."""
    cx, cy, cz = scene.summit_um
    d, e, cb, sb = _tilt_basis(scene)
    px, py = np.asarray(xs) - cx, np.asarray(ys) - cy
    xd = px * d[0] + py * d[1]
    w = px * e[0] + py * e[1]
    a = sb / (2.0 * scene.dome_curvature_um)
    c = xd + a * w ** 2
    disc = cb ** 2 - 4.0 * a * c
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.where(disc >= 0, 2.0 * c / (cb + np.sqrt(np.maximum(disc, 0.0))), np.nan)
    zp = -(s ** 2 + w ** 2) / (2.0 * scene.dome_curvature_um)
    return cz + (-s * sb + zp * cb)


@dataclass(frozen=True)
class Optics:
    """Point-spread function, brightness, noise and bleaching of the simulated microscope."""

    psf_fwhm_xy_um: float = 0.5
    psf_fwhm_z_um: float = 2.5
    peak_photons: float = 80.0          # photons at the peak of a mature, unblurred primordium
    dome_photons: float = 6.0           # reporter autofluorescence of the dome surface shell
    shell_thickness_um: float = 3.0     # FWHM of the surface shell
    membrane_photons: float = 60.0      # membrane channel: peak of a cell wall
    background_photons: float = 3.0     # uniform background per voxel
    gain: float = 2.0                   # camera ADU per photon
    offset_adu: float = 100.0
    read_noise_adu: float = 3.0
    bleach_per_frame: float = 0.01      # fraction of signal lost per frame
    noise: bool = True
    cell_size_um: float = 5.0           # membrane pattern: typical epidermal cell diameter
    wall_width_um: float = 0.6

    def __post_init__(self):
        if not (0 <= self.bleach_per_frame < 1):
            raise SettingsError("'bleach_per_frame' must be in [0, 1)", hint="a fraction lost per frame")
        for name in ("psf_fwhm_xy_um", "psf_fwhm_z_um", "peak_photons", "background_photons", "gain",
                     "read_noise_adu", "dome_photons", "membrane_photons", "offset_adu"):
            if not (getattr(self, name) >= 0):
                raise SettingsError(f"'{name}' must be 0 or more, not {getattr(self, name)!r}")

    def to_dict(self) -> dict:
        return asdict(self)


def place(truth: pd.DataFrame, scene: Scene, mot: pd.DataFrame) -> pd.DataFrame:
    """Add image positions to an intrinsic truth table (see
    :func:`apextrack.model.growth.intrinsic_truth`): ``x_um, y_um, z_um`` (and ``_px``),
    ``theta_image_deg`` (azimuth about the frame's apex centre as seen in the image) and
    ``visible`` (centre inside the field of view)."""
    out = truth.copy()
    xs, ys, zs = dome_points(scene, out["r_um"].to_numpy(float), out["theta_deg"].to_numpy(float))
    m = mot.set_index("frame").loc[out["frame"].to_numpy()]
    fx, fy = scene.field_centre_um
    phi = np.radians(m["rotation_deg"].to_numpy(float))
    c, s = np.cos(phi), np.sin(phi)
    dx, dy = xs - fx, ys - fy
    xi = fx + c * dx + s * dy + m["drift_x_um"].to_numpy(float)
    yi = fy - s * dx + c * dy + m["drift_y_um"].to_numpy(float)
    zi = zs + m["drift_z_um"].to_numpy(float)
    cen = centres(scene, mot).set_index("frame").loc[out["frame"].to_numpy()]
    out["x_um"], out["y_um"], out["z_um"] = xi, yi, zi
    px, dz = scene.pixel_size_um, scene.z_step_um
    out["x_px"], out["y_px"], out["z_px"] = xi / px, yi / px, zi / dz
    out["theta_image_deg"] = np.mod(np.degrees(np.arctan2(-(yi - cen["y_um"].to_numpy()),
                                                          xi - cen["x_um"].to_numpy())), 360.0)
    nz, ny, nx = scene.shape_zyx
    out["visible"] = ((out["x_px"] >= 0) & (out["x_px"] <= nx - 1) & (out["y_px"] >= 0)
                      & (out["y_px"] <= ny - 1) & (out["z_px"] >= -0.5) & (out["z_px"] <= nz - 0.5)
                      & np.isfinite(zi))
    return out


def centres(scene: Scene, mot: pd.DataFrame) -> pd.DataFrame:
    """True apex centre (the dome's summit point, origin of the phyllotactic frame) per frame."""
    cx, cy, cz = scene.summit_um
    rows = []
    for _, m in mot.iterrows():
        x, y, z = to_image(scene, m, cx, cy, cz)
        rows.append((int(m["frame"]), float(x), float(y), float(z)))
    df = pd.DataFrame(rows, columns=["frame", "x_um", "y_um", "z_um"])
    for col in ("drift_x_um", "drift_y_um", "drift_z_um", "rotation_deg"):
        df[col] = mot[col].to_numpy(float)
    return df


def _membrane_pattern(scene: Scene, optics: Optics, rng: np.random.Generator):
    """Random epidermal cell centres fixed to the specimen (a cKDTree) covering the field."""
    nz, ny, nx = scene.shape_zyx
    px = scene.pixel_size_um
    margin = 0.5 * max(nx, ny) * px
    lo = np.array([-margin, -margin])
    hi = np.array([nx * px + margin, ny * px + margin])
    n = int(np.prod(hi - lo) / optics.cell_size_um ** 2) + 1
    pts = lo + rng.random((n, 2)) * (hi - lo)
    return cKDTree(pts)


def render_frame(scene: Scene, optics: Optics, mot_row, frame_truth: pd.DataFrame,
                 membrane_tree: cKDTree | None = None) -> np.ndarray:
    """Noise-free expected photons of one frame, shape ``(C, Z, Y, X)`` float32 (C = 1 or 2)."""
    nz, ny, nx = scene.shape_zyx
    px, dz = scene.pixel_size_um, scene.z_step_um
    nc = 2 if membrane_tree is not None else 1
    vol = np.zeros((nc, nz, ny, nx), dtype=np.float32)
    zc = np.arange(nz) * dz
    yc = np.arange(ny) * px
    xc = np.arange(nx) * px
    sp_xy = optics.psf_fwhm_xy_um * _FWHM_TO_SIGMA
    sp_z = optics.psf_fwhm_z_um * _FWHM_TO_SIGMA
    # --- dome surface shell (reporter autofluorescence; membrane channel) ---------------------
    if optics.dome_photons > 0 or nc == 2:
        X, Y = np.meshgrid(xc, yc)
        sx, sy = to_specimen(scene, mot_row, X, Y)
        h = surface_height(scene, sx, sy) + float(mot_row["drift_z_um"])
        s_shell = math.hypot(optics.shell_thickness_um * _FWHM_TO_SIGMA, sp_z)
        with np.errstate(invalid="ignore"):
            g = np.exp(-0.5 * ((zc[:, None, None] - h[None]) / s_shell) ** 2)
        g = np.nan_to_num(g, nan=0.0).astype(np.float32)
        if optics.dome_photons > 0:
            vol[0] += optics.dome_photons * g
        if nc == 2:
            d, _ = membrane_tree.query(np.column_stack([sx.ravel(), sy.ravel()]), k=2)
            gap = (d[:, 1] - d[:, 0]).reshape(ny, nx)
            sw = math.hypot(optics.wall_width_um * _FWHM_TO_SIGMA, sp_xy)
            wall = np.exp(-0.5 * (gap / (2 * sw)) ** 2)
            wall_peak = optics.wall_width_um * _FWHM_TO_SIGMA / sw
            s_mem = math.hypot(0.5 * _FWHM_TO_SIGMA, sp_z)
            with np.errstate(invalid="ignore"):
                gm = np.exp(-0.5 * ((zc[:, None, None] - h[None]) / s_mem) ** 2)
            gm = np.nan_to_num(gm, nan=0.0)
            vol[1] += (optics.membrane_photons * (0.15 + 0.85 * wall_peak * wall)[None] * gm).astype(np.float32)
    # --- primordia: Gaussian blobs blurred analytically by the PSF ---------------------------
    for row in frame_truth.itertuples(index=False):
        so = row.radius_um / math.sqrt(2.0)
        sxy = math.hypot(so, sp_xy)
        sz = math.hypot(so, sp_z)
        amp = optics.peak_photons * row.brightness * (so / sxy) ** 2 * (so / sz)
        if not np.isfinite(row.z_um) or amp <= 0:
            continue
        i0, i1 = (int(math.floor((row.x_um - 4 * sxy) / px)), int(math.ceil((row.x_um + 4 * sxy) / px)) + 1)
        j0, j1 = (int(math.floor((row.y_um - 4 * sxy) / px)), int(math.ceil((row.y_um + 4 * sxy) / px)) + 1)
        k0, k1 = (int(math.floor((row.z_um - 4 * sz) / dz)), int(math.ceil((row.z_um + 4 * sz) / dz)) + 1)
        i0, j0, k0 = max(i0, 0), max(j0, 0), max(k0, 0)
        i1, j1, k1 = min(i1, nx), min(j1, ny), min(k1, nz)
        if i0 >= i1 or j0 >= j1 or k0 >= k1:
            continue
        gx = np.exp(-0.5 * ((xc[i0:i1] - row.x_um) / sxy) ** 2)
        gy = np.exp(-0.5 * ((yc[j0:j1] - row.y_um) / sxy) ** 2)
        gz = np.exp(-0.5 * ((zc[k0:k1] - row.z_um) / sz) ** 2)
        vol[0, k0:k1, j0:j1, i0:i1] += (amp * gz[:, None, None] * gy[None, :, None] * gx[None, None, :]).astype(np.float32)
    return vol


def camera(expected_photons: np.ndarray, optics: Optics, rng: np.random.Generator) -> np.ndarray:
    """Photon counts → uint16 camera values (Poisson shot noise, gain, offset, read noise)."""
    lam = expected_photons.astype(np.float64) + optics.background_photons
    if optics.noise:
        counts = rng.poisson(lam).astype(np.float64)
        adu = counts * optics.gain + optics.offset_adu + rng.normal(0.0, optics.read_noise_adu, lam.shape)
    else:
        adu = lam * optics.gain + optics.offset_adu
    return np.clip(np.rint(adu), 0, 65535).astype(np.uint16)


def render_stack(truth: pd.DataFrame, scene: Scene, optics: Optics, mot: pd.DataFrame, *,
                 n_frames: int, membrane: bool = False, frame_factor=None,
                 rng: np.random.Generator | None = None) -> np.ndarray:
    """Render every frame; returns uint16 ``(T, Z, Y, X)`` or ``(T, Z, C, Y, X)`` with membrane.

    Parameters
    ----------
    truth : pandas.DataFrame
        Placed truth (:func:`place`): one row per primordium and frame.
    frame_factor : sequence of float, optional
        Multiplier of the signal per frame (0 for a missing frame, < 1 for a dim frame).
    """
    rng = np.random.default_rng(0) if rng is None else rng
    tree = _membrane_pattern(scene, optics, rng) if membrane else None
    nz, ny, nx = scene.shape_zyx
    nc = 2 if membrane else 1
    out = np.empty((n_frames, nz, nc, ny, nx), dtype=np.uint16)
    factor = np.ones(n_frames) if frame_factor is None else np.asarray(frame_factor, dtype=float)
    by_frame = {f: g for f, g in truth.groupby("frame", sort=True)}
    empty = truth.iloc[:0]
    for f in range(n_frames):
        m = mot.iloc[f]
        vol = render_frame(scene, optics, m, by_frame.get(f, empty), tree)
        vol *= np.float32(factor[f] * (1.0 - optics.bleach_per_frame) ** f)
        out[f] = camera(vol, optics, rng).transpose(1, 0, 2, 3)
    return out if membrane else out[:, :, 0]
