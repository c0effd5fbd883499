"""The fast searches of the link stage against general-purpose references.

The motion fit finds its growth and rotation rate λ = γ + iω by damped Newton steps on the
exact derivatives of the profiled residual (:meth:`apextrack.link._ProfiledSolver.minimise`);
the reference is scipy's Nelder–Mead search (``scipy.optimize.minimize``), which needs only the
residual, from the same three starts. :func:`apextrack.apex.centre_from_tracks` eliminates the
per-track offsets for each γ; the reference is ``numpy.linalg.lstsq`` of the whole design.

The scenes are generated apices of our own: primordia born one plastochron apart at the
golden angle on a rim, drifting outward as r = R·exp(γ(t − τ)) (Richards 1951), in an image that
turns and drifts, with Gaussian position noise.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from apextrack.apex import centre_from_tracks
from apextrack.link import _ProfiledSolver, fit_motion

GOLDEN_RAD = math.pi * (3.0 - math.sqrt(5.0))
#: relative radial growth rate of the scenes: a plastochron ratio (as Richards 1951 defines it) of
#: 1.12 per 6 h plastochron, a value of our own scenario
GAMMA = math.log(1.12) / 6.0


def generated_apex(n_primordia=12, n_frames=10, interval_h=3.0, plastochron_h=6.0, rim_um=20.0,
                   gamma=GAMMA, turn_deg_per_frame=0.0, drift_um_per_frame=(0.0, 0.0),
                   noise_um=0.1, seed=0):
    """Detections (``track_id``, ``frame``, ``time_h``, ``x_um``, ``y_um``) of a generated apex:
    ``n_primordia`` born at the golden angle, the oldest before the first frame; only those
    seen in three frames or more."""
    rng = np.random.default_rng(seed)
    rows = []
    for f in range(n_frames):
        t = f * interval_h
        centre = complex(50.0 + f * drift_um_per_frame[0], 50.0 + f * drift_um_per_frame[1])
        turn = math.radians(turn_deg_per_frame) * f
        for k in range(n_primordia):
            born = (k - n_primordia // 2) * plastochron_h
            if born > t:
                continue
            z = centre + rim_um * math.exp(gamma * (t - born)) * np.exp(1j * (k * GOLDEN_RAD + turn))
            rows.append((k, f, t, z.real + rng.normal(0, noise_um), z.imag + rng.normal(0, noise_um)))
    det = pd.DataFrame(rows, columns=["track_id", "frame", "time_h", "x_um", "y_um"])
    # primordia born in the last frames are left out: the motion fit needs three sightings
    return det[det.groupby("track_id")["frame"].transform("size") >= 3].reset_index(drop=True)


def _solver(det, smooth=0.2):
    """The profiled solver of ``fit_motion`` for all detections (no outliers left out)."""
    frames = np.sort(det["frame"].unique())
    times = det.groupby("frame")["time_h"].first().reindex(frames).to_numpy(float)
    tid = pd.factorize(det["track_id"], sort=True)[0]
    z = det["x_um"].to_numpy(float) + 1j * det["y_um"].to_numpy(float)
    solver = _ProfiledSolver(det["time_h"].to_numpy(float), z, np.searchsorted(frames, det["frame"].to_numpy()),
                             tid, len(frames), int(tid.max()) + 1, float(times.mean()), smooth)
    return solver, float(np.median(np.diff(times))), float(times[-1] - times[0])


def _nelder_mead(solver, dt, span, bound=1.0):
    """Reference: scipy's Nelder–Mead on the profiled SSE from the three starts of fit_motion,
    with tight tolerances; the least residual kept."""
    from scipy.optimize import minimize

    def sse(p):
        return solver(p[0], p[1])[1] if max(abs(p[0]), abs(p[1])) <= bound else 1e300

    runs = [minimize(sse, x0=[math.log(g) / dt, 0.0], method="Nelder-Mead",
                     options={"xatol": 1e-8 / span, "fatol": 1e-12, "maxiter": 2000}) for g in (1.01, 1.04, 1.10)]
    best = min(runs, key=lambda r: r.fun)
    return complex(best.x[0], best.x[1]), float(best.fun)


SCENES = {
    "slow turn, drift": {"turn_deg_per_frame": 2.0, "drift_um_per_frame": (0.4, -0.3), "seed": 1},
    "fast turn": {"turn_deg_per_frame": 15.0, "drift_um_per_frame": (0.5, 0.3), "n_frames": 8, "seed": 2},
    "fast growth, turning back": {"gamma": math.log(1.5) / 6.0, "turn_deg_per_frame": -8.0, "n_primordia": 10,
                                  "seed": 3},
    "long record": {"n_primordia": 24, "n_frames": 30, "interval_h": 2.0, "noise_um": 0.2, "seed": 4},
}


@pytest.mark.parametrize("scene", sorted(SCENES))
def test_motion_fit_reaches_the_nelder_mead_minimum(scene):
    det = generated_apex(**SCENES[scene])
    solver, dt, span = _solver(det)
    ref, ref_sse = _nelder_mead(solver, dt, span)
    # without the rim, fit_motion returns λ of its Newton search (nothing is left out here)
    m = fit_motion(det, rim=False)
    lam = complex(m.gamma_per_h, m.omega_rad_per_h)
    assert abs(lam - ref) <= 1e-7 * abs(ref)
    # the Newton search ends at least as low as Nelder–Mead (up to the rounding of the SSE) …
    sse, grad, hess = solver.derivatives(lam.real, lam.imag)
    assert sse <= ref_sse * (1 + 1e-12)
    # … and closer to the stationary point: its gradient is the smaller
    assert np.linalg.norm(grad) <= np.linalg.norm(solver.derivatives(ref.real, ref.imag)[1])
    assert np.all(np.linalg.eigvalsh(hess) > 0)


def test_profiled_derivatives_match_numerical_ones():
    # reference: scipy.differentiate (adaptive finite differences) of the SSE of __call__
    from scipy.differentiate import hessian, jacobian

    det = generated_apex(turn_deg_per_frame=5.0, drift_um_per_frame=(0.3, 0.2), noise_um=0.3, seed=5)
    solver, _, _ = _solver(det)

    def sse(p):
        return np.apply_along_axis(lambda q: solver(q[0], q[1])[1], 0, p)

    for p in ([0.019, 0.0], [0.03, -0.02], [0.01, 0.05]):
        p = np.array(p)
        s, grad, hess = solver.derivatives(*p)
        assert s == pytest.approx(solver(*p)[1], rel=1e-12)
        np.testing.assert_allclose(grad, jacobian(sse, p).df, rtol=1e-6, atol=1e-6 * np.max(np.abs(grad)))
        np.testing.assert_allclose(hess, hessian(sse, p).ddf, rtol=1e-5, atol=1e-5 * np.max(np.abs(hess)))


def test_newton_search_stays_in_bounds_and_refits_from_a_start():
    det = generated_apex(turn_deg_per_frame=2.0, seed=6)
    solver, dt, span = _solver(det)
    gamma, omega, s = solver.minimise(math.log(1.04) / dt, 0.0, 1.0, span)
    # a refit from the optimum stays there; a search bounded below the optimum stops inside
    g2, w2, _ = solver.minimise(gamma, omega, 1.0, span)
    assert abs(complex(g2, w2) - complex(gamma, omega)) <= 1e-12 * abs(complex(gamma, omega))
    g3, w3, s3 = solver.minimise(0.5 * gamma, 0.0, 0.5 * gamma, span)
    assert abs(g3) <= 0.5 * gamma and abs(w3) <= 0.5 * gamma
    assert s3 > s


def _centre_reference(tracks, min_frames=3, drift=True, max_rate_per_h=1.0):
    """Reference: numpy.linalg.lstsq of the whole design (centre, drift, one offset column per
    track) for every γ of the same bounded search."""
    from scipy.optimize import minimize_scalar

    groups = [g for _, g in tracks.groupby("track_id", sort=True) if g["time_h"].nunique() >= min_frames]
    tid = np.concatenate([np.full(len(g), i) for i, g in enumerate(groups)])
    t = np.concatenate([g["time_h"].to_numpy(float) for g in groups])
    xy = np.concatenate([g[["x_um", "y_um"]].to_numpy(float) for g in groups])
    n, t_mid = len(groups), float(np.mean(t))

    def solve(gamma):
        per_track = np.zeros((len(t), n))
        per_track[np.arange(len(t)), tid] = np.exp(gamma * (t - t_mid))
        a = np.hstack([np.column_stack([np.ones_like(t), t][: 2 if drift else 1]), per_track])
        coef = np.linalg.lstsq(a, xy, rcond=None)[0]
        return coef, float(((xy - a @ coef) ** 2).sum())

    gamma = float(minimize_scalar(lambda g: solve(g)[1], bounds=(1e-5, max_rate_per_h), method="bounded",
                                  options={"xatol": 1e-7}).x)
    coef, sse = solve(gamma)
    k = 2 if drift else 1
    return {"x_um": coef[0, 0], "y_um": coef[0, 1], "drift_x_um_per_h": coef[1, 0] if drift else 0.0,
            "drift_y_um_per_h": coef[1, 1] if drift else 0.0, "growth_rate_per_h": gamma,
            "rms_um": math.sqrt(sse / max(len(t) - k - n, 1)), "n_tracks": n}


@pytest.mark.parametrize("drift", [True, False])
def test_centre_from_tracks_matches_the_dense_design(drift):
    det = generated_apex(n_primordia=14, turn_deg_per_frame=0.0, drift_um_per_frame=(0.3, -0.2), noise_um=0.3,
                         seed=7)
    # scrambled rows, gaps in the ids, and one track seen at two times only (left out)
    det["track_id"] = det["track_id"] * 3 + 5
    short = det["track_id"] == det["track_id"].min()
    det = det[~short | (det["frame"] < 2)]
    det = det.sample(frac=1.0, random_state=1).reset_index(drop=True)
    got = centre_from_tracks(det, drift=drift)
    ref = _centre_reference(det, drift=drift)
    assert got.keys() == ref.keys()
    assert got["n_tracks"] == ref["n_tracks"] == det["track_id"].nunique() - 1
    for key, value in ref.items():
        assert got[key] == pytest.approx(value, rel=1e-9, abs=1e-9), key
