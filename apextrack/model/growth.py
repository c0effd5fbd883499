"""Primordium histories: when and where each primordium is born, and how it then moves and grows.

A *history* is a table with one row per primordium: its birth time (hours, relative to the first
frame of a record; negative for primordia born before it), its azimuth ``theta_deg`` about the
apex centre (counter-clockwise as seen on the displayed image, ``[0, 360)``) and a flag for
co-initiated primordia (born together in a pair or whorl). Primordia are born on the rim circle of
radius ``R`` (the apex radius) and drift outward at a fixed azimuth as

    r(t) = R · exp(γ (t − t_birth)),

the exponential radial growth of Richards (1951, Phil. Trans. R. Soc. B 235) and Douady & Couder
(1992, Phys. Rev. Lett. 68), so that the plastochron ratio is ``exp(γ·T)`` for a plastochron ``T``.
Their size grows in proportion to their distance (self-similar growth), capped at a largest size.

:func:`regular_history` builds the usual patterns (spiral at any divergence angle, distichous,
decussate, whorled, with optional permuted birth order); :func:`history_from_births` takes any
list of birth times and angles (e.g. a simulated history). :func:`intrinsic_truth` gives, per frame,
each born primordium's distance, azimuth, size and brightness in the apex's own frame; the
renderer (:mod:`apextrack.model.render`) places them on a dome and into an image.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from ..errors import SettingsError

#: Golden angle 360·(2 − φ) in degrees.
from ..constants import GOLDEN_ANGLE_DEG  # re-exported

HISTORY_COLUMNS = ["birth_rank", "primordium", "birth_time_h", "theta_deg", "co_initiated", "group"]


@dataclass(frozen=True)
class Growth:
    """How primordia move and grow after birth.

    Parameters
    ----------
    apex_radius_um : float
        Radius of the rim circle on which primordia are born (µm).
    growth_rate_per_h : float
        Relative radial growth rate γ (1/h): ``r(t) = R·exp(γ·age)``.
    radius_at_birth_um : float
        Primordium radius at birth (µm); it then grows in proportion to ``r``.
    max_radius_um : float
        Largest primordium radius (µm).
    brightness_at_birth : float
        Reporter brightness at birth relative to a mature primordium (0–1].
    rise_h : float
        Time for the reporter to rise from ``brightness_at_birth`` to full brightness (h).
    """

    apex_radius_um: float = 22.0
    growth_rate_per_h: float = math.log(1.12) / 6.0
    radius_at_birth_um: float = 4.0
    max_radius_um: float = 9.0
    brightness_at_birth: float = 0.6
    rise_h: float = 6.0

    def __post_init__(self):
        for name in ("apex_radius_um", "radius_at_birth_um", "max_radius_um"):
            if not (getattr(self, name) > 0):
                raise SettingsError(f"'{name}' must be greater than 0, not {getattr(self, name)!r}",
                                    hint="give a length in µm")
        if not (self.growth_rate_per_h >= 0 and math.isfinite(self.growth_rate_per_h)):
            raise SettingsError(f"'growth_rate_per_h' must be 0 or more, not {self.growth_rate_per_h!r}",
                                hint="give a relative growth rate in 1/h")
        if not (0 < self.brightness_at_birth <= 1):
            raise SettingsError("'brightness_at_birth' must be in (0, 1]", hint="a fraction of full brightness")
        if not (self.rise_h >= 0):
            raise SettingsError("'rise_h' must be 0 or more", hint="a time in hours")

    def to_dict(self) -> dict:
        return asdict(self)

    def distance(self, age_h):
        """Distance from the apex centre at a given age (µm); NaN before birth."""
        age = np.asarray(age_h, dtype=float)
        with np.errstate(invalid="ignore"):
            return np.where(age >= 0, self.apex_radius_um * np.exp(self.growth_rate_per_h * age), np.nan)

    def size(self, r_um):
        """Primordium radius (µm) at distance ``r_um``: proportional to r, capped."""
        r = np.asarray(r_um, dtype=float)
        return np.minimum(self.radius_at_birth_um * r / self.apex_radius_um, self.max_radius_um)

    def brightness(self, age_h):
        """Reporter brightness relative to a mature primordium, rising linearly after birth."""
        age = np.asarray(age_h, dtype=float)
        if self.rise_h == 0:
            return np.where(age >= 0, 1.0, 0.0)
        b0 = self.brightness_at_birth
        return np.where(age >= 0, np.clip(b0 + (1 - b0) * age / self.rise_h, b0, 1.0), 0.0)


def plastochron_ratio(growth_rate_per_h: float, plastochron_h: float) -> float:
    """Plastochron ratio ``exp(γ·T)`` (Richards 1951)."""
    return math.exp(growth_rate_per_h * plastochron_h)


def growth_rate_for_ratio(ratio: float, plastochron_h: float) -> float:
    """Relative growth rate γ giving plastochron ratio ``ratio`` for plastochron ``T``: ln R / T."""
    if not (ratio > 0 and plastochron_h > 0):
        raise SettingsError("plastochron ratio and plastochron must be greater than 0")
    return math.log(ratio) / plastochron_h


def _rank(df: pd.DataFrame) -> pd.DataFrame:
    """Sort by birth time (ties: by group then azimuth), assign birth_rank = primordium id 1..n."""
    df = df.copy()
    df["theta_deg"] = np.mod(df["theta_deg"].to_numpy(float), 360.0)
    df = df.sort_values(["birth_time_h", "group", "_order"], kind="stable").reset_index(drop=True)
    df["birth_rank"] = np.arange(1, len(df) + 1, dtype=np.int64)
    df["primordium"] = df["birth_rank"]
    df["co_initiated"] = df["co_initiated"].astype(bool)
    return df[HISTORY_COLUMNS].reset_index(drop=True)


def history_from_births(birth_times_h, thetas_deg, co_initiated=None) -> pd.DataFrame:
    """A history from explicit birth times and azimuths.

    Parameters
    ----------
    birth_times_h : sequence of float
        Birth time of each primordium (h, relative to the first frame; negative = before it).
    thetas_deg : sequence of float
        Azimuth of each primordium (degrees, counter-clockwise on the displayed image).
    co_initiated : sequence of bool, optional
        Flags; by default primordia sharing a birth time are flagged co-initiated.

    Returns
    -------
    pandas.DataFrame
        Columns ``birth_rank, primordium, birth_time_h, theta_deg, co_initiated, group``, sorted
        by birth time (rank 1 = first born; ties keep the given order).

    Examples
    --------
    >>> h = history_from_births([0.0, 6.0, 12.0], [0.0, 137.5, 275.0])
    >>> h["birth_rank"].tolist()
    [1, 2, 3]
    """
    t = np.asarray(birth_times_h, dtype=float).ravel()
    th = np.asarray(thetas_deg, dtype=float).ravel()
    if t.shape != th.shape:
        raise SettingsError(f"{t.size} birth times but {th.size} angles", hint="give one angle per birth time")
    if t.size == 0:
        raise SettingsError("a history needs at least one primordium")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(th))):
        raise SettingsError("birth times and angles must be finite numbers")
    _, group = np.unique(t, return_inverse=True)
    if co_initiated is None:
        counts = np.bincount(group)
        co = counts[group] > 1
    else:
        co = np.asarray(co_initiated, dtype=bool).ravel()
        if co.shape != t.shape:
            raise SettingsError("co_initiated needs one flag per primordium")
    df = pd.DataFrame({"birth_time_h": t, "theta_deg": th, "co_initiated": co,
                       "group": group.astype(np.int64), "_order": np.arange(t.size)})
    return _rank(df)


def regular_history(t_start_h: float, t_end_h: float, *, divergence_deg: float = GOLDEN_ANGLE_DEG,
                    plastochron_h: float = 6.0, jugacy: int = 1, phase_h: float | None = None,
                    theta0_deg: float = 0.0, chirality: str = "ccw", permutation_prob: float = 0.0,
                    timing_jitter_h: float = 0.0, angle_jitter_deg: float = 0.0,
                    rng: np.random.Generator | None = None) -> pd.DataFrame:
    """A regular history: groups of ``jugacy`` primordia every plastochron, each group turned by
    the divergence angle from the last.

    ``jugacy=1`` gives a spiral (divergence 137.5° golden, 99.5° Lucas …) or distichous (180°)
    pattern; ``jugacy=2`` with 90° gives decussate; ``jugacy=k`` with ``180/k`` gives alternating
    whorls of k. Members of a group are ``360/jugacy`` apart and flagged co-initiated.

    Parameters
    ----------
    t_start_h, t_end_h : float
        Births are generated at times ``phase_h + k·plastochron_h`` within ``[t_start_h, t_end_h]``.
    divergence_deg : float
        Angle between successive groups (degrees).
    plastochron_h : float
        Time between successive groups (h).
    jugacy : int
        Primordia per group (1 single, 2 pairs, 3+ whorls).
    phase_h : float, optional
        Time of the birth with index 0 (default ``0.37 × plastochron``, so that births do not
        fall exactly on frame times).
    theta0_deg : float
        Azimuth of the birth with index 0.
    chirality : {"ccw", "cw"}
        Direction of the generative spiral as seen on the displayed image.
    permutation_prob : float
        Probability that two successive single primordia swap their birth times (a permutation
        of birth order; the divergence sequence α, α, α becomes 2α, −α, 2α).
    timing_jitter_h, angle_jitter_deg : float
        Standard deviations of Gaussian noise on birth times and azimuths.
    rng : numpy.random.Generator, optional
        Random generator (needed only when noise or permutations are asked for).

    Returns
    -------
    pandas.DataFrame
        The history (see :func:`history_from_births`).

    Examples
    --------
    >>> h = regular_history(0, 30, plastochron_h=6.0, phase_h=0.0)
    >>> len(h)
    6
    """
    if plastochron_h <= 0 or not math.isfinite(plastochron_h):
        raise SettingsError(f"plastochron must be greater than 0, not {plastochron_h!r}", hint="a time in hours")
    if int(jugacy) != jugacy or jugacy < 1:
        raise SettingsError(f"jugacy must be a whole number ≥ 1, not {jugacy!r}")
    if chirality not in ("ccw", "cw"):
        raise SettingsError(f"chirality must be 'ccw' or 'cw', not {chirality!r}")
    if not (0 <= permutation_prob <= 1):
        raise SettingsError("permutation_prob must be between 0 and 1")
    if t_end_h < t_start_h:
        raise SettingsError("the history ends before it starts")
    jugacy = int(jugacy)
    phase = 0.37 * plastochron_h if phase_h is None else float(phase_h)
    k0 = math.ceil((t_start_h - phase) / plastochron_h - 1e-9)
    k1 = math.floor((t_end_h - phase) / plastochron_h + 1e-9)
    if k1 < k0:
        raise SettingsError("no birth falls in the requested time span",
                            hint="lengthen the record or shorten the plastochron")
    ks = np.arange(k0, k1 + 1)
    sign = 1.0 if chirality == "ccw" else -1.0
    times = np.repeat(phase + ks * plastochron_h, jugacy)
    member = np.tile(np.arange(jugacy), ks.size)
    thetas = theta0_deg + sign * (np.repeat(ks, jugacy) * divergence_deg + member * 360.0 / jugacy)
    group = np.repeat(np.arange(ks.size), jugacy)
    need_rng = permutation_prob > 0 or timing_jitter_h > 0 or angle_jitter_deg > 0
    if need_rng and rng is None:
        rng = np.random.default_rng(0)
    if permutation_prob > 0 and jugacy == 1:
        i = 0
        while i < times.size - 1:
            if rng.random() < permutation_prob:
                times[i], times[i + 1] = times[i + 1], times[i]
                i += 2
            else:
                i += 1
    if timing_jitter_h > 0:
        # a group keeps one birth time, so co-initiated primordia stay tied
        times = times + np.repeat(rng.normal(0.0, timing_jitter_h, ks.size), jugacy)
    if angle_jitter_deg > 0:
        thetas = thetas + rng.normal(0.0, angle_jitter_deg, thetas.size)
    df = pd.DataFrame({"birth_time_h": times, "theta_deg": thetas, "co_initiated": jugacy > 1,
                       "group": group, "_order": np.arange(times.size)})
    if jugacy == 1:
        df["group"] = np.arange(times.size)
    return _rank(df)


def intrinsic_truth(history: pd.DataFrame, times_h, growth: Growth) -> pd.DataFrame:
    """Per-frame state of every primordium already born, in the apex's own frame.

    Parameters
    ----------
    history : pandas.DataFrame
        From :func:`regular_history` or :func:`history_from_births`.
    times_h : sequence of float
        Time of each frame (h).
    growth : Growth
        Radial growth and size model.

    Returns
    -------
    pandas.DataFrame
        One row per (frame, born primordium): ``primordium, birth_rank, birth_time_h, frame,
        time_h, age_h, r_um, theta_deg, radius_um, brightness``, sorted by frame then rank.
    """
    times = np.asarray(times_h, dtype=float)
    tb = history["birth_time_h"].to_numpy(float)
    age = times[:, None] - tb[None, :]
    f_idx, p_idx = np.nonzero(age >= -1e-9)
    a = np.maximum(age[f_idx, p_idx], 0.0)
    r = growth.distance(a)
    out = pd.DataFrame({
        "primordium": history["primordium"].to_numpy(np.int64)[p_idx],
        "birth_rank": history["birth_rank"].to_numpy(np.int64)[p_idx],
        "birth_time_h": tb[p_idx],
        "frame": f_idx.astype(np.int64),
        "time_h": times[f_idx],
        "age_h": a,
        "r_um": r,
        "theta_deg": history["theta_deg"].to_numpy(float)[p_idx],
        "radius_um": growth.size(r),
        "brightness": growth.brightness(a),
    })
    return out.sort_values(["frame", "birth_rank"], kind="stable").reset_index(drop=True)
