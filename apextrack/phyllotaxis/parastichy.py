"""Contact parastichies: the pair (m, n) of spiral families seen in a set of primordia, the
spiral each primordium lies on, and the class of the pair with its limit divergence angle.

Each point is joined to its nearest neighbour on either side: a neighbour vector is oriented
from the older to the younger point (towards higher birth rank) and its angular component's
sign tells the two families apart. Along a parastichy of family m the rank steps by m, so the
rank difference of the nearest neighbour on each side, voted over all points, gives the contact
pair — the two shortest lattice vectors of opposite angular sign (Van Iterson 1907). Points in
a plane can be compared with the plain Euclidean distance (uniform density, e.g. Vogel 1979) or
in the conformal (ln r, θ) plane, where organs that grow in proportion to their distance from
the centre keep a constant size (``metric="log"``, the default for apex images).
"""

from __future__ import annotations

import math
from collections import Counter
from fractions import Fraction

import numpy as np
import pandas as pd

from .. import circular as circ

__all__ = ["lattice_contact_pair", "contact_parastichies", "classify_pair", "limit_angle",
           "parastichy_table", "PHI", "GOLDEN_ANGLE_DEG"]

from ..constants import GOLDEN_ANGLE_DEG, PHI  # re-exported


def _vote(dist2: np.ndarray, dang: np.ndarray, index: np.ndarray, where: np.ndarray) -> dict:
    """Nearest neighbour on each angular side for each point; votes of rank differences."""
    n = index.size
    later = index[None, :] > index[:, None]
    # orient every vector from lower to higher index
    sign = np.where(later, np.sign(dang), -np.sign(dang))
    np.fill_diagonal(dist2, np.inf)
    diff = np.abs(index[None, :] - index[:, None])
    dist2 = np.where(diff == 0, np.inf, dist2)  # co-ranked points give no step
    votes = {+1: Counter(), -1: Counter()}
    nearest = {+1: np.full(n, -1), -1: np.full(n, -1)}
    for s in (+1, -1):
        d = np.where(sign == s, dist2, np.inf)
        j = np.argmin(d, axis=1)
        ok = np.isfinite(d[np.arange(n), j])
        for i in np.flatnonzero(ok & where):
            votes[s][int(diff[i, j[i]])] += 1
            nearest[s][i] = int(diff[i, j[i]])
    return {"votes": votes, "nearest": nearest}


def _result_from_votes(v: dict) -> dict:
    fam = {}
    for s in (+1, -1):
        c = v["votes"][s]
        if not c:
            fam[s] = (None, 0, 0)
            continue
        top = max(c.items(), key=lambda kv: (kv[1], -kv[0]))
        fam[s] = (top[0], top[1], sum(c.values()))
    if fam[+1][0] is None or fam[-1][0] is None:
        return {"pair": None, "families": fam, "reason": "no neighbours on one side"}
    (mp, cp, tp), (mn, cn, tn) = fam[+1], fam[-1]
    pair = tuple(sorted((mp, mn)))
    support = (cp + cn) / (tp + tn)
    return {"pair": pair, "families": fam, "support": support, "reason": None,
            "sign_of": {mp: +1, mn: -1} if mp != mn else {mp: 0}}


def lattice_contact_pair(u, v, index, period: float = 1.0, where=None) -> dict:
    """Contact parastichy pair of points on a cylinder (angular coordinate ``u`` with the given
    period, axial coordinate ``v``, same length units).

    Parameters
    ----------
    u, v : array_like
        Coordinates of the points; ``u`` is periodic.
    index : array_like of int
        Birth rank (or lattice index) of each point.
    period : float
        Circumference of the cylinder in the units of ``u``.
    where : array_like of bool, optional
        Points that vote (all by default); all points serve as neighbours.

    Returns
    -------
    dict
        ``pair`` (m, n) with m ≤ n or None, ``support`` (share of votes for the winners),
        ``families`` ({+1: (number, votes, total), -1: ...}: the rank step of the family whose
        neighbour vectors turn in the positive / negative angular direction towards younger
        points), ``nearest`` (per point and side, the rank step to its nearest neighbour).

    Examples
    --------
    >>> j = np.arange(200); d = 2 - PHI
    >>> lattice_contact_pair((j * d) % 1, j * 0.029615, j)["pair"]
    (3, 5)
    """
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    idx = np.asarray(index, dtype=np.int64)
    w = np.ones(u.size, bool) if where is None else np.asarray(where, bool)
    if u.size < 3:
        return {"pair": None, "families": {}, "nearest": {}, "support": None,
                "reason": f"contact parastichies need at least 3 points; {u.size} available"}
    du = u[None, :] - u[:, None]
    du = (du + period / 2.0) % period - period / 2.0
    dv = v[None, :] - v[:, None]
    vote = _vote(du * du + dv * dv, du, idx, w)
    out = _result_from_votes(vote)
    out["nearest"] = vote["nearest"]
    return out


