"""Every parameter of an analysis, with its default, unit and meaning; TOML load and save.

A :class:`Settings` object travels through the whole pipeline and is stored in full in the run
record, so that any run can be reproduced exactly. ``apextrack settings --write FILE.toml``
writes the defaults, each with a comment giving its unit and meaning.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from .errors import SettingsError

from .constants import GOLDEN_ANGLE_DEG  # the default expected angle


def _p(default, unit: str, meaning: str, *, low=None, high=None, choices=None, kind=None):
    """A settings field with its unit, meaning and allowed range."""
    return field(default=default, metadata={"unit": unit, "meaning": meaning, "low": low,
                                            "high": high, "choices": choices, "kind": kind})


@dataclass
class Settings:
    """All analysis parameters. Lengths in µm, times in hours, angles in degrees."""

    # --- input -------------------------------------------------------------------------------
    channel: str | int | None = _p(None, "", "reporter channel, by name or 0-based index (default: the first)", kind="channel")
    membrane_channel: str | int | None = _p(None, "", "optional membrane channel used to find the dome surface", kind="channel")
    pixel_size_um: float | None = _p(None, "µm", "x/y pixel size; overrides the file's metadata", low=0.0)
    z_step_um: float | None = _p(None, "µm", "z step; overrides the file's metadata", low=0.0)
    interval_h: float | None = _p(None, "h", "time between frames; overrides the file's metadata", low=0.0)
    time_axis: str | None = _p(None, "", "which axis of the file is time (T, Z, C or Q) when the file does not say", choices=[None, "T", "Z", "C", "Q", "I"])
    # --- image stage -------------------------------------------------------------------------
    register: bool = _p(True, "", "correct drift and rotation between timepoints")
    projection: str = _p("max", "", "top view of each 3D timepoint: 'max' (maximum) or 'surface' (shell below the dome surface)", choices=["max", "surface"])
    dome_every_frames: int = _p(1, "frames", "fit the dome surface (height map and paraboloid) on every k-th frame of a 3D stack; the frames between take the fitted domes interpolated in the registered frame of reference, and the z of their detections from the last height map (1: every frame; larger k saves time on thick, clean stacks, but on thin or noisy ones every fit's error is carried to the frames between)", low=1, high=1000)
    shell_depth_um: float = _p(6.0, "µm", "depth of the shell below the dome surface (surface projection)", low=0.0)
    centre_um: tuple[float, float] | None = _p(None, "µm", "apex centre (x, y) fixed by the user instead of fitted", kind="pair")
    centre_method: str = _p("auto", "", "apex centre: 'dome' (summit of the paraboloid fitted to the dome surface; centre of the dome in the top view for 2D stacks), 'view' (centre of the dome in the top view), 'motion' (where the primordia's outward motion starts), 'pattern' (the centre that makes successive azimuths and ln r most regular), 'auto' (motion when enough tracks, else pattern, else dome)", choices=["auto", "dome", "view", "motion", "pattern"])
    surface_side: str = _p("auto", "", "side of the stack the dome faces: '+z' (summit at high slice index), '-z', or 'auto' (from the data)", choices=["auto", "+z", "-z"])
    tilt_correction: bool = _p(True, "", "measure azimuths in the plane perpendicular to the fitted dome axis (3D stacks)")
    detect_3d: bool = _p(False, "", "detect primordia in the 3D volume (anisotropic Laplacian of Gaussian) instead of the top view")
    primordium_diameter_min_um: float = _p(6.0, "µm", "smallest primordium diameter to detect", low=0.0)
    primordium_diameter_max_um: float = _p(20.0, "µm", "largest primordium diameter to detect", low=0.0)
    n_scales: int = _p(6, "", "number of scales of the Laplacian-of-Gaussian search", low=1, high=50)
    min_snr: float = _p(4.0, "", "minimum signal-to-noise ratio of a detection", low=0.0)
    apex_region_factor: float = _p(1.2, "", "detections farther than this × the region radius from the centre are rejected", low=0.0)
    # --- tracking ----------------------------------------------------------------------------
    link_search_um: float = _p(12.0, "µm", "largest displacement of a primordium between frames", low=0.0)
    link_memory: int = _p(2, "frames", "how many frames a primordium may be missed and still be linked", low=0, high=100)
    min_track_frames: int = _p(2, "frames", "tracks shorter than this are marked as short", low=1)
    link_growth_aware: bool = _p(True, "", "link a second time predicting each primordium's outward drift, the rotation and the drift fitted from a first nearest-neighbour linking")
    link_jump_um: float | None = _p(None, "µm", "a track is cut where a detection lies farther than this from where the track predicts it (default: half of link_search_um)", low=0.0)
    # --- birth order -------------------------------------------------------------------------
    co_initiation_h: float | None = _p(None, "h", "emergences closer than this are flagged co-initiated (default: from the timing uncertainty)", low=0.0)
    # --- analysis ----------------------------------------------------------------------------
    expected_angle_deg: float = _p(GOLDEN_ANGLE_DEG, "deg", "expected divergence angle used to classify permutations", low=0.0, high=360.0)
    von_mises_kappa: float = _p(10.4, "", "concentration of the von Mises angle classes", low=0.0)
    bootstrap_n: int = _p(2000, "", "bootstrap resamples for confidence intervals", low=0)
    confidence: float = _p(0.95, "", "confidence level of the intervals", low=0.0, high=1.0)
    seed: int = _p(0, "", "random seed (bootstrap); the same seed gives the same tables", low=0)
    parastichy_frame: int | None = _p(None, "", "frame whose primordia positions give the parastichies and the plastochron ratio (default: the frame with most primordia)", low=0)
    parastichy_min_primordia: int = _p(6, "", "fewest primordia visible in one frame to look for contact parastichies", low=3)
    mode_tolerance_deg: float = _p(25.0, "deg", "largest deviation of an angle from a pattern mode's prediction that still counts as fitting it", low=0.0, high=90.0)
    permutation_prior: float = _p(0.05, "", "prior probability that an organ starts a permuted block of birth order", low=0.0, high=0.5)
    # --- computing (the results do not depend on these) ---------------------------------------
    threads: int = _p(0, "", "threads measuring frames of one stack at once (0: one per CPU core); every frame is measured on its own and the results are put together in frame order, so the tables are the same for any number", low=0, high=256)
    frame_processes: bool = _p(True, "", "measure frames in worker processes (as many as threads) rather than threads where possible: on Linux, from a stack file, when the analysis is the only thread of its program; the tables are the same either way")
    frames_per_task: int = _p(32, "frames", "batch: a stack with more frames than this is split into tasks of this many frames, measured on any worker and put together by one task per stack (0: one task per stack)", low=0)
    # --- output ------------------------------------------------------------------------------
    report: bool = _p(True, "", "write report.html with figures")
    report_frame: int | None = _p(None, "", "frame shown in the report's top view (default: the last)", low=0)

    def __post_init__(self):
        validate(self)

    def replace(self, **changes) -> "Settings":
        """A copy with some values changed (validated)."""
        for key in changes:
            if key not in FIELD_NAMES:
                raise SettingsError(f"unknown setting '{key}'", hint=f"known settings: {', '.join(FIELD_NAMES)}")
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of every value (tuples as lists)."""
        d = dataclasses.asdict(self)
        for k, v in d.items():
            if isinstance(v, tuple):
                d[k] = list(v)
        return d


