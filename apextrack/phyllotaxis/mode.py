"""Pattern mode of a sequence of divergence angles: spiral, distichous, decussate, whorled or
multijugate, with the evidence for it.

Every non-spiral mode is a sequence of nodes of k organs (k = 1 distichous, k = 2 decussate or
bijugate, k ≥ 3 whorled or multijugate). Within a node successive organs are a multiple of
360/k apart; from the last organ of a node to the first of the next the angle is β modulo 360/k,
where β is the rotation between successive nodes: β = 180/k for alternating whorls (distichous
180°, decussate 90°, trimerous whorls 60°; common practice, no source) and β ≈ golden/k for
multijugate spirals (bijugate 68.75°). The node boundaries come from co-initiation flags when
they are given, otherwise every phase is tried. A spiral is one organ per node with a constant
angle. Each candidate's evidence is the number of angles within ``tolerance`` of its prediction,
weighed against the chance that random angles fit it as well (a binomial tail: a whorl of six
accepts any angle near a multiple of 60°, a spiral only one direction). The least likely by
chance wins, but a more complex mode (more organs per node) must be at least ten times less
likely by chance than a simpler one; a mode of k organs per node needs at least 2k angles; a
winner that fits fewer than half of the angles or has a chance probability above 1 % makes the
pattern "irregular".
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import bdtrc

from .. import circular as circ

__all__ = ["classify_mode", "nodes_from_co_initiation"]



def nodes_from_co_initiation(co_initiated_pairs) -> list[int]:
    """Node id of each organ from per-angle flags "organs i and i+1 were initiated together"."""
    flags = np.asarray(co_initiated_pairs, dtype=bool)
    node = [0]
    for f in flags:
        node.append(node[-1] if f else node[-1] + 1)
    return node


def _fit_whorl(a: np.ndarray, within: np.ndarray, k: int, tol: float):
    """Count angles that fit a k-node pattern with ``within`` marking within-node angles."""
    step = 360.0 / k
    n_fit = 0
    res = np.full(a.size, np.nan)
    # within-node: nearest non-zero multiple of 360/k
    if within.any():
        aw = a[within]
        mult = np.clip(np.round(aw / step), 1, k - 1) if k > 1 else np.ones_like(aw)
        r = circ.wrap180(aw - mult * step) if k > 1 else np.full(aw.size, 180.0)
        res[within] = r
    between = ~within
    beta = math.nan
    if between.any():
        ab = a[between]
        # rotation between nodes, modulo 360/k: circular mean of k·angle
        mk = circ.circ_mean(circ.wrap360(ab * k))
        beta = (mk / k) if not math.isnan(mk) else float(ab[0] % step)
        r = circ.wrap180((ab - beta) * k) / k
        res[between] = r
    n_fit = int(np.sum(np.abs(res) <= tol))
    return n_fit, beta, res


def _log10_p(c: dict, n: int) -> float:
    """log10 of the chance that at least ``n_fit`` of ``n`` random angles fit the candidate."""
    if c["n_fit"] <= 0:
        return 0.0
    # P(at least n_fit of n) is the binomial upper tail P(X > n_fit - 1) (scipy.special.bdtrc)
    with np.errstate(divide="ignore"):
        return float(np.log(bdtrc(c["n_fit"] - 1, n, c["p0"])) / math.log(10.0))


def _candidates_json(candidates) -> list[dict]:
    return [{"organs_per_node": int(c["k"]), "kind": c["kind"], "n_fit": int(c["n_fit"]),
             "node_rotation_deg": None if c["beta"] is None or (isinstance(c["beta"], float) and math.isnan(c["beta"]))
             else float(c["beta"]), "phase": c["phase"], "chance_fit": float(c["p0"]),
             "log10_p_chance": float(c.get("log10_p", math.nan))} for c in candidates]


def classify_mode(angles_deg, co_initiated_pairs=None, tolerance: float = 25.0,
                  max_k: int = 6, permuted_spiral_residuals=None, expected_angle_deg: float | None = None,
                  permuted_spiral_multiples=None) -> dict:
    """Classify the pattern mode of divergence angles (generative direction, [0, 360)).

    Parameters
    ----------
    angles_deg : array_like
        Successive divergence angles in birth order.
    co_initiated_pairs : array_like of bool, optional
        Per angle: the two organs were initiated together (same node).
    tolerance : float
        Largest deviation (deg) of an angle from the mode's prediction that counts as fitting.
    max_k : int
        Largest number of organs per node tried.
    permuted_spiral_residuals : array_like, optional
        Per angle, the deviation from its class under the most likely permutation labelling of
        a spiral with the expected angle (see :func:`..permutation.label_permutations`): a
        spiral whose birth order is locally permuted is still a spiral.
    expected_angle_deg : float, optional
        The expected angle used for those residuals (reported as the spiral's angle).
    permuted_spiral_multiples : array_like of int, optional
        The class of each angle in that labelling (1 = α); angles given another class count
        as five times likelier to fit by chance.

    Returns
    -------
    dict
        ``mode`` ("spiral", "distichous", "decussate", "whorled", "multijugate", "irregular"
        when no mode fits half of the angles, or None when there are fewer than 3 angles),
        ``organs_per_node``, ``node_rotation_deg`` (β; the divergence for a spiral; for a
        multijugate pattern folded to at most 180/k, since a node of k organs looks the same
        after 360/k),
        ``evidence`` (n_fit, n_angles, fraction, tolerance_deg, and the fit of every candidate),
        ``reason`` (why no mode, else None).

    Examples
    --------
    >>> classify_mode([180.0, 181.0, 179.0, 180.5])["mode"]
    'distichous'
    """
    a = np.asarray(angles_deg, dtype=float)
    a = a[np.isfinite(a)]
    if a.size < 3:
        return {"mode": None, "organs_per_node": None, "node_rotation_deg": None,
                "evidence": {"n_angles": int(a.size), "tolerance_deg": tolerance},
                "reason": f"pattern mode needs at least 3 divergence angles; {a.size} available"}
    a = circ.wrap360(a)
    candidates = []
    # spiral: one organ per node, constant angle
    m = circ.circ_mean(a)
    res = circ.wrap180(a - m) if not math.isnan(m) else np.full(a.size, 180.0)
    w = min(1.0, 2.0 * tolerance / 360.0)  # chance that a random angle fits one direction
    candidates.append({"k": 1, "kind": "spiral", "n_fit": int(np.sum(np.abs(res) <= tolerance)),
                       "beta": m, "phase": None, "p0": w})
    if permuted_spiral_residuals is not None:
        pr = np.asarray(permuted_spiral_residuals, dtype=float)
        if pr.size == a.size:
            n_fit = int(np.sum(np.abs(np.where(np.isfinite(pr), pr, 180.0)) <= tolerance))
            mult = (np.ones(a.size) if permuted_spiral_multiples is None
                    else np.asarray(permuted_spiral_multiples, dtype=float))
            p0 = float(np.mean(np.where(mult == 1, w, min(1.0, 5 * w)))) if mult.size == a.size else w
            cand = {"k": 1, "kind": "spiral", "n_fit": n_fit, "phase": "permutation-aware", "p0": p0,
                    "beta": expected_angle_deg if expected_angle_deg is not None else m}
            if _log10_p(cand, a.size) < _log10_p(candidates[0], a.size):
                candidates[0] = cand
    # distichous: spiral with 180°
    res = circ.wrap180(a - 180.0)
    candidates.append({"k": 1, "kind": "distichous", "n_fit": int(np.sum(np.abs(res) <= tolerance)),
                       "beta": 180.0, "phase": None, "p0": w})
    co = None if co_initiated_pairs is None else np.asarray(co_initiated_pairs, dtype=bool)
    if co is not None and co.size != a.size:
        co = None
    idx = np.arange(a.size)
    k_co = None
    if co is not None and co.any():
        sizes = np.bincount(np.asarray(nodes_from_co_initiation(co)))
        sizes = sizes[sizes > 1]
        k_co = int(np.bincount(sizes).argmax())
    for k in range(2, max_k + 1):
        # a node pattern needs two full cycles of k angles to be told from noise
        if a.size < 2 * k:
            break
        trials = []
        for ph in range(k):
            # organ i sits at position (i + ph) % k in its node; angle i is within-node unless
            # organ i+1 starts a node
            within = ((idx + 1 + ph) % k) != 0
            trials.append((within, ph))
        if k == k_co:
            trials.append((co, "co_initiation"))
        best = None
        for within, ph in trials:
            n_fit, beta, _ = _fit_whorl(a, within, k, tolerance)
            p0 = float(np.mean(np.where(within, min(1.0, (k - 1) * w), min(1.0, k * w))))
            cand = {"k": k, "kind": "node", "n_fit": n_fit, "beta": beta, "phase": ph, "p0": p0}
            if best is None or _log10_p(cand, a.size) < _log10_p(best, a.size):
                best = cand
        candidates.append(best)
    # choose: candidates in order of complexity (distichous, spiral, 2, 3, ... organs per node);
    # a more complex mode must be at least ten times less likely by chance than the simpler
    # winner so far
    for c in candidates:
        c["log10_p"] = _log10_p(c, a.size)
    ordered = [candidates[1], candidates[0]] + candidates[2:]
    winner = ordered[0]
    for c in ordered[1:]:
        need = 0.0 if (winner["kind"] == "distichous" and c["kind"] == "spiral") else 1.0
        if c["log10_p"] < winner["log10_p"] - need:
            winner = c
    k = winner["k"]
    beta = winner["beta"]
    if winner["n_fit"] < 0.5 * a.size or winner["log10_p"] > -2.0:
        ev = {"n_fit": int(winner["n_fit"]), "n_angles": int(a.size),
              "fraction": float(winner["n_fit"] / a.size), "tolerance_deg": float(tolerance),
              "candidates": _candidates_json(candidates)}
        return {"mode": "irregular", "organs_per_node": None, "node_rotation_deg": None, "evidence": ev,
                "reason": None}
    if winner["kind"] == "spiral":
        mode = "distichous" if abs(circ.wrap180(beta - 180.0)) <= tolerance else "spiral"
    elif winner["kind"] == "distichous":
        mode = "distichous"
    else:
        step = 360.0 / k
        bmod = beta % step if not math.isnan(beta) else math.nan
        alternating = abs(circ.wrap180((bmod - 180.0 / k) * k) / k) <= tolerance / k \
            if not math.isnan(bmod) else False
        if alternating:
            mode = "decussate" if k == 2 else "whorled"
        else:
            mode = "multijugate" if k >= 2 else "spiral"
            # a node of k organs looks the same after 360/k: a turn β one way is a turn
            # 360/k − β the other way; report the smaller one (≤ 180/k)
            if not math.isnan(bmod):
                beta = min(bmod, step - bmod)
    ev = {"n_fit": int(winner["n_fit"]), "n_angles": int(a.size),
          "fraction": float(winner["n_fit"] / a.size), "tolerance_deg": float(tolerance),
          "candidates": _candidates_json(candidates)}
    return {"mode": mode, "organs_per_node": int(k),
            "node_rotation_deg": None if beta is None or math.isnan(beta) else float(beta),
            "evidence": ev, "reason": None}
