"""Contact parastichies and their classes, checked against published lattice results."""

import math

import numpy as np
import pytest

from apextrack.phyllotaxis.parastichy import (GOLDEN_ANGLE_DEG, PHI, classify_pair, contact_parastichies,
                                              lattice_contact_pair, limit_angle, parastichy_table)

FIB = [1, 2, 3, 5, 8, 13, 21, 34, 55, 89, 144]


def test_limit_angles_exact():
    # golden angle 360(2 − φ) = 137.50776° and the limit angle 360/(t + 1/φ) of the sequence
    # 1, t, t+1, 2t+1, … (Jean 1994, "Phyllotaxis", Cambridge UP; recalled from memory and
    # recomputed here): t = 3 gives 99.50° (Lucas), t = 4 gives 77.96°; bijugate = golden / 2
    assert limit_angle(1, 2) == pytest.approx(137.50776405, abs=1e-8)
    assert GOLDEN_ANGLE_DEG == pytest.approx(137.50776405, abs=1e-8)
    assert round(limit_angle(1, 3), 2) == 99.50
    assert round(limit_angle(1, 4), 2) == 77.96
    assert round(classify_pair(2, 4)["limit_angle_deg"], 2) == 68.75
    for t in range(2, 9):
        assert limit_angle(1, t) == pytest.approx(360 / (t + 1 / PHI), abs=1e-9)
    # the limit angle is the one whose continued fraction has the sequence terms as successive
    # convergent denominators: check it on ⟨2, 5⟩ (recomputed; 151.14° as recalled from memory)
    x = limit_angle(2, 5) / 360
    dens, cf, y = [], [], x
    for _ in range(8):
        a = int(1 / y)
        cf.append(a)
        y = 1 / y - a
    q_prev, q = 1, cf[0]
    dens = [q]
    for a in cf[1:]:
        q_prev, q = q, a * q + q_prev
        dens.append(q)
    assert dens[:5] == [2, 5, 7, 12, 19]
    assert limit_angle(2, 5) == pytest.approx(151.14, abs=0.005)


@pytest.mark.parametrize("pair, cls, jug", [
    ((8, 13), "Fibonacci", 1), ((13, 8), "Fibonacci", 1), ((1, 1), "Fibonacci", 1),
    ((4, 7), "Lucas <1,3>", 1), ((3, 4), "Lucas <1,3>", 1), ((11, 18), "Lucas <1,3>", 1),
    ((4, 6), "bijugate Fibonacci", 2), ((10, 16), "bijugate Fibonacci", 2),
    ((5, 9), "accessory <1,4>", 1), ((2, 5), "<2,5>", 1), ((9, 15), "trijugate Fibonacci", 3),
    ((8, 14), "bijugate Lucas <1,3>", 2),
])
def test_classify_pair(pair, cls, jug):
    out = classify_pair(*pair)
    assert out["class"] == cls and out["jugacy"] == jug


def _nearest_pair_brute_force(x, y, n0, idx):
    """Index differences of the contact neighbours of point n0, straight from the distances:
    the nearest point, and the nearest one whose index difference differs from it."""
    i0 = int(np.flatnonzero(idx == n0)[0])
    dist = np.hypot(x - x[i0], y - y[i0])
    dist[i0] = np.inf
    order = np.argsort(dist)
    first = abs(int(idx[order[0]]) - n0)
    second = next(abs(int(idx[j]) - n0) for j in order[1:] if abs(int(idx[j]) - n0) != first)
    return tuple(sorted((first, second)))


@pytest.mark.parametrize("n0, expected", [(50, (13, 21)), (100, (21, 34)), (300, (34, 55))])
def test_vogel_lattice_contact_pairs(n0, expected):
    # Vogel 1979 (Math. Biosci. 44): r_n = c√n, θ_n = n·golden angle; contact neighbours of
    # point n are Fibonacci index differences that rise with n
    n = np.arange(1, 700)
    r = 2.0 * np.sqrt(n)
    th = n * GOLDEN_ANGLE_DEG
    x, y = r * np.cos(np.deg2rad(th)), r * np.sin(np.deg2rad(th))
    derived = _nearest_pair_brute_force(x, y, n0, n)
    assert derived == expected
    assert all(v in FIB for v in derived)
    # a continuum estimate of the same thing (our derivation, no source): the best index step
    # F balances radial gap F/(2√n)·c against angular gap 2π√n·c/(√5 F): F ≈ (4πn/√5)^½
    f_est = math.sqrt(4 * math.pi * n0 / math.sqrt(5))
    assert derived[0] < f_est < derived[1]
    near = (n > 0.9 * n0) & (n < 1.1 * n0)
    for metric in ("euclidean", "log"):
        res = contact_parastichies(r, th, n, metric=metric, where=near)
        assert res["pair"] == derived, metric
        assert res["support"] > 0.9