FIELD_NAMES = [f.name for f in fields(Settings)]
#: Settings that change how the work is spread, never the results (left out of ``summary.json``,
#: kept in ``run.json``).
COMPUTING_FIELDS = ("threads", "frame_processes", "frames_per_task")


def result_settings(s: "Settings") -> dict[str, Any]:
    """The settings that determine the results (:meth:`Settings.to_dict` without
    :data:`COMPUTING_FIELDS`)."""
    return {k: v for k, v in s.to_dict().items() if k not in COMPUTING_FIELDS}


def _type_name(f) -> str:
    return str(f.type).replace("None", "").replace("|", "or").strip(" or")


def _coerce(f, value, source):
    """Check and convert one value against its field; raise SettingsError naming the key."""
    name = f.name
    meta = f.metadata
    default = f.default
    where = source

    def bad(msg):
        raise SettingsError(f"setting '{name}' {msg}", where, f"{meta['meaning']} ({_type_name(f)})")

    if value is None:
        if default is None:
            return None
        bad("cannot be empty")
    kind = meta.get("kind")
    if kind == "channel":
        if isinstance(value, bool) or not isinstance(value, (int, str)):
            bad(f"must be a channel name or index, not {value!r}")
        if isinstance(value, str) and value.strip().lstrip("-").isdigit():
            value = int(value)
        if isinstance(value, int) and value < 0:
            bad("must be 0 or more")
        return value
    if kind == "pair":
        if isinstance(value, str):
            try:
                value = [float(v) for v in value.split(",")]
            except ValueError:
                bad(f"must be two numbers 'X,Y', not {value!r}")
        if not isinstance(value, (list, tuple)) or len(value) != 2:
            bad(f"must be two numbers (x, y), not {value!r}")
        try:
            pair = (float(value[0]), float(value[1]))
        except (TypeError, ValueError):
            bad(f"must be two numbers (x, y), not {value!r}")
        if not all(math.isfinite(v) for v in pair):
            bad("must be finite numbers")
        return pair
    want = type(default) if default is not None else None
    if want is None:
        # optional numbers: infer from the annotation
        t = str(f.type)
        want = float if "float" in t else int if "int" in t else str
    if want is bool:
        if isinstance(value, bool):
            return value
        if isinstance(value, str) and value.lower() in ("true", "false", "yes", "no", "1", "0"):
            return value.lower() in ("true", "yes", "1")
        bad(f"must be true or false, not {value!r}")
    if want is int:
        if isinstance(value, bool) or not (isinstance(value, int) or (isinstance(value, str) and value.strip().lstrip("-").isdigit())):
            bad(f"must be a whole number, not {value!r}")
        value = int(value)
    elif want is float:
        if isinstance(value, bool):
            bad(f"must be a number, not {value!r}")
        try:
            value = float(value)
        except (TypeError, ValueError):
            bad(f"must be a number, not {value!r}")
        if not math.isfinite(value):
            bad("must be a finite number")
    elif want is str:
        if not isinstance(value, str):
            bad(f"must be text, not {value!r}")
    low, high, choices = meta.get("low"), meta.get("high"), meta.get("choices")
    if choices is not None and value not in choices:
        bad(f"must be one of {', '.join(repr(c) for c in choices if c is not None)}, not {value!r}")
    if low is not None and isinstance(value, (int, float)):
        strict = low == 0.0 and isinstance(low, float)
        if value < low or (strict and value <= low and name.endswith(("_um", "_h")) and value == 0):
            bad(f"must be {'greater than' if strict else 'at least'} {low}, not {value!r}")
    if high is not None and isinstance(value, (int, float)) and value > high:
        bad(f"must be at most {high}, not {value!r}")
    return value


