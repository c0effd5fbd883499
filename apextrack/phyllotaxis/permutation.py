"""Permutations of birth order detected in the sequence of divergence angles.

With α the expected divergence angle, organs born in true order 1, 2, 3, … sit at k·α. When
the observed order is a local permutation σ of the true one, the angle between observed organs
i and i+1 is (σ(i+1) − σ(i))·α: swapping two successive organs turns α, α, α into
2α, −α, 2α, and reversing a block of three gives 3α, −α, −α, 3α (Refahi et al. 2016,
eLife 5:e14093). Each angle is scored against its predicted class with a von Mises likelihood
(concentration κ ≈ 10.4 as fitted by Guédon et al. 2013, J. Theor. Biol.) mixed with a small
uniform share for outliers, and a dynamic programme over blocks of length 1 (in order), 2 (a
swap) or 3 (the three permutations of three organs that are not products of swaps of
neighbours in place) finds the most likely admissible labelling given a prior probability of a
permuted block.
"""

from __future__ import annotations

import math

import numpy as np

from .. import circular as circ

__all__ = ["BLOCKS", "label_permutations", "class_label", "unexplained_threshold_deg"]

#: Block permutations: position in the true order of each observed organ of the block.
BLOCKS: dict[str, tuple[int, ...]] = {
    "in_order": (0,),
    "swap": (1, 0),
    "reversed_3": (2, 1, 0),
    "shift_3_forward": (1, 2, 0),
    "shift_3_back": (2, 0, 1),
}

_OUTLIER_SHARE = 0.05


def class_label(multiple: int) -> str:
    """Text label of an angle class: 1 → "α", 2 → "2α", -1 → "-α" …"""
    if multiple == 1:
        return "α"
    if multiple == -1:
        return "-α"
    return f"{multiple}α"


def unexplained_threshold_deg(kappa: float) -> float:
    """Deviation from the predicted class beyond which the von Mises density falls below the
    uniform density 1/(2π): cos δ = ln I0(κ) / κ. 180 when κ is 0."""
    if kappa <= 0:
        return 180.0
    from scipy.special import i0e

    c = (math.log(i0e(kappa)) + kappa) / kappa
    return math.degrees(math.acos(max(-1.0, min(1.0, c))))


def _angle_ll(angles: np.ndarray, multiple: int, alpha: float, kappa: float) -> np.ndarray:
    vm = np.exp(circ.von_mises_logpdf(angles, multiple * alpha, kappa))
    return np.log((1.0 - _OUTLIER_SHARE) * vm + _OUTLIER_SHARE / (2.0 * math.pi))


def _sequence_ll(angles: np.ndarray, sigma: np.ndarray, alpha: float, kappa: float) -> float:
    mult = np.diff(sigma)
    total = 0.0
    for m in np.unique(mult):
        sel = mult == m
        total += float(np.sum(_angle_ll(angles[sel], int(m), alpha, kappa)))
    return total


def label_permutations(angles_deg, alpha_deg: float, kappa: float = 10.4,
                       prior: float = 0.05) -> dict:
    """Most likely permutation labelling of a sequence of divergence angles.

    Parameters
    ----------
    angles_deg : array_like
        Divergence angles in the generative direction, in birth order (N − 1 angles for N
        organs). NaN angles are scored as uninformative.
    alpha_deg : float
        Expected divergence angle α.
    kappa : float
        von Mises concentration of the angle classes.
    prior : float
        Prior probability that a block starting at an organ is permuted (0 disables detection).

    Returns
    -------
    dict
        ``sigma`` (true-order position of each observed organ, 0-based), ``multiples`` (class of
        each angle: σ(i+1) − σ(i)), ``residual_deg`` (angle − multiple·α in [-180, 180)),
        ``unexplained`` (bool per angle), ``blocks`` (list of (start organ index, block name,
        log-likelihood ratio against keeping that block in order)), ``corrected_order``
        (observed organ indices sorted into true order) and ``corrected_angles_deg``.

    Examples
    --------
    >>> out = label_permutations([137.5, 275.0, 222.5, 275.0, 137.5], 137.5)
    >>> [b[1] for b in out["blocks"]]
    ['swap']
    """
    a = np.asarray(angles_deg, dtype=float).ravel()
    n_org = a.size + 1
    nan = ~np.isfinite(a)
    a_eval = np.where(nan, 0.0, a)
    mults = [-2, -1, 1, 2, 3, 4, 5]
    ll = {m: np.where(nan, 0.0, _angle_ll(a_eval, m, alpha_deg, kappa)) for m in mults}

    prior = float(min(max(prior, 0.0), 0.5))
    if prior > 0:
        lp = {"in_order": math.log(1.0 - prior), "swap": math.log(prior * 0.6)}
        for name in ("reversed_3", "shift_3_forward", "shift_3_back"):
            lp[name] = math.log(prior * 0.4 / 3.0)
    else:
        lp = {"in_order": 0.0}
    blocks = {k: v for k, v in BLOCKS.items() if k in lp}

    # dp over (organs consumed j, offset of the last organ: sigma - index in {0, -1, -2})
    NEG = -math.inf
    best = [dict() for _ in range(n_org + 1)]
    best[0][None] = (0.0, None)
    for j in range(n_org):
        for off, (score, _) in list(best[j].items()):
            for name, perm in blocks.items():
                L = len(perm)
                if j + L > n_org:
                    continue
                s = score + lp[name]
                if off is not None:  # boundary angle between organ j-1 and j
                    s += ll[1 + perm[0] - off][j - 1]
                for i in range(L - 1):
                    s += ll[perm[i + 1] - perm[i]][j + i]
                new_off = perm[-1] - (L - 1)
                cur = best[j + L].get(new_off, (NEG, None))[0]
                if s > cur:
                    best[j + L][new_off] = (s, (j, off, name))
    # backtrack
    end = max(best[n_org].items(), key=lambda kv: kv[1][0])[0] if n_org > 0 else None
    chosen = []
    j, off = n_org, end
    while j > 0:
        _, (pj, poff, name) = best[j][off]
        chosen.append((pj, name))
        j, off = pj, poff
    chosen.reverse()
    sigma = np.arange(n_org)
    for start, name in chosen:
        perm = BLOCKS[name]
        sigma[start:start + len(perm)] = start + np.asarray(perm)
    mult = np.diff(sigma)
    resid = np.where(nan, np.nan, circ.wrap180(a_eval - mult * alpha_deg)) if a.size else np.zeros(0)
    thr = unexplained_threshold_deg(kappa)
    unexplained = np.where(nan, False, np.abs(resid) > thr) if a.size else np.zeros(0, bool)
    ll_total = _sequence_ll(a_eval, sigma, alpha_deg, kappa)
    out_blocks = []
    for start, name in chosen:
        if name == "in_order":
            continue
        L = len(BLOCKS[name])
        alt = sigma.copy()
        alt[start:start + L] = np.arange(start, start + L)
        llr = ll_total - _sequence_ll(a_eval, alt, alpha_deg, kappa)
        out_blocks.append((int(start), name, float(llr)))
    order = np.argsort(sigma, kind="stable")
    cum = np.concatenate([[0.0], np.cumsum(np.where(nan, 0.0, a))])
    corr = circ.wrap360(np.diff(cum[order])) if n_org > 1 else np.zeros(0)
    return {"sigma": sigma, "multiples": mult, "residual_deg": resid, "unexplained": unexplained,
            "blocks": out_blocks, "corrected_order": order, "corrected_angles_deg": np.atleast_1d(corr),
            "log_likelihood": ll_total, "unexplained_threshold_deg": thr}