def test_vogel_pair_with_jitter():
    rng = np.random.default_rng(0)
    n = np.arange(1, 250)
    r = np.sqrt(n) * (1 + 0.01 * rng.normal(size=n.size))
    th = n * GOLDEN_ANGLE_DEG + rng.normal(0, 1.0, n.size)
    res = contact_parastichies(r, th, n, metric="euclidean", where=(n > 90) & (n < 110))
    assert res["pair"] == (21, 34)


def _orthogonal_h(m, n, d):
    dm, dn = m * d - round(m * d), n * d - round(n * d)
    return math.sqrt(-dm * dn / (m * n)), dm, dn


@pytest.mark.parametrize("m, n, h_published", [(2, 3, 0.075765), (3, 5, 0.029615), (5, 8, 0.011208)])
def test_van_iterson_orthogonal_lattices(m, n, h_published):
    # Van Iterson 1907 cylindrical lattice: point j at (frac(j·d), j·h); with golden d the pair
    # (m, n) is orthogonal when h² = −δm·δn/(m·n), δm = m·d − round(m·d)
    d = 2 - PHI
    h, dm, dn = _orthogonal_h(m, n, d)
    assert h == pytest.approx(h_published, abs=1e-6)
    assert dm * dn + m * n * h * h == pytest.approx(0.0, abs=1e-15)  # vectors (δ, m h) ⊥ (δ, n h)
    j = np.arange(400)
    for factor in (1.0, 0.85, 1.15):
        res = lattice_contact_pair((j * d) % 1.0, j * h * factor, j)
        assert res["pair"] == (m, n), factor
        assert res["support"] > 0.95
    # the same lattice mapped conformally to the plane (r = exp(−2π v), θ = 360 u) gives the
    # same pair in the (ln r, θ) metric
    res = contact_parastichies(np.exp(-2 * math.pi * j * h), 360 * ((j * d) % 1.0), j, metric="log")
    assert res["pair"] == (m, n)
    # and every point lies on spiral (rank mod m) of family m
    assert set(res["spiral_index"][m]) == set(range(m))


def test_bijugate_lattice_with_nodes():
    # pairs of organs 180° apart, successive pairs turned by golden/2: a bijugate pattern has
    # parastichy numbers 2×Fibonacci
    nodes = np.arange(60)
    th = np.concatenate([nodes * GOLDEN_ANGLE_DEG / 2, nodes * GOLDEN_ANGLE_DEG / 2 + 180])
    rank = np.concatenate([2 * nodes + 1, 2 * nodes + 2])
    node = np.concatenate([nodes, nodes])
    for h, pair in [(0.03, (4, 6)), (0.012, (6, 10))]:
        r = np.exp(-2 * math.pi * h * node)
        res = contact_parastichies(r, th, rank, node=node)
        assert res["pair"] == pair and res["jugacy"] == 2
        cls = classify_pair(*res["pair"])
        assert cls["class"] == "bijugate Fibonacci"
        assert cls["limit_angle_deg"] == pytest.approx(GOLDEN_ANGLE_DEG / 2)
        # the traced spirals of each family are as many as its parastichy number
        for num in pair:
            assert len(set(res["spiral_index"][num])) == num
        table = parastichy_table(rank, res, frame=3)
        assert len(table) == 2 * rank.size and set(table["frame"]) == {3}


def test_too_few_points():
    res = contact_parastichies([1.0, 2.0], [0.0, 137.5], [1, 2])
    assert res["pair"] is None and "at least 3" in res["reason"]
    assert len(parastichy_table([1, 2], res)) == 0
    with pytest.raises(ValueError):
        contact_parastichies([1.0, 2.0, 3.0], [0, 1, 2], [1, 2, 3], metric="manhattan")