_FIELDS = {f.name: f for f in fields(Settings)}


def validate(s: Settings, source: str | None = None) -> None:
    """Check every value; convert types in place. Raises SettingsError naming the key."""
    for f in fields(s):
        object.__setattr__(s, f.name, _coerce(f, getattr(s, f.name), source))
    if s.primordium_diameter_max_um < s.primordium_diameter_min_um:
        raise SettingsError("setting 'primordium_diameter_max_um' is smaller than 'primordium_diameter_min_um'",
                            source, "give a diameter range with min ≤ max")
    if s.pixel_size_um is not None and s.pixel_size_um <= 0:
        raise SettingsError("setting 'pixel_size_um' must be greater than 0", source)
    if s.interval_h is not None and s.interval_h <= 0:
        raise SettingsError("setting 'interval_h' must be greater than 0", source)


def from_dict(values: dict[str, Any], source: str | None = None, base: Settings | None = None) -> Settings:
    """Settings from a dict (unknown keys and bad values raise SettingsError naming the key)."""
    base = base or Settings()
    d = base.to_dict()
    for key, value in values.items():
        if key not in _FIELDS:
            raise SettingsError(f"unknown setting '{key}'", source,
                                "see 'apextrack settings --write FILE.toml' for the known settings")
        d[key] = value
    s = Settings.__new__(Settings)
    for k, v in d.items():
        object.__setattr__(s, k, v)
    validate(s, source)
    return s


def load(path: str | Path, base: Settings | None = None) -> Settings:
    """Read settings from a TOML file (a flat table, or a ``[settings]`` table)."""
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingsError("settings file not found", path,
                            "check the path, or write one with 'apextrack settings --write FILE.toml'") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SettingsError(f"not a valid TOML file ({exc})", path,
                            "each line must read 'name = value'; 'apextrack settings --write' shows the format") from None
    if "settings" in raw and isinstance(raw["settings"], dict):
        raw = raw["settings"]
    # TOML has no null: the string "none" (or "") stands for "not set"
    values = {k: (None if isinstance(v, str) and v.strip().lower() in ("", "none") and _FIELDS.get(k) is not None and _FIELDS[k].default is None else v)
              for k, v in raw.items()}
    return from_dict(values, str(path), base)


def _toml_value(v) -> str:
    if v is None:
        return '"none"'
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int,)):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"') + '"'


def to_toml(s: Settings | None = None) -> str:
    """TOML text of the settings, each value with a comment giving its unit and meaning."""
    s = s or Settings()
    lines = ["# apextrack settings. Lengths in µm, times in hours, angles in degrees.",
             '# "none" means: not set (taken from the file or estimated from the data).', ""]
    for f in fields(s):
        unit = f.metadata["unit"]
        lines.append(f"# {f.metadata['meaning']}" + (f" [{unit}]" if unit else ""))
        lines.append(f"{f.name} = {_toml_value(getattr(s, f.name))}")
        lines.append("")
    return "\n".join(lines)


def save(s: Settings, path: str | Path) -> Path:
    """Write settings as commented TOML (atomically)."""
    from .tables import atomic_write_text

    atomic_write_text(path, to_toml(s))
    return Path(path)


def describe() -> list[dict[str, Any]]:
    """Name, default, unit and meaning of every setting (for docs and the viewer)."""
    return [{"name": f.name, "default": f.default, "unit": f.metadata["unit"],
             "meaning": f.metadata["meaning"], "choices": f.metadata["choices"]} for f in fields(Settings)]
