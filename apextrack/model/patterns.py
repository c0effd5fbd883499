"""Named phyllotaxis patterns from the inhibitory-field model, as analysis-ready results.

:func:`simulate_pattern` runs the model (:mod:`apextrack.model.simulate`) at settings that reach
a named pattern, keeps a *record* of its steady state (as a time-lapse would see it), and returns
the primordia table in the same schema as ``apextrack analyse`` together with the divergence
table and summary computed by the project's own analysis (:func:`apextrack.phyllotaxis.analyse_phyllotaxis`)
on virtual tracks — so every analysis and comparison runs on a simulation unchanged.
:func:`run_simulation` writes that result folder (and, on request, a rendered stack with its
ground truth).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, fields
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import OutputError, SettingsError
from ..tables import write_json, write_table
from .growth import history_from_births
from .simulate import (LUCAS_ANGLE_DEG, ModelParams, Simulation, classify, simulate,
                       spiral_initial)

#: Named patterns: model parameters (the inhibition range as a multiple of the apex radius) and
#: the initial condition that reaches them. Chosen from the bifurcation table of this model.
PATTERNS: dict[str, dict] = {
    # Fibonacci spiral: start distichous (large range) and shrink the range slowly, as the apex
    # of a seedling enlarges; a tiny angle noise breaks the mirror symmetry (sets the chirality)
    "spiral": dict(range_ratio=0.8, initial="one", start_ratio=4.0, ramp_primordia=60, angle_noise_deg=0.01),
    "distichous": dict(range_ratio=3.5, initial="one"),
    "decussate": dict(range_ratio=2.0, initial="two"),
    "whorled": dict(range_ratio=1.0, initial="three"),
    # the <1,3> (Lucas) branch: seeded with a short 99.5° spiral at the matching plastochron ratio
    "lucas": dict(range_ratio=0.5, initial="lucas", seed_primordia=12, seed_ratio=1.062),
}

#: Keys of a params dict besides the ModelParams fields.
RUN_KEYS = {"range_ratio", "initial", "start_ratio", "seed_primordia", "seed_ratio", "n_primordia",
            "record_primordia", "interval_h", "view_radius_ratio", "chirality", "permutation_prob",
            "co_initiation_prob"}


@dataclass
class SimulatedResult:
    """A simulated record in the analysis schema.

    Attributes
    ----------
    primordia : DataFrame
        ``birth_rank, track_id, emergence_time_h, emergence_frame, x_um, y_um, r_um, theta_deg,
        co_initiated`` (+ ``permuted``): the primordia of the record, positions at emergence about
        an apex centre at (0, 0).
    divergence : DataFrame
        From the project's analysis of the record (``from_rank, to_rank, angle_deg, interval_h`` …).
    tracks : DataFrame
        Virtual tracks: every primordium within the view radius at each virtual frame.
    summary : dict
        The analysis summary plus ``source = "simulation"``, the pattern, the model parameters and
        the model's own steady-state classification.
    simulation : Simulation
        The full model run.
    history : DataFrame
        Birth times (h, record start = 0) and azimuths of the record, for rendering.
    params : ModelParams
    run : dict
        Record-level settings (interval, record length, chirality …).
    """

    primordia: pd.DataFrame
    divergence: pd.DataFrame
    tracks: pd.DataFrame
    summary: dict
    simulation: Simulation
    history: pd.DataFrame
    params: ModelParams
    run: dict = field(default_factory=dict)


def resolve_params(pattern: str, params: dict | None = None) -> tuple[ModelParams, dict]:
    """Model parameters and run settings of a named pattern, with user overrides.

    ``params`` may hold any :class:`~apextrack.model.simulate.ModelParams` field and the run keys
    ``range_ratio`` (ℓ/R, instead of ``inhibition_range_um``), ``initial``, ``start_ratio``,
    ``seed_primordia``, ``seed_ratio``, ``n_primordia``, ``record_primordia``, ``interval_h``,
    ``view_radius_ratio``, ``chirality`` (``"ccw"``/``"cw"``/``"any"``), ``permutation_prob``,
    ``co_initiation_prob``.
    """
    if pattern not in PATTERNS:
        raise SettingsError(f"unknown pattern {pattern!r}", hint=f"choose one of: {', '.join(PATTERNS)}")
    params = dict(params or {})
    model_keys = {f.name for f in fields(ModelParams)}
    unknown = [k for k in params if k not in model_keys and k not in RUN_KEYS]
    if unknown:
        raise SettingsError(f"unknown simulation parameter(s) {', '.join(map(str, unknown))}",
                            hint=f"known: {', '.join(sorted(model_keys | RUN_KEYS))}")
    run = {"n_primordia": 260, "record_primordia": 40, "interval_h": None, "view_radius_ratio": 3.0,
           "chirality": "ccw", "permutation_prob": 0.0, "co_initiation_prob": 0.0,
           "seed_primordia": 12, "seed_ratio": 1.1, "start_ratio": None}
    run.update({k: v for k, v in PATTERNS[pattern].items() if k in RUN_KEYS})
    run.update({k: v for k, v in params.items() if k in RUN_KEYS})
    mp = {k: v for k, v in PATTERNS[pattern].items() if k in model_keys}
    mp.update({k: v for k, v in params.items() if k in model_keys})
    R = float(mp.get("apex_radius_um", ModelParams.apex_radius_um))
    if "inhibition_range_um" not in params:
        mp["inhibition_range_um"] = float(run["range_ratio"]) * R
    if run.get("start_ratio") and "start_range_um" not in params:
        mp["start_range_um"] = float(run["start_ratio"]) * R
    p = ModelParams.from_dict(mp)
    for key in ("n_primordia", "record_primordia", "seed_primordia"):
        if int(run[key]) != run[key] or run[key] < 1:
            raise SettingsError(f"simulation parameter '{key}' must be a whole number ≥ 1, not {run[key]!r}")
        run[key] = int(run[key])
    if run["record_primordia"] + 5 > run["n_primordia"]:
        raise SettingsError("'record_primordia' must be at least 5 fewer than 'n_primordia'",
                            hint="the record is taken from the end of the run, after the transients")
    if run["chirality"] not in ("ccw", "cw", "any"):
        raise SettingsError("simulation parameter 'chirality' must be 'ccw', 'cw' or 'any'")
    for key in ("permutation_prob", "co_initiation_prob"):
        if not (0.0 <= float(run[key]) <= 1.0):
            raise SettingsError(f"simulation parameter '{key}' must be between 0 and 1")
    if run["interval_h"] is not None and not (float(run["interval_h"]) > 0):
        raise SettingsError("simulation parameter 'interval_h' must be greater than 0")
    run["range_ratio"] = p.range_ratio
    return p, run


def load_params(path) -> dict:
    """Read simulation parameters from a TOML or JSON file (a flat table, or a ``[model]``
    table); unknown keys are reported when the parameters are used."""
    import json
    import tomllib

    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SettingsError("parameter file not found", path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"cannot read the parameter file ({exc})", path) from None
    try:
        data = json.loads(text) if path.suffix.lower() == ".json" else tomllib.loads(text)
    except (json.JSONDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SettingsError(f"not a valid {'JSON' if path.suffix.lower() == '.json' else 'TOML'} file ({exc})",
                            path, "give a flat table of parameter = value") from None
    if isinstance(data, dict) and isinstance(data.get("model"), dict):
        data = data["model"]
    if not isinstance(data, dict):
        raise SettingsError("the parameter file must hold a table of parameter = value", path)
    return data


def _initial(run: dict, p: ModelParams):
    if run["initial"] == "lucas":
        return "given", spiral_initial(run["seed_primordia"], LUCAS_ANGLE_DEG, p, run["seed_ratio"])
    return run["initial"], None


def perturb_order(history: pd.DataFrame, permutation_prob: float, co_initiation_prob: float,
                  rng: np.random.Generator) -> pd.DataFrame:
    """Irregularities of the observed birth order, applied to a history (positions unchanged).

    With probability ``permutation_prob`` two successive single primordia swap their birth times
    (a permutation: the angles α, α, α become 2α, −α, 2α — Refahi et al. 2016, eLife 5:e14093);
    with probability ``co_initiation_prob`` they get one common birth time (co-initiated).
    Returns a new history, re-ranked, with a ``permuted`` flag.
    """
    h = history.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    t = h["birth_time_h"].to_numpy(float).copy()
    co = h["co_initiated"].to_numpy(bool).copy()
    perm = np.zeros(len(h), bool)
    i = 0
    while i < len(h) - 1:
        if co[i] or co[i + 1]:
            i += 1
            continue
        u = rng.random()
        if u < permutation_prob:
            t[i], t[i + 1] = t[i + 1], t[i]
            perm[i] = perm[i + 1] = True
            i += 2
        elif u < permutation_prob + co_initiation_prob:
            t[i] = t[i + 1] = 0.5 * (t[i] + t[i + 1])
            co[i] = co[i + 1] = True
            i += 2
        else:
            i += 1
    out = history_from_births(t, h["theta_deg"].to_numpy(float), co)
    # history_from_births sorts stably by birth time: the same order maps the flags
    order = np.argsort(t, kind="stable")
    out["permuted"] = perm[order]
    out["source_row"] = order
    return out


def _record(sim: Simulation, run: dict, rng: np.random.Generator):
    """Cut the record from the end of the run: histories, virtual tracks, primordia table."""
    p = sim.params
    h = sim.history.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    n_rec = run["record_primordia"]
    rec = h.iloc[len(h) - n_rec:]
    t0 = float(rec["birth_time_h"].iloc[0])
    t_end = float(h["birth_time_h"].iloc[-1])
    groups = np.unique(rec["birth_time_h"].to_numpy(float))
    plast = float(np.mean(np.diff(groups))) if groups.size > 1 else 1.0 / p.growth_rate_per_h
    interval = float(run["interval_h"]) if run["interval_h"] else plast / 2.0
    n_frames = int(math.floor((t_end - t0) / interval + 1e-9)) + 1
    times = t0 + interval * np.arange(n_frames)
    R, g = p.apex_radius_um, p.growth_rate_per_h
    r_view = run["view_radius_ratio"] * R
    # the primordia seen in the record: born during it, or already within view at its start
    tb = h["birth_time_h"].to_numpy(float)
    r_start = R * np.exp(g * (t0 - tb))
    keep = (tb >= t0 - 1e-9) & (tb <= times[-1] + 1e-9) | ((tb < t0) & (r_start <= r_view))
    seen = h[keep].copy()
    if run.get("chirality") in ("ccw", "cw"):
        from .simulate import chirality as _chir
        if _chir(h.iloc[len(h) - n_rec:]) != run["chirality"]:
            # the model is mirror-symmetric: the mirrored history is an equally valid solution
            seen["theta_deg"] = np.mod(-seen["theta_deg"].to_numpy(float), 360.0)
    tb_seen = seen["birth_time_h"].to_numpy(float) - times[0]
    hist = history_from_births(tb_seen, seen["theta_deg"].to_numpy(float), seen["co_initiated"].to_numpy(bool))
    # history_from_births sorts stably by birth time: ``order`` maps its rows to ``seen``'s rows
    order = np.argsort(tb_seen, kind="stable")
    tb_true = tb_seen[order]
    if run["permutation_prob"] > 0 or run["co_initiation_prob"] > 0:
        hist = perturb_order(hist, run["permutation_prob"], run["co_initiation_prob"], rng)
        tb_true = tb_true[hist["source_row"].to_numpy()]
        hist = hist.drop(columns="source_row")
    else:
        hist["permuted"] = False
    # virtual tracks: positions at each virtual frame (apex centre at the origin); positions follow
    # the true birth times even where the observed order was perturbed
    rel = times - times[0]
    age = rel[:, None] - tb_true[None, :]
    f_idx, p_idx = np.nonzero(age >= -1e-9)
    r = R * np.exp(g * np.maximum(age[f_idx, p_idx], 0.0))
    th = hist["theta_deg"].to_numpy(float)[p_idx]
    tracks = pd.DataFrame({
        "frame": f_idx.astype(np.int64), "time_h": rel[f_idx],
        "x_um": r * np.cos(np.radians(th)), "y_um": -r * np.sin(np.radians(th)),
        "radius_um": np.full(f_idx.size, math.nan), "intensity": np.ones(f_idx.size),
        "snr": np.full(f_idx.size, math.inf),
        "track_id": hist["birth_rank"].to_numpy(np.int64)[p_idx], "r_um": r, "theta_deg": th})
    tracks = tracks[tracks["r_um"] <= r_view].sort_values(["frame", "track_id"], kind="stable").reset_index(drop=True)
    first = tracks.groupby("track_id", sort=True).head(1).set_index("track_id")
    ids = hist["birth_rank"].to_numpy(np.int64)
    ok = np.isin(ids, first.index.to_numpy())
    hist = hist[ok].reset_index(drop=True)
    ids = ids[ok]
    f = first.loc[ids]
    prim = pd.DataFrame({
        "birth_rank": np.arange(1, len(hist) + 1, dtype=np.int64), "track_id": ids,
        "emergence_time_h": hist["birth_time_h"].to_numpy(float),
        "emergence_frame": f["frame"].to_numpy(np.int64), "x_um": f["x_um"].to_numpy(float),
        "y_um": f["y_um"].to_numpy(float), "r_um": f["r_um"].to_numpy(float),
        "theta_deg": hist["theta_deg"].to_numpy(float),
        "co_initiated": hist["co_initiated"].to_numpy(bool), "permuted": hist["permuted"].to_numpy(bool)})
    hist = hist.assign(birth_rank=prim["birth_rank"].to_numpy(), primordium=prim["birth_rank"].to_numpy())
    hist["birth_time_true_h"] = tb_true[ok]
    info = {"record_start_model_h": float(times[0]), "interval_h": interval, "n_frames": n_frames,
            "model_plastochron_h": plast, "view_radius_um": r_view}
    return prim, tracks, hist, info


def simulate_pattern(pattern: str = "spiral", params: dict | None = None, seed: int = 0) -> SimulatedResult:
    """Simulate a named pattern and return it in the analysis schema.

    Parameters
    ----------
    pattern : {"spiral", "distichous", "decussate", "whorled", "lucas"}
        Named settings of the inhibitory-field model (:data:`PATTERNS`).
    params : dict, optional
        Overrides (see :func:`resolve_params`), e.g. ``{"range_ratio": 0.7}``,
        ``{"permutation_prob": 0.1}``, ``{"angle_noise_deg": 3}``.
    seed : int
        Seed of all randomness (model noise, order perturbations, analysis bootstrap).

    Returns
    -------
    SimulatedResult

    Examples
    --------
    >>> res = simulate_pattern("distichous")
    >>> round(res.summary["divergence_mean_deg"])
    180
    """
    from ..phyllotaxis import analyse_phyllotaxis
    from ..settings import Settings

    p, run = resolve_params(pattern, params)
    initial, given = _initial(run, p)
    sim = simulate(run["n_primordia"], p, initial=initial, given=given, seed=seed)
    rng = np.random.default_rng([seed, 1])
    prim, tracks, hist, info = _record(sim, run, rng)
    run.update(info)
    steady = classify(sim.history)
    expected = float(steady["angle_deg"]) if steady["jugacy"] == 1 and math.isfinite(steady["angle_deg"]) else None
    s = Settings(seed=int(seed), **({"expected_angle_deg": expected} if expected is not None and 0 < expected < 360 else {}))
    phyl = analyse_phyllotaxis(prim, tracks, s)
    summary = dict(phyl.summary)
    summary.update({
        "source": "simulation", "pattern": pattern, "n_primordia": int(len(prim)),
        "n_frames": int(run["n_frames"]), "interval_h": float(run["interval_h"]),
        "model": {"params": p.to_dict(), "run": {k: v for k, v in run.items()}, "seed": int(seed),
                  "initial": sim.initial, "range_ratio": p.range_ratio, "steady_state": steady,
                  "n_simulated": int(len(sim.history))},
        "settings": s.to_dict(),
    })
    return SimulatedResult(primordia=prim, divergence=phyl.divergence, tracks=tracks, summary=summary,
                           simulation=sim, history=hist, params=p, run=run)


def render_simulation(res: SimulatedResult, seed: int = 0, **kwargs):
    """Render a simulated record as a synthetic stack (:func:`~apextrack.model.make_synthetic_stack`):
    the field of view covers the view radius, sizes scale with the apex radius. Keyword
    arguments override the rendering defaults."""
    from .synthetic import make_synthetic_stack

    p = res.params
    R = p.apex_radius_um
    n = 128
    half = res.run["view_radius_ratio"] * R * 1.05
    px = 2.0 * half / n
    kw = dict(n_frames=int(res.run["n_frames"]), interval_h=float(res.run["interval_h"]),
              pixel_size_um=px, z_step_um=max(2.0, 0.25 * R), shape_zyx=(10, n, n), apex_radius_um=R,
              growth_rate_per_h=p.growth_rate_per_h, plastochron_h=float(res.run["model_plastochron_h"]),
              primordium_radius_um=0.18 * R, primordium_max_radius_um=0.42 * R,
              dome_curvature_um=2.2 * R, drift_um_per_frame=(0.0, 0.0, 0.0), seed=seed,
              history=res.history[["birth_time_h", "theta_deg", "co_initiated"]].assign(
                  birth_time_h=res.history["birth_time_true_h"]))
    kw.update(kwargs)
    return make_synthetic_stack(**kw)


def run_simulation(pattern: str, out_dir: str | Path, params: dict | None = None, render: bool = False,
                   seed: int = 0, overwrite: bool = False) -> SimulatedResult:
    """Simulate a named pattern and write a results folder the analyses read unchanged.

    Writes ``primordia.csv``, ``divergence.csv``, ``tracks.csv`` (virtual), ``summary.json``
    (same keys as ``apextrack analyse`` plus ``source``, ``pattern``, ``model``), ``run.json``
    and, with ``render``, ``stack.tif`` with ``stack_truth.csv`` and ``stack_primordia.csv``.
    All files are written atomically.

    Raises
    ------
    OutputError
        When ``out_dir`` exists, is not empty and ``overwrite`` is false.
    """
    from .. import __version__

    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError("the output path is a file, not a folder", out, "give a folder name")
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise OutputError("the output folder is not empty", out, "choose another folder or allow overwriting")
    t0 = time.time()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    res = simulate_pattern(pattern, params, seed)
    t_sim = time.time() - t0
    write_table(res.primordia, out / "primordia.csv", "primordia")
    write_table(res.divergence, out / "divergence.csv", "divergence")
    write_table(res.tracks, out / "tracks.csv", "tracks")
    write_json(res.summary, out / "summary.json")
    files = ["primordia.csv", "divergence.csv", "tracks.csv", "summary.json"]
    t_render = 0.0
    if render:
        from .synthetic import write_synthetic

        t1 = time.time()
        synth = render_simulation(res, seed=seed)
        written = write_synthetic(synth, out / "stack.tif")
        files += [Path(v).name for v in written.values()]
        t_render = time.time() - t1
    write_json({"apextrack_version": __version__, "command": "simulate", "pattern": pattern,
                "params": dict(params or {}), "seed": int(seed), "render": bool(render),
                "started": started, "finished": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                "timings_s": {"simulate": t_sim, "render": t_render}, "files": files + ["run.json"]},
               out / "run.json")
    return res
