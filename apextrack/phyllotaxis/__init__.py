"""Phyllotaxis measurements from birth-ordered primordia: divergence angles with intervals,
plastochron (two estimators) and plastochron ratio, parastichies, pattern mode and
permutations of birth order.

The pipeline calls one entry point, :func:`analyse_phyllotaxis`, which never fails on too few
primordia: every quantity that cannot be estimated is ``None`` in the summary with a reason in
``summary["reasons"]`` (keyed by the summary key) and in ``summary["notes"]``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import circular as circ
from ..settings import Settings
from . import divergence as _div
from . import mode as _mode
from . import parastichy as _par
from . import permutation as _perm
from . import plastochron as _pla
from .parastichy import classify_pair, contact_parastichies, lattice_contact_pair, limit_angle
from .plastochron import phyllotaxis_index

__all__ = ["analyse_phyllotaxis", "PhyllotaxisResult", "contact_parastichies",
           "lattice_contact_pair", "classify_pair", "limit_angle", "phyllotaxis_index"]

DIVERGENCE_COLUMNS = ["from_rank", "to_rank", "angle_deg", "interval_h", "signed_angle_deg",
                      "angle_class", "class_residual_deg", "permutation_id", "unexplained",
                      "corrected_angle_deg", "angle_source", "frame", "from_theta_deg",
                      "to_theta_deg", "co_initiated"]


@dataclass
class PhyllotaxisResult:
    """Tables and summary of a phyllotaxis analysis.

    Attributes
    ----------
    divergence : DataFrame
        One row per successive pair of primordia (see :data:`DIVERGENCE_COLUMNS`):
        ``angle_deg`` in the generative direction in [0, 360), ``signed_angle_deg``
        (counter-clockwise positive, [-180, 180)), ``angle_class`` and ``class_residual_deg``
        under the permutation labelling, ``permutation_id`` (0 outside permuted blocks, else
        the 1-based id of the block), ``unexplained``, ``corrected_angle_deg`` (the k-th angle
        of the corrected birth order), ``angle_source`` and ``frame`` (where the azimuths were
        taken), ``co_initiated`` (same node). Units and meanings are in
        ``apextrack.tables.SCHEMA["divergence"]``.
    parastichies : DataFrame
        One row per (primordium, parastichy family) in the analysis frame.
    summary : dict
        JSON-able values; ``None`` where an estimate is impossible, with ``reasons[key]``.
    """

    divergence: pd.DataFrame
    parastichies: pd.DataFrame
    summary: dict = field(default_factory=dict)


def _empty_divergence() -> pd.DataFrame:
    dtypes = ["int64", "int64", "float64", "float64", "float64", "object", "float64", "int64",
              "bool", "float64", "object", "int64", "float64", "float64", "bool"]
    return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(DIVERGENCE_COLUMNS, dtypes)})


def _reason(summary: dict, key: str, text: str) -> None:
    summary.setdefault("reasons", {})[key] = text
    if text not in summary["notes"]:
        summary["notes"].append(text)


def analyse_phyllotaxis(primordia: pd.DataFrame, tracks: pd.DataFrame | None = None,
                        settings: Settings | None = None) -> PhyllotaxisResult:
    """Measure the phyllotaxis of birth-ordered primordia.

    Parameters
    ----------
    primordia : DataFrame
        One row per primordium: ``birth_rank``, ``track_id``, ``emergence_time_h``,
        ``theta_deg`` (azimuth at emergence, counter-clockwise), ``r_um``, ``co_initiated``.
    tracks : DataFrame, optional
        One row per detection: ``track_id``, ``frame``, ``time_h``, ``r_um``, ``theta_deg``
        (relative to the per-frame apex centre).
    settings : Settings, optional
        Uses ``expected_angle_deg``, ``von_mises_kappa``, ``bootstrap_n``, ``confidence``,
        ``seed``, ``parastichy_frame``, ``parastichy_min_primordia``, ``mode_tolerance_deg`` and
        ``permutation_prior``.

    Returns
    -------
    PhyllotaxisResult

    Examples
    --------
    >>> import pandas as pd
    >>> p = pd.DataFrame({"birth_rank": [1, 2, 3, 4], "track_id": [0, 1, 2, 3],
    ...                   "emergence_time_h": [0.0, 6.0, 12.0, 18.0],
    ...                   "theta_deg": [0.0, 137.5, 275.0, 52.5], "r_um": [20.0] * 4,
    ...                   "co_initiated": [False] * 4})
    >>> res = analyse_phyllotaxis(p, None)
    >>> res.summary["chirality"], round(res.summary["divergence_mean_deg"], 1), res.summary["plastochron_h"]
    ('ccw', 137.5, 6.0)
    """
    s = settings or Settings()
    rng = np.random.default_rng(s.seed)
    alpha = float(s.expected_angle_deg)
    summary: dict = {"notes": [], "reasons": {}}
    p = primordia.copy() if primordia is not None else pd.DataFrame()
    if len(p) and "birth_rank" in p:
        p = p.sort_values("birth_rank", kind="stable").reset_index(drop=True)
    n = int(len(p))
    summary["n_primordia"] = n
    summary["expected_angle_deg"] = alpha
    summary["von_mises_kappa"] = float(s.von_mises_kappa)
    summary["confidence"] = float(s.confidence)
    summary["n_co_initiated"] = int(p["co_initiated"].fillna(False).astype(bool).sum()) if "co_initiated" in p else 0

    # --- divergence angles ---------------------------------------------------------------
    pairs = _div.successive_azimuths(p, tracks, s.co_initiation_h) if n >= 2 else None
    signed = pairs["signed_angle_deg"].to_numpy(float) if pairs is not None else np.zeros(0)
    chir = _div.decide_chirality(signed)
    summary["chirality"] = chir["chirality"]
    summary["chirality_support"] = chir["support"]
    summary["chirality_determined"] = chir["determined"]
    if chir["note"] and chir["support"] is None:
        _reason(summary, "chirality_support", chir["note"])
    elif chir["note"]:
        summary["notes"].append(chir["note"])
    if pairs is not None:
        d = _div.divergence_table(pairs, chir["chirality"])
        summary["n_angles_common_frame"] = int((d["angle_source"] == "common_frame").sum())
    else:
        d = _empty_divergence()
        summary["n_angles_common_frame"] = 0
    angles = d["angle_deg"].to_numpy(float)
    stats, notes = _div.divergence_statistics(angles, s.bootstrap_n, s.confidence, rng)
    summary.update(stats)
    for note in notes:
        key = ("divergence_ci_deg" if "CI" in note else "divergence_sd_deg" if "SD" in note
               else "divergence_mean_deg")
        _reason(summary, key, note)
        if "Rayleigh" in note:
            summary["reasons"]["rayleigh_p"] = note
        if "at least 1 angle" in note:
            for k in ("divergence_sd_deg", "divergence_ci_deg", "resultant_length", "rayleigh_p"):
                summary["reasons"][k] = note

    # --- plastochron from emergence times -------------------------------------------------
    times = p["emergence_time_h"].to_numpy(float) if "emergence_time_h" in p else np.zeros(0)
    em, notes = _pla.emergence_plastochron(times, s.bootstrap_n, s.confidence, rng)
    summary.update(em)
    for note in notes:
        if "needs at least 2 primordia" in note:
            for k in ("plastochron_h", "plastochron_median_h", "plastochron_ci_h"):
                summary["reasons"][k] = note
        elif "CI" in note:
            summary["reasons"]["plastochron_ci_h"] = note
        if note not in summary["notes"]:
            summary["notes"].append(note)

    # --- analysis frame: plastochron ratio, growth plastochron, parastichies ------------------
    frame = _pla.choose_frame(p, tracks, s.parastichy_frame) if n else None
    summary["analysis_frame"] = frame
    if frame is None:
        pos = None
        why = ("no primordia" if n == 0 else
               f"frame {s.parastichy_frame} holds no tracked primordium" if s.parastichy_frame is not None
               else "no tracks with positions were given")
        if s.parastichy_frame is not None and n:
            summary["notes"].append(why)
    else:
        pos = _pla.positions_in_frame(p, tracks, frame)
    gr, notes = _pla.growth_plastochron(pos, tracks, p["track_id"] if "track_id" in p else None,
                                        s.bootstrap_n, s.confidence, rng)
    summary.update(gr)
    for note in notes:
        if "growth plastochron CI" in note:
            summary["reasons"]["plastochron_growth_ci_h"] = note
        elif "ratio" in note and "CI" in note:
            summary["reasons"]["plastochron_ratio_ci"] = note
        elif "ratio needs" in note:
            for k in ("plastochron_ratio", "plastochron_ratio_ci", "relative_plastochron_rate",
                      "phyllotaxis_index", "plastochron_growth_h"):
                summary["reasons"][k] = note
        elif "index" in note:
            summary["reasons"]["phyllotaxis_index"] = note
        elif "growth rate" in note or "drift outward" in note:
            summary["reasons"]["plastochron_growth_h"] = note
            summary["reasons"].setdefault("radial_growth_rate_per_h", note)
        if note not in summary["notes"]:
            summary["notes"].append(note)
    if frame is None and n >= 2:
        _reason(summary, "plastochron_ratio", f"plastochron ratio needs positions in one frame: {why}")
    te, tg = summary.get("plastochron_h"), summary.get("plastochron_growth_h")
    summary["plastochron_agreement"] = (float(tg / te) if te and tg and te > 0 else None)
    ci_e, ci_g = summary.get("plastochron_ci_h"), summary.get("plastochron_growth_ci_h")
    summary["plastochron_estimates_agree"] = (bool(ci_e[0] <= ci_g[1] and ci_g[0] <= ci_e[1])
                                              if ci_e and ci_g else None)
    if summary["plastochron_agreement"] is None:
        summary["reasons"]["plastochron_agreement"] = "needs both plastochron estimates"

    # --- parastichies -----------------------------------------------------------------------
    par_df = _par.parastichy_table([], None)
    summary.update({"parastichy_pair": None, "parastichy_class": None, "parastichy_support": None,
                    "parastichy_jugacy": None, "parastichy_sequence": None, "limit_angle_deg": None,
                    "parastichy_winding": None})
    npos = 0 if pos is None else len(pos)
    if npos < s.parastichy_min_primordia:
        _reason(summary, "parastichy_pair",
                f"contact parastichies need at least {s.parastichy_min_primordia} primordia in one frame; "
                f"{npos} available")
    else:
        node = None
        if len(d) and d["co_initiated"].any():
            node_of = dict(zip(p["birth_rank"].astype(int), _mode.nodes_from_co_initiation(d["co_initiated"])))
            node = pos["birth_rank"].astype(int).map(node_of).to_numpy(np.int64)
        pr = contact_parastichies(pos["r_um"].to_numpy(float), pos["theta_deg"].to_numpy(float),
                                  pos["birth_rank"].to_numpy(int), metric="log", node=node)
        if pr["pair"] is None:
            _reason(summary, "parastichy_pair", f"no contact parastichy pair found ({pr.get('reason')})")
        else:
            cls = classify_pair(*pr["pair"])
            summary.update({"parastichy_pair": [int(x) for x in pr["pair"]],
                            "parastichy_class": cls["class"], "parastichy_support": float(pr["support"]),
                            "parastichy_jugacy": cls["jugacy"], "parastichy_sequence": cls["sequence"],
                            "limit_angle_deg": cls["limit_angle_deg"],
                            "parastichy_winding": {str(k): v for k, v in pr["winding"].items()}})
            par_df = _par.parastichy_table(pos["birth_rank"].to_numpy(int), pr, frame)
    for k in ("parastichy_class", "limit_angle_deg"):
        if summary[k] is None and "parastichy_pair" in summary["reasons"]:
            summary["reasons"][k] = summary["reasons"]["parastichy_pair"]

    # --- pattern mode ---------------------------------------------------------------------------
    co_pairs = d["co_initiated"].to_numpy(bool) if len(d) else np.zeros(0, bool)
    finite = np.isfinite(angles)
    lab = (_perm.label_permutations(angles, alpha, s.von_mises_kappa, s.permutation_prior)
           if finite.sum() >= 2 else None)
    md = _mode.classify_mode(angles, co_pairs, tolerance=s.mode_tolerance_deg,
                             permuted_spiral_residuals=None if lab is None else lab["residual_deg"],
                             expected_angle_deg=alpha,
                             permuted_spiral_multiples=None if lab is None else lab["multiples"])
    summary["mode"] = md["mode"]
    summary["mode_evidence"] = md["evidence"]
    summary["organs_per_node"] = md["organs_per_node"]
    summary["node_rotation_deg"] = md["node_rotation_deg"]
    if md["reason"]:
        _reason(summary, "mode", md["reason"])

    # --- permutations ---------------------------------------------------------------------------
    d["angle_class"] = pd.Series([None] * len(d), dtype="object", index=d.index)
    d["class_residual_deg"] = np.nan
    d["permutation_id"] = np.zeros(len(d), dtype=np.int64)
    d["unexplained"] = np.zeros(len(d), dtype=bool)
    d["corrected_angle_deg"] = np.nan
    summary.update({"permutations": None, "n_permutations": None, "n_permuted": None,
                    "unexplained_angles": None, "n_unexplained": None, "corrected_order": None,
                    "corrected_divergence_mean_deg": None, "corrected_divergence_sd_deg": None})
    if lab is None:
        _reason(summary, "permutations",
                f"permutation detection needs at least 2 divergence angles (3 primordia); {int(finite.sum())} available")
    elif md["mode"] not in (None, "spiral", "irregular"):
        _reason(summary, "permutations",
                f"permutation classes assume a spiral with the expected angle; the pattern mode is {md['mode']}")
    else:
        ranks = p["birth_rank"].to_numpy(int)
        mult = lab["multiples"]
        d["angle_class"] = [_perm.class_label(int(m)) for m in mult]
        d["class_residual_deg"] = lab["residual_deg"]
        d["unexplained"] = lab["unexplained"].astype(bool)
        perms = []
        pid = np.zeros(len(d), dtype=np.int64)
        organ_pid = np.zeros(n, dtype=np.int64)
        for i, (start, name, llr) in enumerate(lab["blocks"], start=1):
            L = len(_perm.BLOCKS[name])
            organs = list(range(start, start + L))
            organ_pid[organs] = i
            block_sigma = lab["sigma"][start:start + L]
            corrected = [int(ranks[o]) for o in np.array(organs)[np.argsort(block_sigma, kind="stable")]]
            perms.append({"id": i, "kind": "2-permutation" if L == 2 else "3-permutation",
                          "block": name, "ranks": [int(ranks[o]) for o in organs],
                          "corrected_order": corrected, "log_likelihood_ratio": llr,
                          "likelihood_ratio": float(math.exp(min(llr, 700.0)))})
        # an angle belongs to a permutation when either organ is in the block
        for k in range(len(d)):
            pid[k] = organ_pid[k + 1] if organ_pid[k + 1] else organ_pid[k]
        d["permutation_id"] = pid
        order = lab["corrected_order"]
        corr = lab["corrected_angles_deg"]
        # corrected angle of each pair in the corrected order, attached to the pair that ends
        # at the same position of the sequence
        d["corrected_angle_deg"] = np.asarray(corr, float) if len(corr) == len(d) else np.nan
        summary["permutations"] = perms
        summary["n_permutations"] = len(perms)
        summary["n_permuted"] = int(np.count_nonzero(organ_pid))
        summary["corrected_order"] = [int(ranks[o]) for o in order]
        ua = d.loc[d["unexplained"], ["from_rank", "to_rank", "angle_deg"]]
        summary["unexplained_angles"] = [{"from_rank": int(a), "to_rank": int(b), "angle_deg": float(c)}
                                         for a, b, c in ua.itertuples(index=False)]
        summary["n_unexplained"] = int(len(ua))
        summary["unexplained_threshold_deg"] = float(lab["unexplained_threshold_deg"])
        ca = np.asarray(corr, float)
        if ca.size:
            summary["corrected_divergence_mean_deg"] = circ.circ_mean(ca)
            summary["corrected_divergence_sd_deg"] = (circ.circ_sd(ca) if ca.size >= 2 else None)
        if md["mode"] == "spiral" and summary.get("divergence_mean_deg") is not None and \
                abs(circ.wrap180(summary["divergence_mean_deg"] - alpha)) > 30:
            summary["notes"].append(
                f"mean divergence {summary['divergence_mean_deg']:.1f}° is far from the expected angle "
                f"{alpha:.1f}° used to classify permutations; set expected_angle_deg")
    for k in ("n_permutations", "n_permuted", "unexplained_angles", "n_unexplained", "corrected_order",
              "corrected_divergence_mean_deg"):
        if summary[k] is None and "permutations" in summary["reasons"]:
            summary["reasons"][k] = summary["reasons"]["permutations"]

    out_cols = [c for c in DIVERGENCE_COLUMNS if c in d.columns] + [c for c in d.columns if c not in DIVERGENCE_COLUMNS]
    d = d[out_cols].reset_index(drop=True)
    return PhyllotaxisResult(divergence=d, parastichies=par_df, summary=_jsonable(summary))


def _jsonable(obj):
    """Plain Python values only (numpy scalars → Python, NaN → None)."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return None if not math.isfinite(v) else v
    return obj
