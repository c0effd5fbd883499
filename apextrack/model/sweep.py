"""Parameter sweeps of the inhibitory-field model: the bifurcation table and its figure.

Douady & Couder (1996, J. Theor. Biol. 178) drew the steady divergence angle against the control
parameter: starting from the distichous state at a large inhibition range and shrinking it, the
angle leaves 180° and falls continuously towards the golden angle, oscillating about it as the
parastichy numbers climb the Fibonacci sequence (2,3) → (3,5) → (5,8) …; other branches (the
⟨1,3⟩ "Lucas" branch near 99.5°, the ⟨1,4⟩ branch near 78°) exist only on pieces of the
parameter range, are reached only from special initial conditions and are not connected to the
distichous state. :func:`sweep` computes that table; :func:`bifurcation_figure` draws it with only
the Fibonacci branch as a continuous line.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pandas as pd

from ..errors import SettingsError
from .growth import GOLDEN_ANGLE_DEG
from .simulate import (LUCAS_ANGLE_DEG, ModelParams, classify,
                       contact_parastichies, limit_angle_deg, plastochron_ratio_of, simulate,
                       spiral_initial)

SWEEP_COLUMNS = ["branch", "range_ratio", "angle_deg", "pattern", "jugacy", "steady",
                 "deviation_deg", "plastochron_ratio", "parastichy_m", "parastichy_n",
                 "plastochron_h"]

#: Branches a sweep can follow: how each run starts.
BRANCHES = {
    # continuation from the distichous state: the range shrinks from 4·R to its value
    "fibonacci": "start distichous at ℓ = 4R, shrink ℓ geometrically over the first 60 births",
    # a seeded <1,3> spiral (99.5°) at the plastochron ratio of the Fibonacci branch there
    "lucas": "12 seed primordia on a 99.5° spiral, then the model at fixed ℓ",
    # a seeded <1,4> spiral (77.96°)
    "lucas4": "12 seed primordia on a 77.96° spiral, then the model at fixed ℓ",
}


def _run(branch: str, ratio: float, base: ModelParams, n_primordia: int, seed: int, fib_ratio=None):
    R = base.apex_radius_um
    if branch == "fibonacci":
        p = ModelParams(**{**base.to_dict(), "inhibition_range_um": ratio * R,
                           "start_range_um": max(4.0, ratio) * R, "ramp_primordia": 60,
                           "angle_noise_deg": base.angle_noise_deg or 0.01})
        return simulate(n_primordia, p, "one", seed=seed), p
    angle = {"lucas": LUCAS_ANGLE_DEG, "lucas4": limit_angle_deg(4)}[branch]
    p = ModelParams(**{**base.to_dict(), "inhibition_range_um": ratio * R, "start_range_um": None})
    q = fib_ratio if fib_ratio and math.isfinite(fib_ratio) and fib_ratio > 1 else 1.1
    given = spiral_initial(12, angle, p, plastochron_ratio=q)
    return simulate(n_primordia, p, "given", given=given, seed=seed), p


def sweep(range_ratios=None, branches=("fibonacci", "lucas"), n_primordia: int = 250,
          n_last: int = 50, params: ModelParams | dict | None = None, seed: int = 0) -> pd.DataFrame:
    """Run the model over a grid of inhibition ranges and tabulate the steady pattern.

    Parameters
    ----------
    range_ratios : sequence of float, optional
        Values of ℓ/R (default: 24 values from 4 down to 0.3, geometrically spaced).
    branches : sequence of str
        Which branches to follow (keys of :data:`BRANCHES`).
    n_primordia : int
        Primordia per run.
    n_last : int
        Primordia used for the steady-state test (last ``n_last`` angles within 5° of their mean,
        Refahi et al. 2016, eLife 5:e14093).
    params : ModelParams or dict, optional
        Other model parameters (kernel, exponent, growth rate …).
    seed : int

    Returns
    -------
    pandas.DataFrame
        One row per (branch, ratio): :data:`SWEEP_COLUMNS`.
    """
    if range_ratios is None:
        range_ratios = np.geomspace(4.0, 0.3, 24)
    ratios = np.asarray(range_ratios, dtype=float)
    if ratios.size == 0 or np.any(~np.isfinite(ratios)) or np.any(ratios <= 0):
        raise SettingsError("range ratios must be positive numbers")
    bad = [b for b in branches if b not in BRANCHES]
    if bad:
        raise SettingsError(f"unknown branch(es) {', '.join(bad)}", hint=f"choose from {', '.join(BRANCHES)}")
    base = params if isinstance(params, ModelParams) else ModelParams.from_dict(params)
    rows = []
    fib_q = {}
    for branch in ["fibonacci"] + [b for b in branches if b != "fibonacci"]:
        for ratio in ratios:
            sim, p = _run(branch, float(ratio), base, n_primordia, seed, fib_q.get(float(ratio)))
            c = classify(sim.history, n_last=n_last)
            q = plastochron_ratio_of(sim.history, p, n_last)
            if branch == "fibonacci":
                fib_q[float(ratio)] = q
                if "fibonacci" not in branches:
                    continue
            try:
                m, n = contact_parastichies(sim.history, p) if c["jugacy"] == 1 else (0, 0)
            except (ValueError, IndexError):
                m, n = 0, 0
            t = np.unique(sim.history["birth_time_h"].to_numpy())[-(n_last + 1):]
            rows.append((branch, float(ratio), c["angle_deg"], c["pattern"], c["jugacy"], c["steady"],
                         c["deviation_deg"], q, m, n, float(np.mean(np.diff(t))) if t.size > 1 else math.nan))
    return pd.DataFrame(rows, columns=SWEEP_COLUMNS)


def branch_jumps(table: pd.DataFrame, branch: str = "fibonacci") -> np.ndarray:
    """Absolute change of the steady angle between neighbouring ratios along one branch
    (degrees, in the table's ratio order; NaN where a run was not steady)."""
    t = table[table["branch"] == branch].sort_values("range_ratio", ascending=False, kind="stable")
    a = np.where(t["steady"].to_numpy(bool), t["angle_deg"].to_numpy(float), np.nan)
    d = np.abs((np.diff(a) + 180.0) % 360.0 - 180.0)
    return d


def bifurcation_figure(table: pd.DataFrame, path=None, ax=None):
    """Steady divergence angle against ℓ/R for each branch of a :func:`sweep` table.

    The Fibonacci branch (continued from the distichous state) is drawn as one continuous line;
    every other branch as separate points, since it is met only on pieces of the range, from
    special initial conditions. Reference lines mark 180°, the golden angle and the ⟨1,3⟩ and
    ⟨1,4⟩ limit angles. Returns the matplotlib Figure (saved to ``path`` when given).
    """
    if ax is None:
        from matplotlib.figure import Figure

        fig = Figure(figsize=(6.4, 4.2))
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    for y, label in ((180.0, "180°"), (GOLDEN_ANGLE_DEG, "137.5°"), (LUCAS_ANGLE_DEG, "99.5°"),
                     (limit_angle_deg(4), "78.0°")):
        ax.axhline(y, color="0.85", lw=0.8, zorder=0)
        ax.annotate(label, (0.0, y), xycoords=("axes fraction", "data"), xytext=(2, 2),
                    textcoords="offset points", color="0.5", fontsize=7)
    styles = {"fibonacci": ("C0", "Fibonacci branch (from distichous)"),
              "lucas": ("C3", "⟨1,3⟩ branch (seeded)"), "lucas4": ("C2", "⟨1,4⟩ branch (seeded)")}
    fib = table[table["branch"] == "fibonacci"].set_index("range_ratio")["angle_deg"]
    for branch, g in table.groupby("branch", sort=False):
        g = g.sort_values("range_ratio", kind="stable")
        colour, label = styles.get(branch, ("C7", branch))
        if branch != "fibonacci" and len(fib):
            # seeded runs that fell back onto the Fibonacci branch do not belong to this branch
            ref = fib.reindex(g["range_ratio"]).to_numpy(float)
            g = g[~(np.abs(g["angle_deg"].to_numpy(float) - ref) < 1.0)]
        steady = g["steady"].to_numpy(bool)
        x, y = g["range_ratio"].to_numpy(float), g["angle_deg"].to_numpy(float)
        if branch == "fibonacci":
            ax.plot(x[steady], y[steady], "-o", color=colour, ms=3.5, lw=1.4, label=label)
        else:
            ax.plot(x[steady], y[steady], "s", color=colour, ms=4, mfc="none", label=label)
        if (~steady).any():
            ax.plot(x[~steady], y[~steady], "x", color=colour, ms=4, alpha=0.6)
    ax.set_xscale("log")
    from matplotlib.ticker import FormatStrFormatter, NullFormatter

    ax.xaxis.set_major_formatter(FormatStrFormatter("%g"))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xticks([0.3, 0.5, 1, 2, 4])
    ax.set_xlabel("inhibition range / apex radius  (ℓ / R)")
    ax.set_ylabel("steady divergence angle (°)")
    ax.set_ylim(60, 190)
    ax.legend(fontsize=7, loc="lower right")
    ax.set_title("Inhibitory-field model: steady patterns", fontsize=9)
    fig.tight_layout()
    if path is not None:
        from ..tables import atomic_write_bytes

        buf = io.BytesIO()
        fig.savefig(buf, format=str(path).rsplit(".", 1)[-1] if "." in str(path) else "png", dpi=120)
        atomic_write_bytes(path, buf.getvalue())
    return fig
