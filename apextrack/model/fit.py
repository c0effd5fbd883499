"""Fit the inhibitory-field model to an imaging result.

The steady divergence angle and the plastochron ratio of the model depend on the inhibition
range only through ℓ / R (time scales as 1/γ), and the plastochron is proportional to 1/γ. So a
grid over ℓ / R (and, optionally, over the angle noise) with the growth rate solved exactly for
each grid point (γ = γ₀ · T_model / T_observed) is a complete search over (ℓ, γ). The misfit is
a sum of squared, scaled differences of the summary statistics the imaging reports.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ResultsError, SettingsError
from .simulate import (ModelParams, circular_mean_deg, classify, divergence_angles, simulate)

#: Default scale of each statistic in the misfit (a difference of one scale costs 1).
DEFAULT_SCALES = {"divergence_mean_deg": 2.0, "plastochron_ratio": 0.02}
#: Statistics read from the imaging result (the SD is fitted only when given a scale: the spread
#: of measured angles is mostly measurement error, and angle noise of a few degrees already
#: drives this model off its steady branch).
OBSERVED_KEYS = ("divergence_mean_deg", "divergence_sd_deg", "plastochron_ratio", "plastochron_h")


@dataclass
class FitResult:
    """Best model parameters for an imaging result, with the misfit over the whole grid."""

    params: ModelParams
    range_ratio: float
    misfit: float
    predicted: dict
    observed: dict
    table: pd.DataFrame = field(repr=False, default=None)

    def to_dict(self) -> dict:
        return {"params": self.params.to_dict(), "range_ratio": self.range_ratio, "misfit": self.misfit,
                "predicted": self.predicted, "observed": self.observed}


def _observed(result) -> dict:
    """The statistics of an imaging result: a results folder, a summary.json path or a dict."""
    if isinstance(result, (str, Path)):
        from ..tables import read_json

        p = Path(result)
        summ = read_json(p / "summary.json" if p.is_dir() else p)
    elif isinstance(result, dict):
        summ = result
    elif hasattr(result, "summary"):
        summ = result.summary
    else:
        raise SettingsError("give a results folder, a summary.json file or a summary dict")
    obs = {}
    for key in OBSERVED_KEYS:
        v = summ.get(key)
        if isinstance(v, dict):
            v = v.get("value")
        if isinstance(v, (int, float)) and math.isfinite(v):
            obs[key] = float(v)
    if "divergence_mean_deg" not in obs and "plastochron_ratio" not in obs:
        raise ResultsError("the result has neither a mean divergence angle nor a plastochron ratio",
                           None if not isinstance(result, (str, Path)) else result,
                           "analyse a stack with enough primordia first")
    return obs


def fit_model(result, range_ratios=None, angle_noises=(0.0,), n_primordia: int = 200, n_last: int = 50,
              params: ModelParams | dict | None = None, scales: dict | None = None, seed: int = 0) -> FitResult:
    """Find the model parameters whose simulated statistics best match an imaging result.

    Parameters
    ----------
    result : path, dict or object with ``summary``
        An ``apextrack analyse`` results folder (or its ``summary.json``, or the summary dict):
        uses ``divergence_mean_deg``, ``divergence_sd_deg``, ``plastochron_ratio`` and
        ``plastochron_h`` when present.
    range_ratios : sequence of float, optional
        Grid of ℓ / R (default 20 values from 3 down to 0.3).
    angle_noises : sequence of float
        Grid of the angle noise SD (degrees); fits the spread of the angles.
    n_primordia, n_last : int
        Primordia per run and the number of last angles used for the statistics.
    params : ModelParams or dict, optional
        The other model parameters (apex radius, growth rate γ₀, kernel …).
    scales : dict, optional
        Scale of each statistic in the misfit (see :data:`DEFAULT_SCALES`; add
        ``divergence_sd_deg`` to fit the spread as well).
    seed : int

    Returns
    -------
    FitResult
        Best parameters (with γ solved for the plastochron when it is observed), the misfit, the
        predicted and observed statistics, and the grid table.
    """
    obs = _observed(result)
    sc = dict(DEFAULT_SCALES, **(scales or {}))
    base = params if isinstance(params, ModelParams) else ModelParams.from_dict(params)
    ratios = np.geomspace(3.0, 0.3, 20) if range_ratios is None else np.asarray(range_ratios, float)
    if ratios.size == 0 or np.any(ratios <= 0):
        raise SettingsError("range ratios must be positive numbers")
    R = base.apex_radius_um
    rows = []
    for noise in angle_noises:
        for q in ratios:
            p = ModelParams(**{**base.to_dict(), "inhibition_range_um": float(q) * R,
                               "start_range_um": max(4.0, float(q)) * R, "ramp_primordia": 60,
                               "angle_noise_deg": float(noise) if noise > 0 else 0.01})
            sim = simulate(n_primordia, p, "one", seed=seed)
            h = sim.history
            ang = divergence_angles(h.iloc[-(n_last + 1):])
            c = classify(h, n_last=n_last)
            t = np.unique(h["birth_time_h"].to_numpy(float))[-(n_last + 1):]
            T = float(np.mean(np.diff(t)))
            a = np.radians(ang)
            rbar = math.hypot(np.cos(a).mean(), np.sin(a).mean())
            pred = {"divergence_mean_deg": circular_mean_deg(ang),
                    "divergence_sd_deg": math.degrees(math.sqrt(max(-2.0 * math.log(max(rbar, 1e-300)), 0.0))),
                    "plastochron_ratio": math.exp(p.growth_rate_per_h * T)}
            gamma = p.growth_rate_per_h
            if "plastochron_h" in obs and obs["plastochron_h"] > 0:
                gamma = p.growth_rate_per_h * T / obs["plastochron_h"]
                pred["plastochron_h"] = obs["plastochron_h"]
            else:
                pred["plastochron_h"] = T
            mis = 0.0
            for key, v in obs.items():
                if key not in sc:
                    continue  # plastochron: matched exactly by γ; SD: only when given a scale
                d = pred[key] - v
                if key == "divergence_mean_deg":
                    d = (d + 180.0) % 360.0 - 180.0
                mis += (d / sc[key]) ** 2
            rows.append({"range_ratio": float(q), "angle_noise_deg": float(noise), "growth_rate_per_h": gamma,
                         "pattern": c["pattern"], "misfit": mis, **{f"pred_{k}": v for k, v in pred.items()}})
    table = pd.DataFrame(rows)
    best = table.iloc[int(np.argmin(table["misfit"].to_numpy()))]
    bp = ModelParams(**{**base.to_dict(), "inhibition_range_um": float(best["range_ratio"]) * R,
                        "growth_rate_per_h": float(best["growth_rate_per_h"]),
                        "start_range_um": max(4.0, float(best["range_ratio"])) * R, "ramp_primordia": 60,
                        "angle_noise_deg": float(best["angle_noise_deg"]) or 0.01})
    pred = {k[5:]: float(best[k]) for k in best.index if k.startswith("pred_")}
    return FitResult(params=bp, range_ratio=float(best["range_ratio"]), misfit=float(best["misfit"]),
                     predicted=pred, observed=obs, table=table)
