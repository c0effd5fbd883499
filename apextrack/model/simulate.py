"""Inhibitory-field simulation of primordium initiation, in the manner of Douady & Couder.

Douady & Couder (1992, Phys. Rev. Lett. 68; 1996, J. Theor. Biol. 178): primordia are born on the
rim circle of an apex of radius ``R`` and drift outward at a fixed azimuth as ``r(t) = R·exp(γ·age)``.
Every existing primordium inhibits initiation around it; the inhibition felt at a rim point is

    E(φ, t) = Σ_i k(d_i),   with k(d) = (ℓ / d)^s            (power kernel, s = 3 by default)
                               or  k(d) = exp(s·(1 − d/ℓ))    (exponential kernel)

where ``d_i`` is the distance from the rim point to primordium ``i`` and ``ℓ`` is the *inhibition
range* (the distance at which one primordium alone inhibits exactly at threshold; both kernels
equal 1 there and fall with log-slope −s). A new primordium forms where ``E`` is lowest, as soon
as that minimum falls to the threshold (1 by default). Time scales as ``1/γ``, so the pattern is
set by the single dimensionless ratio ``ℓ / R``: distichous (180°) at a large inhibition range,
Fibonacci spirals (→ 137.5°) as it shrinks — the plastochron and the plastochron ratio emerge.

Implementation: the rim is sampled at ``rim_points`` angles (the minimum is refined by a parabola
through the three lowest samples); the next birth time solves ``ln E_min(t) = ln threshold`` by
Newton steps (the time derivative of E is analytic) inside a bisection bracket; only primordia
whose inhibition can still matter are kept in the active set. Two or more separate rim sites that
reach the threshold at the same time are born together (co-initiated), which gives decussate and
whorled patterns from symmetric initial conditions.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

import numpy as np
import pandas as pd

from ..errors import SettingsError
from .growth import history_from_births

#: Limit angle of the ⟨1, t⟩ sequence 1, t, t+1, 2t+1, … : 360 / (t + 1/φ).
from ..constants import PHI


def limit_angle_deg(t: int) -> float:
    """Limit divergence angle of the main sequence ⟨1, t⟩: ``360 / (t + 1/φ)`` degrees.

    t = 2 gives the golden angle 137.51°, t = 3 the Lucas angle 99.50°, t = 4 gives 77.96°.
    """
    return 360.0 / (t + 1.0 / PHI)


LUCAS_ANGLE_DEG = limit_angle_deg(3)


@dataclass(frozen=True)
class ModelParams:
    """Parameters of the inhibitory-field model, in physical words.

    Attributes
    ----------
    apex_radius_um : float
        Radius R of the rim circle where primordia are born (µm).
    inhibition_range_um : float
        Range ℓ of the inhibition: one primordium at distance ℓ inhibits exactly at threshold (µm).
    growth_rate_per_h : float
        Relative radial drift rate γ (1/h): r = R·exp(γ·age). Sets the time scale only.
    threshold : float
        Inhibition level below which a primordium forms (dimensionless; 1 = one primordium at ℓ).
    exponent : float
        Steepness s of the kernel.
    kernel : {"power", "exp"}
        ``(ℓ/d)^s`` or ``exp(s·(1 − d/ℓ))``.
    start_range_um : float or None
        Inhibition range at the start; it moves geometrically to ``inhibition_range_um`` over
        the first ``ramp_primordia`` births (a slowly enlarging apex, as in a seedling). None: no
        ramp.
    ramp_primordia : int
        Length of that ramp, in births.
    angle_noise_deg : float
        SD of Gaussian noise added to each new primordium's azimuth.
    threshold_noise : float
        SD of log-normal noise on the threshold at each birth.
    co_initiation_tol : float
        Relative tolerance under which two separate rim sites reaching threshold are born together.
    rim_points : int
        Samples of the rim circle.
    """

    apex_radius_um: float = 22.0
    inhibition_range_um: float = 11.0
    growth_rate_per_h: float = math.log(1.12) / 6.0
    threshold: float = 1.0
    exponent: float = 3.0
    kernel: str = "power"
    start_range_um: float | None = None
    ramp_primordia: int = 40
    angle_noise_deg: float = 0.0
    threshold_noise: float = 0.0
    co_initiation_tol: float = 1e-6
    rim_points: int = 120

    def __post_init__(self):
        for name in ("apex_radius_um", "inhibition_range_um", "growth_rate_per_h", "threshold", "exponent"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise SettingsError(f"model parameter '{name}' must be a number greater than 0, not {v!r}")
        if self.kernel not in ("power", "exp"):
            raise SettingsError(f"model parameter 'kernel' must be 'power' or 'exp', not {self.kernel!r}")
        if self.start_range_um is not None and not (self.start_range_um > 0):
            raise SettingsError("model parameter 'start_range_um' must be greater than 0")
        if int(self.rim_points) < 16:
            raise SettingsError("model parameter 'rim_points' must be at least 16")
        for name in ("angle_noise_deg", "threshold_noise", "co_initiation_tol"):
            if not (getattr(self, name) >= 0):
                raise SettingsError(f"model parameter '{name}' must be 0 or more")
        if int(self.ramp_primordia) < 1:
            raise SettingsError("model parameter 'ramp_primordia' must be at least 1")

    @property
    def range_ratio(self) -> float:
        """The control parameter ℓ / R."""
        return self.inhibition_range_um / self.apex_radius_um

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict | None) -> "ModelParams":
        """Parameters from a dict; unknown keys raise SettingsError naming the key."""
        d = dict(d or {})
        known = {f.name for f in fields(cls)}
        unknown = [k for k in d if k not in known]
        if unknown:
            raise SettingsError(f"unknown model parameter(s) {', '.join(map(str, unknown))}",
                                hint=f"known: {', '.join(sorted(known))}")
        if "range_ratio" in d:
            raise SettingsError("give inhibition_range_um, not range_ratio")
        return cls(**d)


@dataclass
class Simulation:
    """A simulated history and the parameters that made it.

    ``history`` has one row per primordium: ``birth_rank, primordium, birth_time_h, theta_deg,
    co_initiated, group`` (see :mod:`apextrack.model.growth`), plus ``inhibition_range_um`` at
    that birth and ``initial`` (True for the primordia of the initial condition).
    """

    history: pd.DataFrame
    params: ModelParams
    initial: str
    seed: int
    n_evaluations: int = 0

    @property
    def plastochron_h(self) -> float:
        """Mean time between successive birth groups after the initial condition."""
        t = np.unique(self.history.loc[~self.history["initial"], "birth_time_h"].to_numpy())
        return float(np.mean(np.diff(t))) if t.size > 1 else math.nan


class _Field:
    """Inhibition on the rim at time t from the active primordia (vectorised over rim × primordia)."""

    def __init__(self, p: ModelParams, max_primordia: int):
        self.R = p.apex_radius_um
        self.g = p.growth_rate_per_h
        self.s = p.exponent
        self.power = p.kernel == "power"
        self.d2_floor = (1e-6 * p.apex_radius_um) ** 2
        m = int(p.rim_points)
        self.step = 2 * np.pi / m
        self.phi = np.arange(m) * self.step
        self.cs = np.stack([np.cos(self.phi), np.sin(self.phi)], axis=1)  # (M, 2)
        self.tb = np.empty(max_primordia)
        self.cth = np.empty((2, max_primordia))
        self.n = 0
        self.first_active = 0
        self.evals = 0

    def add(self, t, theta):
        i = self.n
        self.tb[i] = t
        self.cth[:, i] = (math.cos(theta), math.sin(theta))
        self.n += 1

    def prune(self, t, ell, thr):
        """Drop from the active set primordia (oldest first) whose inhibition is negligible
        (below 1e-5 × threshold each)."""
        lim = 1e-5 * thr
        if self.power:
            dmax = ell * lim ** (-1.0 / self.s)
        else:
            dmax = ell * (1.0 - math.log(lim) / self.s)
        while self.first_active < self.n - 1:
            r = self.R * math.exp(self.g * (t - self.tb[self.first_active]))
            if r - self.R > dmax:
                self.first_active += 1
            else:
                break

    def at(self, t, ell, phis, deriv=False):
        """Inhibition at rim angles ``phis`` (radians), and its time derivative when asked."""
        a, b = self.first_active, self.n
        r = self.R * np.exp(self.g * (t - self.tb[a:b]))
        phis = np.atleast_1d(np.asarray(phis, dtype=float))
        cosd = np.cos(phis)[:, None] * self.cth[0, a:b] + np.sin(phis)[:, None] * self.cth[1, a:b]
        d2 = np.maximum(self.R * self.R + r * r - 2.0 * self.R * r * cosd, self.d2_floor)
        self.evals += 1
        if self.power:
            q = (ell * ell) / d2
            k = q ** (0.5 * self.s) if self.s != 3.0 else q * np.sqrt(q)
            if not deriv:
                return k.sum(axis=1)
            # dk/dt = −(s/2)·k/d² · d(d²)/dt,  d(d²)/dt = (2r − 2R cos Δ)·γ r
            dd2 = (2.0 * r - 2.0 * self.R * cosd) * (self.g * r)
            return k.sum(axis=1), (-0.5 * self.s * k / d2 * dd2).sum(axis=1)
        d = np.sqrt(d2)
        k = np.exp(self.s * (1.0 - d / ell))
        if not deriv:
            return k.sum(axis=1)
        dd = (r - self.R * cosd) * (self.g * r) / d
        return k.sum(axis=1), (-self.s / ell * k * dd).sum(axis=1)

    def local(self, t, ell, phi):
        """E, ∂E/∂φ, ∂²E/∂φ² and ∂E/∂t at one rim angle ``phi`` (radians), analytically."""
        a, b = self.first_active, self.n
        r = self.R * np.exp(self.g * (t - self.tb[a:b]))
        c, s_ = math.cos(phi), math.sin(phi)
        cosd = c * self.cth[0, a:b] + s_ * self.cth[1, a:b]
        sind = s_ * self.cth[0, a:b] - c * self.cth[1, a:b]
        two_rr = 2.0 * self.R * r
        u = np.maximum(self.R * self.R + r * r - two_rr * cosd, self.d2_floor)
        u_p = two_rr * sind
        u_pp = two_rr * cosd
        u_t = (2.0 * r - 2.0 * self.R * cosd) * (self.g * r)
        self.evals += 1
        if self.power:
            q = (ell * ell) / u
            k = q ** (0.5 * self.s) if self.s != 3.0 else q * np.sqrt(q)
            a1 = -0.5 * self.s / u
            a2 = 0.5 * self.s * (0.5 * self.s + 1.0) / (u * u)
        else:
            d = np.sqrt(u)
            k = np.exp(self.s * (1.0 - d / ell))
            a1 = -self.s / (2.0 * ell * d)
            a2 = a1 * a1 + self.s / (4.0 * ell * d * u)
        ka1 = k * a1
        return (float(k.sum()), float((ka1 * u_p).sum()),
                float((k * a2 * u_p * u_p + ka1 * u_pp).sum()), float((ka1 * u_t).sum()))

    def energy(self, t, ell, a=None, b=None):
        """Inhibition at every rim sample from the active primordia (or from primordia a..b−1),
        computed in place: d² = R² + r² − 2Rr·cos Δ."""
        a = self.first_active if a is None else a
        b = self.n if b is None else b
        r = self.R * np.exp(self.g * (t - self.tb[a:b]))
        self.evals += 1
        w = self.cs @ (self.cth[:, a:b] * (-2.0 * self.R * r))
        w += self.R * self.R + r * r
        np.maximum(w, self.d2_floor, out=w)
        if self.power:
            np.divide(ell * ell, w, out=w)
            if self.s == 3.0:
                k = np.sqrt(w)
                k *= w
            else:
                k = np.power(w, 0.5 * self.s, out=w)
        else:
            k = np.sqrt(w, out=w)
            k *= -self.s / ell
            k += self.s
            np.exp(k, out=k)
        return k.sum(axis=1)


def _grid_parabola(step, e, k):
    """Sub-sample angle of the minimum of a periodic sampled curve around sample k."""
    m = e.size
    em, e0, ep = e[(k - 1) % m], e[k], e[(k + 1) % m]
    den = em - 2.0 * e0 + ep
    off = 0.5 * (em - ep) / den if den > 0 else 0.0
    return (k + max(-0.5, min(0.5, off))) * step


def _refine(fld: _Field, t, ell, phi, iters: int = 8):
    """Newton steps in angle to the local minimum of the inhibition near ``phi`` at time t."""
    h = fld.step
    for _ in range(iters):
        e, ep, epp, _ = fld.local(t, ell, phi)
        dphi = -ep / epp if epp > 0 else -math.copysign(0.25 * h, ep)
        dphi = max(-h, min(h, dphi))
        phi += dphi
        if abs(dphi) < 1e-11:
            break
    return phi


def _local_minima(e, level):
    """Indices of the local minima of a periodic sampled curve at or below ``level``."""
    m = e.size
    idx = np.nonzero(e <= level)[0]
    return [int(i) for i in idx if e[i] <= e[(i - 1) % m] and e[i] < e[(i + 1) % m]]


def _joint_newton(fld: _Field, t, phi, lo, hi, ell, lthr, gamma):
    """Time and angle at which a local minimum of the rim inhibition reaches the threshold:
    Newton steps on ln E(φ, t) = ln threshold in t and on ∂E/∂φ = 0 in φ, with t kept inside
    the bracket [lo, hi] (hi may be infinite)."""
    h = fld.step
    for _ in range(100):
        e, ep, epp, et = fld.local(t, ell, phi)
        gval = math.log(e) - lthr
        dphi = -ep / epp if epp > 0 else -math.copysign(0.25 * h, ep)
        dphi = max(-h, min(h, dphi))
        if gval > 0 and abs(dphi) < 1e-9:
            lo = max(lo, t)  # E above threshold at the minimum itself: not yet crossed
        elif gval < 0:  # E below threshold anywhere: the minimum crossed already
            hi = min(hi, t)
        if abs(gval) < 1e-11 and abs(dphi) < 1e-9:
            break
        phi += dphi
        slope = et / e
        t_next = t - gval / slope if slope < 0 else math.nan
        if abs(gval) < 1e-7 and abs(dphi) < 1e-6 and lo <= t_next <= hi:
            # quadratic convergence: the error after this step is of the order of its square
            t = t_next
            break
        if not (lo <= t_next <= hi) or not math.isfinite(t_next):
            t_next = 0.5 * (lo + hi) if math.isfinite(hi) else lo + 1.0 / gamma
        if math.isfinite(hi) and hi - lo <= 1e-13 * (1.0 + abs(hi)) and abs(dphi) < 1e-9:
            t = t_next
            break
        t = t_next
    return t, phi


def _next_birth(fld: _Field, t_now: float, ell: float, thr: float, e0: np.ndarray, guess_dt: float,
                gamma: float):
    """Earliest time after ``t_now`` at which the lowest inhibition on the rim falls to the
    threshold. Returns (time, angle of that minimum, rim inhibition at that time).

    A second look at ``t_now + guess_dt`` brackets the crossing; every rim sample's crossing is
    predicted by log-linear interpolation, and the earliest one's local minimum is followed by
    Newton steps to its exact crossing. The whole rim is then checked at that time: if another
    site is already below threshold it crossed earlier, and the search restarts there with this
    time as an upper bound."""
    lthr = math.log(thr)
    lo, hi = t_now, math.inf
    t1 = t_now + guess_dt
    e1 = fld.energy(t1, ell)
    if e1.min() > thr:
        # the grid says "not yet" at t1, but the minimum between samples may be a little lower,
        # so t1 is a starting point, not a bound
        k = int(np.argmin(e1))
        t_start = t1
    else:
        hi = t1
        l0, l1 = np.log(e0), np.log(e1)
        with np.errstate(divide="ignore", invalid="ignore"):
            frac = np.where(l1 <= lthr, (l0 - lthr) / (l0 - l1), np.inf)
        k = int(np.argmin(frac))
        t_start = t_now + min(max(float(frac[k]), 0.0), 1.0) * guess_dt
    phi_start = _grid_parabola(fld.step, e1, k)
    for _ in range(50):
        t, phi = _joint_newton(fld, t_start, phi_start, lo, hi, ell, lthr, gamma)
        e = fld.energy(t, ell)
        far = np.abs((fld.phi - phi + np.pi) % (2 * np.pi) - np.pi) > 1.5 * fld.step
        below = np.nonzero(far & (e < thr * (1.0 - 1e-9)))[0]
        if below.size == 0:
            return t, phi, e
        hi = t
        k = int(below[np.argmin(e[below])])
        t_start = t
        phi_start = _grid_parabola(fld.step, e, k)
    return t, phi, e


def initial_condition(kind, p: ModelParams, given=None) -> tuple[list[float], list[float]]:
    """Birth times (h) and azimuths (degrees) of the initial primordia.

    ``kind``: ``"one"`` (a single primordium at 0°, born at t = 0), ``"two"`` (two opposite
    primordia born together), ``"three"`` (a whorl of three), ``"given"`` (``given`` is a
    DataFrame or dict with ``birth_time_h`` and ``theta_deg``, times ≤ 0).
    """
    if kind == "one":
        return [0.0], [0.0]
    if kind == "two":
        return [0.0, 0.0], [0.0, 180.0]
    if kind == "three":
        return [0.0, 0.0, 0.0], [0.0, 120.0, 240.0]
    if kind == "given":
        if given is None:
            raise SettingsError("initial condition 'given' needs a table of birth_time_h and theta_deg")
        g = pd.DataFrame(given)
        if not {"birth_time_h", "theta_deg"} <= set(g.columns) or len(g) == 0:
            raise SettingsError("the given initial primordia need columns birth_time_h and theta_deg")
        g = g.sort_values("birth_time_h", kind="stable")
        return g["birth_time_h"].astype(float).tolist(), g["theta_deg"].astype(float).tolist()
    raise SettingsError(f"unknown initial condition {kind!r}", hint="one of: one, two, three, given")


def spiral_initial(n: int, divergence_deg: float, p: ModelParams, plastochron_ratio: float = 1.1,
                   jugacy: int = 1) -> pd.DataFrame:
    """``n`` initial primordia (groups) on a regular pattern ending at t = 0: successive groups
    ``divergence_deg`` apart, with the radial spacing of ``plastochron_ratio``."""
    T = math.log(plastochron_ratio) / p.growth_rate_per_h
    k = np.arange(n)
    t = np.repeat((k - (n - 1)) * T, jugacy)
    th = np.repeat(k * divergence_deg, jugacy) + np.tile(np.arange(jugacy) * 360.0 / jugacy, n)
    return pd.DataFrame({"birth_time_h": t, "theta_deg": np.mod(th, 360.0)})


def simulate(n_primordia: int = 200, params: ModelParams | dict | None = None, initial: str = "one",
             given=None, seed: int = 0) -> Simulation:
    """Run the inhibitory-field model until at least ``n_primordia`` primordia exist.

    Parameters
    ----------
    n_primordia : int
        Total number of primordia (including the initial ones); the last birth group (pair,
        whorl) is always complete, so a few more may be born.
    params : ModelParams or dict, optional
        Model parameters (defaults: :class:`ModelParams`).
    initial : {"one", "two", "three", "given"}
        Initial condition (see :func:`initial_condition`).
    given : DataFrame or dict, optional
        Initial primordia for ``initial="given"``.
    seed : int
        Seed of the noise (angle and threshold noise); the same seed gives the same history.

    Returns
    -------
    Simulation

    Examples
    --------
    >>> sim = simulate(60, {"inhibition_range_um": 40.0})   # large range: distichous
    >>> round(float(divergence_angles(sim.history)[-10:].mean()))
    180
    """
    p = params if isinstance(params, ModelParams) else ModelParams.from_dict(params)
    rng = np.random.default_rng(seed)
    t0, th0 = initial_condition(initial, p, given)
    n_primordia = int(n_primordia)
    if n_primordia < len(t0):
        raise SettingsError(f"n_primordia ({n_primordia}) is smaller than the initial condition ({len(t0)})")
    fld = _Field(p, n_primordia + int(p.rim_points))
    for t, th in zip(t0, th0):
        fld.add(t, math.radians(th))
    times, thetas = list(t0), list(th0)
    ranges = [p.inhibition_range_um] * len(t0)
    group = [0] * len(t0)
    gid = 0
    t_now = max(t0)
    log_ramp = None
    if p.start_range_um is not None:
        log_ramp = (math.log(p.start_range_um), math.log(p.inhibition_range_um))
    born = len(t0)
    last_dt = 0.0
    e_prev, ell_prev, n_prev = None, None, 0
    while born < n_primordia:
        k_new = born - len(t0)
        if log_ramp is not None:
            u = min(1.0, k_new / float(p.ramp_primordia))
            ell = math.exp((1 - u) * log_ramp[0] + u * log_ramp[1])
        else:
            ell = p.inhibition_range_um
        thr = p.threshold * (math.exp(rng.normal(0.0, p.threshold_noise)) if p.threshold_noise > 0 else 1.0)
        fld.prune(t_now, ell, thr)
        if e_prev is not None and (ell == ell_prev or fld.power):
            # the rim inhibition at t_now is the last one computed plus the newborn primordia
            # (the power kernel scales as ℓ^s when the range changes); primordia just pruned
            # keep their negligible share, which only makes an immediate birth less likely
            e = e_prev * (ell / ell_prev) ** fld.s + fld.energy(t_now, ell, n_prev, fld.n)
        else:
            e = fld.energy(t_now, ell)
        k = int(np.argmin(e))
        if e[k] > thr:
            guess = last_dt if last_dt > 0 else 0.1 / p.growth_rate_per_h
            t_new, phi_first, e = _next_birth(fld, t_now, ell, thr, e, guess, p.growth_rate_per_h)
            last_dt, t_now = t_new - t_now, t_new
            level = float(e.min()) * (1.0 + p.co_initiation_tol)
        else:
            # already at or below threshold (after a change of range or threshold): born now
            phi_first = _refine(fld, t_now, ell, _grid_parabola(fld.step, e, k))
            level = float(e[k]) * (1.0 + p.co_initiation_tol)
        # every other separate rim site at the threshold at the same time is born too
        chosen = [phi_first]
        sep = min(0.5 * ell / p.apex_radius_um, 0.5 * np.pi)
        for c in sorted(_local_minima(e, level), key=lambda c: e[c]):
            phi_c = _grid_parabola(fld.step, e, c)
            if all(abs((phi_c - q + np.pi) % (2 * np.pi) - np.pi) > sep for q in chosen):
                chosen.append(_refine(fld, t_now, ell, phi_c))
        gid += 1
        e_prev, ell_prev, n_prev = e, ell, fld.n
        for phi_c in chosen:
            th = phi_c + (math.radians(rng.normal(0.0, p.angle_noise_deg)) if p.angle_noise_deg > 0 else 0.0)
            fld.add(t_now, th)
            times.append(t_now)
            thetas.append(math.degrees(th) % 360.0)
            ranges.append(ell)
            group.append(gid)
            born += 1
    co = pd.Series(times).duplicated(keep=False).to_numpy()
    hist = history_from_births(times, thetas, co)
    # carry the extra columns through the ranking (ranking is a stable sort on time)
    order = np.argsort(np.asarray(times), kind="stable")
    hist["inhibition_range_um"] = np.asarray(ranges)[order]
    hist["initial"] = np.arange(len(times))[order] < len(t0)
    return Simulation(history=hist, params=p, initial=initial, seed=seed, n_evaluations=fld.evals)


# --------------------------------------------------------------------------------------------
# statistics of a history
# --------------------------------------------------------------------------------------------

def signed_steps(history: pd.DataFrame) -> np.ndarray:
    """Successive azimuth differences in birth order, wrapped to (−180, 180]."""
    th = history.sort_values("birth_rank", kind="stable")["theta_deg"].to_numpy(float)
    d = np.diff(th)
    return (d + 180.0) % 360.0 - 180.0


def chirality(history: pd.DataFrame) -> str:
    """Direction of the generative spiral: ``"ccw"`` when most successive steps turn
    counter-clockwise (steps of exactly 180° count for neither; ties give ``"ccw"``)."""
    d = signed_steps(history)
    d = d[np.abs(np.abs(d) - 180.0) > 1e-6]
    return "cw" if (d < 0).sum() > (d > 0).sum() else "ccw"


def divergence_angles(history: pd.DataFrame, direction: str | None = None) -> np.ndarray:
    """Divergence angles between successive primordia (birth order), measured in the direction of
    the generative spiral, in [0, 360)."""
    direction = direction or chirality(history)
    th = history.sort_values("birth_rank", kind="stable")["theta_deg"].to_numpy(float)
    d = np.mod(np.diff(th), 360.0)
    return d if direction == "ccw" else np.mod(-d, 360.0)


def group_divergence(history: pd.DataFrame, direction: str | None = None) -> np.ndarray:
    """Divergence between successive birth *groups* (co-initiated primordia form one group):
    the smallest angle in the spiral direction from any member of a group to any member of the
    next; for single primordia this equals :func:`divergence_angles`."""
    direction = direction or chirality(history)
    h = history.sort_values("birth_rank", kind="stable")
    groups = [g["theta_deg"].to_numpy(float) for _, g in h.groupby("birth_time_h", sort=True)]
    out = []
    for a, b in zip(groups[:-1], groups[1:]):
        d = np.mod(b[None, :] - a[:, None], 360.0)
        if direction == "cw":
            d = np.mod(-d, 360.0)
        jug = max(len(a), len(b))
        out.append(float(np.min(np.mod(d, 360.0 / jug))) if jug > 1 else float(d.min()))
    return np.asarray(out)


def circular_mean_deg(a) -> float:
    a = np.radians(np.asarray(a, float))
    return float(np.degrees(np.arctan2(np.sin(a).mean(), np.cos(a).mean())) % 360.0)


def steady_state(angles, n_last: int = 50, tol_deg: float = 5.0) -> tuple[bool, float, float]:
    """Steady-state test of Refahi et al. 2016 (eLife 5:e14093): the last ``n_last`` angles all
    lie within ``tol_deg`` of their (circular) mean. Returns (steady, mean, largest deviation)."""
    a = np.asarray(angles, float)[-n_last:]
    if a.size == 0:
        return False, math.nan, math.nan
    m = circular_mean_deg(a)
    dev = np.abs((a - m + 180.0) % 360.0 - 180.0)
    return bool(a.size >= n_last and dev.max() <= tol_deg), m, float(dev.max())


def plastochron_ratio_of(history: pd.DataFrame, params: ModelParams, n_last: int = 50) -> float:
    """Mean plastochron ratio exp(γ·T) over the last ``n_last`` birth groups (Richards 1951)."""
    t = np.unique(history["birth_time_h"].to_numpy(float))[-(n_last + 1):]
    if t.size < 2:
        return math.nan
    return float(math.exp(params.growth_rate_per_h * np.mean(np.diff(t))))


def contact_parastichies(history: pd.DataFrame, params: ModelParams) -> tuple[int, int]:
    """Contact parastichy pair (m, n), m ≤ n, at the end of the simulation: the birth-rank
    differences from a primordium in the middle of the active set to its two nearest neighbours
    that lie on opposite sides (one turning each way), in the plane of the apex."""
    h = history.sort_values("birth_rank", kind="stable")
    t_end = h["birth_time_h"].max()
    r = params.apex_radius_um * np.exp(params.growth_rate_per_h * (t_end - h["birth_time_h"].to_numpy()))
    th = np.radians(h["theta_deg"].to_numpy())
    x, y = r * np.cos(th), r * np.sin(th)
    n = len(h)
    # a primordium well inside the pattern: about 3 apex radii out, not among the last births
    cand = np.nonzero(r <= 3.0 * params.apex_radius_um)[0]
    i = int(cand[0]) if cand.size else 0
    i = min(i, max(n - 40, 0)) if n > 60 else i
    d = np.hypot(x - x[i], y - y[i])
    d[i] = np.inf
    order = np.argsort(d, kind="stable")
    first = order[0]
    cross = lambda j: x[i] * (y[j] - y[i]) - y[i] * (x[j] - x[i])  # noqa: E731
    s0 = np.sign(cross(first))
    second = next((j for j in order[1:] if np.sign(cross(j)) != s0 and np.isfinite(d[j])), order[1])
    m1, m2 = sorted((abs(int(first) - i), abs(int(second) - i)))
    return m1, m2


def classify(history: pd.DataFrame, n_last: int = 50, tol_deg: float = 5.0) -> dict:
    """Pattern of the last ``n_last`` primordia.

    Returns a dict: ``pattern`` (``distichous``, ``spiral``, ``decussate``, ``whorled``,
    ``bijugate``, ``multijugate``, ``irregular``), ``jugacy`` (primordia per birth group),
    ``angle_deg`` (steady divergence between successive groups), ``steady`` and ``deviation_deg``.
    """
    h = history.sort_values("birth_rank", kind="stable")
    sizes = h.groupby("birth_time_h", sort=True).size().to_numpy()
    tail = sizes[-max(n_last // max(int(np.median(sizes[-n_last:])), 1), 3):]
    jug = int(np.median(tail))
    if jug == 1:
        ang = divergence_angles(h.iloc[-(n_last + 1):])
    else:
        ang = group_divergence(h.iloc[-(n_last * jug + jug):])
    n_need = min(n_last, max(ang.size, 1)) if jug > 1 else n_last
    steady, mean, dev = steady_state(ang, n_need, tol_deg)
    steady = steady and bool(np.all(tail == jug))
    if not steady:
        pattern = "irregular"
    elif jug == 1:
        pattern = "distichous" if abs(mean - 180.0) <= tol_deg else "spiral"
    elif abs(mean - 180.0 / jug) <= tol_deg:
        pattern = "decussate" if jug == 2 else "whorled"
    else:
        pattern = "bijugate" if jug == 2 else "multijugate"
    return {"pattern": pattern, "jugacy": jug, "angle_deg": mean, "steady": steady, "deviation_deg": dev}