def contact_parastichies(r, theta_deg, rank, metric: str = "log", where=None, node=None) -> dict:
    """Contact parastichy pair of points around a centre, and the spiral of each point.

    Parameters
    ----------
    r : array_like
        Distance of each point from the centre (any unit, > 0).
    theta_deg : array_like
        Azimuth of each point, counter-clockwise, degrees.
    rank : array_like of int
        Birth rank of each point (higher = younger).
    metric : {"log", "euclidean"}
        Distance used to find neighbours: in the conformal plane (ln r, θ) — right for organs
        whose size grows in proportion to r — or in the image plane.
    where : array_like of bool, optional
        Points that vote (all by default).
    node : array_like of int, optional
        Node of each point (organs initiated together share a node, e.g. the pairs of a
        bijugate pattern). Rank steps are then counted in nodes and multiplied by the number of
        organs per node: a family whose neighbours are F nodes apart holds j·F parastichies in
        a j-jugate pattern.

    Returns
    -------
    dict
        ``pair`` (m, n) or None; ``support``; ``jugacy`` (organs per node); ``winding`` {number: "ccw"/"cw"}: the way each
        family's spirals turn when followed outward from the centre (towards older points);
        ``spiral_index`` {number: array of rank mod number}; ``reason`` when no pair.

    Examples
    --------
    >>> n = np.arange(1, 400)
    >>> res = contact_parastichies(np.sqrt(n), n * GOLDEN_ANGLE_DEG, -n, metric="euclidean",
    ...                            where=(n > 90) & (n < 110))
    >>> res["pair"]
    (21, 34)
    """
    r = np.asarray(r, float)
    th = np.asarray(theta_deg, float)
    rank = np.asarray(rank, dtype=np.int64)
    w = np.ones(r.size, bool) if where is None else np.asarray(where, bool)
    if r.size < 3:
        return {"pair": None, "support": None, "winding": {}, "spiral_index": {},
                "reason": f"contact parastichies need at least 3 primordia; {r.size} available"}
    if metric not in ("log", "euclidean"):
        raise ValueError("metric must be 'log' or 'euclidean'")
    dang = circ.wrap180(th[None, :] - th[:, None])
    if metric == "log":
        if np.any(r <= 0):
            keep = r > 0
            sub = contact_parastichies(r[keep], th[keep], rank[keep], metric, w[keep])
            return sub
        lr = np.log(r)
        dlr = lr[None, :] - lr[:, None]
        dist2 = dlr ** 2 + np.deg2rad(dang) ** 2
    else:
        x, y = r * np.cos(np.deg2rad(th)), r * np.sin(np.deg2rad(th))
        dist2 = (x[None, :] - x[:, None]) ** 2 + (y[None, :] - y[:, None]) ** 2
    jug = 1
    index = rank
    if node is not None:
        node = np.asarray(node, dtype=np.int64)
        n_nodes = np.unique(node).size
        jug = max(1, int(round(r.size / max(n_nodes, 1))))
        index = node
    vote = _vote(dist2, dang, index, w)
    if jug > 1:
        for sgn in (+1, -1):
            vote["votes"][sgn] = Counter({k * jug: v for k, v in vote["votes"][sgn].items()})
            vote["nearest"][sgn] = np.where(vote["nearest"][sgn] > 0, vote["nearest"][sgn] * jug, -1)
    out = _result_from_votes(vote)
    out["nearest"] = vote["nearest"]
    out["jugacy"] = jug
    out["winding"], out["spiral_index"] = {}, {}
    if out["pair"] is not None:
        for sgn, (num, _, _) in out["families"].items():
            # vectors point from older to younger (inward, angular sign s); outward turns -s
            out["winding"][num] = "cw" if sgn > 0 else "ccw"
            if jug == 1:
                out["spiral_index"][num] = np.mod(rank, num)
            else:
                out["spiral_index"][num] = _trace_spirals(vote["nearest"][sgn], dist2, dang, index, sgn, num, jug)
    return out


def _trace_spirals(nearest_step, dist2, dang, index, sgn, num, jug) -> np.ndarray:
    """Label the parastichies of one family by following neighbour links of that family."""
    n = index.size
    parent = np.arange(n)

    def find(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    later = index[None, :] > index[:, None]
    sign = np.where(later, np.sign(dang), -np.sign(dang))
    step = np.abs(index[None, :] - index[:, None]) * jug
    # each point joins its nearest younger neighbour of this family
    d = np.where((sign == sgn) & (step == num) & later, dist2, np.inf)
    np.fill_diagonal(d, np.inf)
    j = np.argmin(d, axis=1)
    for i in range(n):
        if np.isfinite(d[i, j[i]]):
            a, b = find(i), find(int(j[i]))
            if a != b:
                parent[max(a, b)] = min(a, b)
    roots = np.array([find(i) for i in range(n)])
    # number the spirals 0, 1, ... in order of their oldest member
    order = {}
    for i in np.argsort(index, kind="stable"):
        order.setdefault(roots[i], len(order))
    return np.array([order[x] for x in roots], dtype=np.int64)


def _base_pair(m: int, n: int) -> tuple[int, int]:
    """Run the additive sequence backwards from (m, n) to its first two terms ⟨a, b⟩."""
    a, b = m, n
    while 0 < b - a < a:
        a, b = b - a, a
    return a, b


def limit_angle(a: int, b: int) -> float:
    """Limit divergence angle (deg, ≤ 180) of the sequence a, b, a+b, … (gcd 1).

    The divergence d/360 has the continued fraction [0; c1, …, ck, 1, 1, …] whose convergent
    denominators include a and b as successive terms; for ⟨1, t⟩ it is 360 / (t + 1/φ).
    """
    if a <= 0 or b <= 0:
        raise ValueError("sequence terms must be positive")
    if a > b:
        a, b = b, a
    # continued fraction of b/a
    e = []
    fr = Fraction(b, a)
    while True:
        q = fr.numerator // fr.denominator
        e.append(q)
        rem = fr - q
        if rem == 0:
            break
        fr = 1 / rem
    if len(e) > 1 and e[-1] == 1:
        e = e[:-2] + [e[-2] + 1]
    c = list(reversed(e))
    x = 1.0 / PHI
    for ci in reversed(c):
        x = 1.0 / (ci + x)
    ang = 360.0 * x
    return float(min(ang, 360.0 - ang))


def classify_pair(m: int, n: int) -> dict:
    """Class of a contact parastichy pair and its limit divergence angle.

    Returns ``class`` (e.g. "Fibonacci", "Lucas <1,3>", "bijugate Fibonacci", "accessory <1,4>",
    "<2,5>"), ``jugacy`` (common divisor: organs per node), ``sequence`` [a, b] (first terms of
    the reduced sequence) and ``limit_angle_deg`` (per organ: the reduced sequence's limit
    angle divided by the jugacy).

    Examples
    --------
    >>> classify_pair(8, 13)["class"], round(classify_pair(4, 7)["limit_angle_deg"], 2)
    ('Fibonacci', 99.5)
    """
    m, n = int(min(m, n)), int(max(m, n))
    if m <= 0:
        return {"class": None, "jugacy": None, "sequence": None, "limit_angle_deg": None}
    g = math.gcd(m, n)
    a, b = _base_pair(m // g, n // g)
    if (a, b) in ((1, 1), (1, 2)):
        base = "Fibonacci"
    elif (a, b) == (1, 3):
        base = "Lucas <1,3>"
    elif a == 1:
        base = f"accessory <1,{b}>"
    else:
        base = f"<{a},{b}>"
    names = {1: "", 2: "bijugate ", 3: "trijugate "}
    prefix = names.get(g, f"{g}-jugate ")
    return {"class": prefix + base, "jugacy": int(g), "sequence": [int(a), int(b)],
            "limit_angle_deg": limit_angle(a, b) / g}


def parastichy_table(rank, pair_result: dict, frame: int | None = None) -> pd.DataFrame:
    """One row per (primordium, family): family "m"/"n", parastichy_number, spiral_index
    (which of the parastichies of that family the primordium lies on: rank mod number),
    winding, birth_rank, frame."""
    cols = ["frame", "birth_rank", "family", "parastichy_number", "spiral_index", "winding"]
    pair = pair_result.get("pair") if pair_result else None
    if pair is None:
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(
            cols, ["int64", "int64", "object", "int64", "int64", "object"])})
    rank = np.asarray(rank, dtype=np.int64)
    rows = []
    si = pair_result.get("spiral_index", {})
    fams = [("m", pair[0]), ("n", pair[1])] if pair[0] != pair[1] else [("m", pair[0])]
    for k, rk in enumerate(rank):
        for fam, num in fams:
            rows.append({"frame": -1 if frame is None else int(frame), "birth_rank": int(rk),
                         "family": fam, "parastichy_number": int(num),
                         "spiral_index": int(si[num][k]) if num in si else int(rk % num),
                         "winding": pair_result.get("winding", {}).get(num)})
    return pd.DataFrame(rows, columns=cols)
