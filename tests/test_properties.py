"""Invariances of the geometry and statistics (property-based, hypothesis).

- Rotating the input by θ shifts every azimuth by θ and leaves divergence angles unchanged:
  exactly on the image (np.rot90 of a rendered stack, the whole pipeline), and for arbitrary θ
  on the points (tracks rotated about the apex centre, then everything after linking).
- A mirror image flips the chirality and keeps the angles (θ → 180° − θ).
- Rescaling time rescales the plastochron only.
- Angles never jump at the 0°/360° cut.
- Random valid tables round-trip through CSV exactly.

These follow from the definitions of azimuth and divergence angle (Euclidean geometry: a
rotation adds a constant to every azimuth, a reflection reverses their order; common practice,
no source). The circular mean is checked against ``scipy.stats.circmean`` (reference library).
Geometry for the point-level checks is generated here (a Vogel-like spiral of primordia drifting
outward as r = R·exp(γ(t − τ)), Richards 1951), not taken from data.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from apextrack import circular as circ
from apextrack.apex import azimuth_deg
from apextrack.pipeline import measure_tracks
from apextrack.settings import Settings
from apextrack.tables import SCHEMA, read_table, write_table

FAST = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def cdiff(a, b):
    """Signed smallest difference a − b in degrees (test's own, independent of apextrack)."""
    return (np.asarray(a, float) - np.asarray(b, float) + 180.0) % 360.0 - 180.0


# ----------------------------------------------------------------------------------------------
# image level: exact rotations and mirror of a rendered stack through the whole pipeline
# ----------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def rendered():
    from apextrack.model import make_synthetic_stack

    # square frames, so that np.rot90 keeps the shape; invented scene with exact truth
    return make_synthetic_stack(n_frames=8, shape_zyx=(4, 64, 64), pixel_size_um=1.2, seed=3)


def _analyse_array(synth, data, **settings_):
    from apextrack.pipeline import analyse
    from apextrack.stack import from_array

    stack = from_array(np.ascontiguousarray(data), synth.axes, pixel_size_um=synth.pixel_size_um,
                       interval_h=synth.interval_h, z_step_um=synth.z_step_um)
    opts = dict(bootstrap_n=100, register=False)
    opts.update(settings_)
    return analyse(stack, out=None, progress=False, write_report=False, settings=opts)


def _centre_of_rotation_um(synth):
    ny, nx = synth.data.shape[-2:]
    return ((nx - 1) / 2 * synth.pixel_size_um, (ny - 1) / 2 * synth.pixel_size_um)


@pytest.fixture(scope="module", params=["fitted", "user"])
def original(request, rendered):
    extra = {} if request.param == "fitted" else {"centre_um": _centre_of_rotation_um(rendered)}
    res = _analyse_array(rendered, rendered.data, **extra)
    assert len(res.primordia) >= 4, "the rendered stack must give several primordia"
    return request.param, extra, res


def _check_transformed(res0, res, expected_theta, chirality, tol_deg=0.01):
    # the pixel grid is turned exactly; what remains are ~0.01 µm differences of sub-pixel blob
    # positions (floating-point sums taken in another order), i.e. ~0.01° at the apex rim; a
    # fitted centre adds the iterative fit's own tolerance (a few hundredths of a degree)
    p0, p = res0.primordia, res.primordia
    assert len(p) == len(p0)
    assert np.abs(cdiff(p["theta_deg"], expected_theta(p0["theta_deg"].to_numpy(float)))).max() < tol_deg
    assert np.allclose(p["emergence_time_h"], p0["emergence_time_h"], atol=0.01 + tol_deg)
    d0, d = res0.divergence, res.divergence
    assert len(d) == len(d0) > 0
    assert np.abs(cdiff(d["angle_deg"], d0["angle_deg"])).max() < tol_deg
    assert res.summary["chirality"] == chirality


@pytest.mark.parametrize("k", [1, 2, 3])
def test_image_rotation_by_quarter_turns(k, rendered, original):
    centre, extra, res0 = original
    data = np.rot90(rendered.data, k, axes=(-2, -1))  # counter-clockwise as displayed
    if extra:  # the user's centre turns with the image (it is the centre of rotation)
        extra = {"centre_um": _centre_of_rotation_um(rendered)}
    res = _analyse_array(rendered, data, **extra)
    tol = 0.01 if extra else 0.1
    _check_transformed(res0, res, lambda th: th + 90.0 * k, res0.summary["chirality"], tol)


def test_image_mirror_flips_chirality_keeps_angles(rendered, original):
    _, extra, res0 = original
    res = _analyse_array(rendered, np.flip(rendered.data, axis=-1), **extra)
    flipped = {"ccw": "cw", "cw": "ccw"}[res0.summary["chirality"]]
    _check_transformed(res0, res, lambda th: 180.0 - th, flipped, 0.01 if extra else 0.1)


def test_image_rotation_with_registration(rendered):
    res0 = _analyse_array(rendered, rendered.data, register=True)
    res = _analyse_array(rendered, np.rot90(rendered.data, 1, axes=(-2, -1)), register=True)
    _check_transformed(res0, res, lambda th: th + 90.0, res0.summary["chirality"], 0.1)


# ----------------------------------------------------------------------------------------------
# point level: arbitrary rotation, mirror, time rescale
# ----------------------------------------------------------------------------------------------
CENTRE = (50.0, 40.0)


@st.composite
def spirals(draw):
    """Tracks of primordia born one per plastochron on a spiral, drifting outward."""
    n = draw(st.integers(5, 9))
    plastochron = draw(st.floats(2.0, 12.0))
    alpha = draw(st.floats(95.0, 170.0))  # away from 0° and 180°, where the direction is undefined
    sign = draw(st.sampled_from([1.0, -1.0]))
    theta0 = draw(st.floats(0.0, 360.0, exclude_max=True))
    ratio = draw(st.floats(1.05, 1.3))
    return dict(n=n, plastochron=plastochron, alpha=alpha, sign=sign, theta0=theta0, ratio=ratio)


def make_tracks(n, plastochron, alpha, sign, theta0, ratio, rim_um=20.0):
    gamma = math.log(ratio) / plastochron  # Richards 1951: plastochron ratio R = exp(γ·T)
    dt = plastochron / 2.0
    births = (np.arange(n) + 0.37) * plastochron
    n_frames = int(math.ceil((births[-1] + 3 * dt) / dt)) + 1
    rows = []
    for i, tb in enumerate(births):
        th = math.radians(theta0 + sign * i * alpha)
        for f in range(n_frames):
            t = f * dt
            if t < tb:
                continue
            r = rim_um * math.exp(gamma * (t - tb))
            rows.append((i, f, t, CENTRE[0] + r * math.cos(th), CENTRE[1] - r * math.sin(th)))
    tracks = pd.DataFrame(rows, columns=["track_id", "frame", "time_h", "x_um", "y_um"])
    centres = pd.DataFrame({"frame": np.arange(n_frames), "time_h": np.arange(n_frames) * dt,
                            "x_um": CENTRE[0], "y_um": CENTRE[1]})
    return tracks, centres


def rotate(tracks, phi_deg):
    c, s = math.cos(math.radians(phi_deg)), math.sin(math.radians(phi_deg))
    dx, dy_up = tracks["x_um"] - CENTRE[0], -(tracks["y_um"] - CENTRE[1])
    out = tracks.copy()
    out["x_um"] = CENTRE[0] + c * dx - s * dy_up
    out["y_um"] = CENTRE[1] - (s * dx + c * dy_up)
    return out


SET = Settings(bootstrap_n=50, parastichy_min_primordia=3)


def _measure(tracks, centres):
    m = measure_tracks(tracks, centres, SET)
    return m.primordia, m.phyllotaxis.divergence, m.phyllotaxis.summary


@FAST
@given(spirals(), st.floats(-720.0, 720.0))
def test_rotation_shifts_azimuths_keeps_divergence(geom, phi):
    tracks, centres = make_tracks(**geom)
    p0, d0, s0 = _measure(tracks, centres)
    p1, d1, s1 = _measure(rotate(tracks, phi), centres)
    assert p1["track_id"].tolist() == p0["track_id"].tolist()  # same birth order
    assert np.abs(cdiff(p1["theta_deg"], p0["theta_deg"] + phi)).max() < 1e-6
    assert ((p1["theta_deg"] >= 0) & (p1["theta_deg"] < 360)).all()
    assert np.abs(cdiff(d1["angle_deg"], d0["angle_deg"])).max() < 1e-6
    assert s1["chirality"] == s0["chirality"] == ("ccw" if geom["sign"] > 0 else "cw")
    # the angle found is the one the spiral was built with
    assert np.abs(cdiff(d0["angle_deg"], geom["alpha"])).max() < 1e-6


@FAST
@given(spirals())
def test_mirror_flips_chirality_keeps_angles(geom):
    tracks, centres = make_tracks(**geom)
    mirrored = tracks.assign(x_um=2 * CENTRE[0] - tracks["x_um"])
    p0, d0, s0 = _measure(tracks, centres)
    p1, d1, s1 = _measure(mirrored, centres)
    assert {s0["chirality"], s1["chirality"]} == {"ccw", "cw"}
    assert np.abs(cdiff(p1["theta_deg"], 180.0 - p0["theta_deg"])).max() < 1e-6
    assert np.abs(cdiff(d1["angle_deg"], d0["angle_deg"])).max() < 1e-6
    assert s1["divergence_mean_deg"] == pytest.approx(s0["divergence_mean_deg"], abs=1e-6)


@FAST
@given(spirals(), st.floats(0.1, 10.0))
def test_time_rescale_rescales_plastochron_only(geom, c):
    tracks, centres = make_tracks(**geom)
    p0, d0, s0 = _measure(tracks, centres)
    p1, d1, s1 = _measure(tracks.assign(time_h=tracks["time_h"] * c), centres.assign(time_h=centres["time_h"] * c))
    assert s0["plastochron_h"] == pytest.approx(geom["plastochron"], rel=1e-6)
    assert s1["plastochron_h"] == pytest.approx(c * s0["plastochron_h"], rel=1e-9)
    assert np.allclose(p1["emergence_time_h"], c * p0["emergence_time_h"], rtol=1e-9, atol=1e-9)
    for key in ("plastochron_ci_h", "plastochron_growth_h"):
        if s0.get(key) is not None:
            assert np.allclose(np.asarray(s1[key], float), c * np.asarray(s0[key], float), rtol=1e-9)
    # unchanged: angles, chirality, spatial quantities
    assert np.array_equal(d1["angle_deg"].to_numpy(), d0["angle_deg"].to_numpy())
    for key in ("chirality", "divergence_mean_deg", "divergence_sd_deg", "divergence_ci_deg",
                "plastochron_ratio", "parastichy_pair", "mode"):
        a, b = s0.get(key), s1.get(key)
        if isinstance(a, float):
            assert b == pytest.approx(a, rel=1e-9, abs=1e-9), key
        else:
            assert a == b, key


# ----------------------------------------------------------------------------------------------
# the 0°/360° cut
# ----------------------------------------------------------------------------------------------
finite = dict(allow_nan=False, allow_infinity=False)


@settings(max_examples=200, deadline=None)
@given(st.floats(-1e3, 1e3, **finite), st.floats(-1e3, 1e3, **finite),
       st.floats(-1e3, 1e3, **finite), st.floats(-1e-12, 1e-12, **finite))
def test_azimuth_always_in_range(x, xc, yc, tiny):
    # tiny offsets just below the centre line give atan2 ≈ −0: must wrap to 0, never to 360
    th = azimuth_deg(np.array([x, x]), np.array([yc + tiny, yc - 1.0]), xc, yc)
    assert ((th >= 0.0) & (th < 360.0)).all()
    w = circ.wrap360(np.array([tiny, -tiny, 360.0 + tiny, -360.0]))
    assert ((w >= 0.0) & (w < 360.0)).all()


@FAST
@given(st.floats(0.0, 360.0, exclude_max=True), st.floats(-179.0, 179.0))
def test_successive_angle_does_not_jump_at_the_cut(theta_a, d):
    from apextrack.phyllotaxis.divergence import successive_azimuths

    p = pd.DataFrame({"birth_rank": [1, 2], "track_id": [0, 1], "emergence_time_h": [0.0, 5.0],
                      "theta_deg": [theta_a, (theta_a + d) % 360.0], "co_initiated": [False, False]})
    signed = successive_azimuths(p)["signed_angle_deg"].iloc[0]
    assert signed == pytest.approx(d, abs=1e-9)


@FAST
@given(st.lists(st.floats(-15.0, 15.0), min_size=1, max_size=30), st.floats(0.0, 360.0))
def test_circular_mean_across_the_cut(offsets, centre):
    # reference: scipy.stats.circmean (general-purpose library), compared modulo 360
    from scipy.stats import circmean

    angles = (centre + np.asarray(offsets)) % 360.0
    m = circ.circ_mean(angles)
    ref = circmean(angles, high=360.0, low=0.0)
    assert abs(cdiff(m, ref)) < 1e-7
    assert abs(cdiff(m, centre + np.mean(offsets))) < 15.0  # stays inside the cluster
    assert 0.0 <= m < 360.0


# ----------------------------------------------------------------------------------------------
# tables round-trip through CSV exactly
# ----------------------------------------------------------------------------------------------
_float = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64), st.just(-0.0))
_text = st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), min_size=1, max_size=12)
_STRATEGY = {"int": st.integers(-(2 ** 62), 2 ** 62), "float": _float, "bool": st.booleans(), "str": _text}


@st.composite
def tables(draw):
    name = draw(st.sampled_from(sorted(SCHEMA)))
    cols = [c for c in SCHEMA[name] if c.required or draw(st.booleans())]
    n = draw(st.integers(0, 6))
    data = {c.name: draw(st.lists(_STRATEGY[c.kind], min_size=n, max_size=n)) for c in cols}
    df = pd.DataFrame({c.name: pd.Series(data[c.name], dtype={"int": "int64", "float": "float64", "bool": "bool",
                                                               "str": "object"}[c.kind]) for c in cols})
    return name, df


@settings(max_examples=150, deadline=None)
@given(tables())
def test_tables_round_trip_exactly(tmp_path_factory, table):
    name, df = table
    path = tmp_path_factory.mktemp("rt") / f"{name}.csv"
    write_table(df, path, name)
    back = read_table(path, name)
    assert list(back.columns) == list(df.columns)
    assert len(back) == len(df)
    for col in SCHEMA[name]:
        if col.name not in df:
            continue
        a, b = df[col.name].to_numpy(), back[col.name].to_numpy()
        if col.kind == "float":
            a, b = a.astype(float), b.astype(float)
            assert np.array_equal(np.isnan(a), np.isnan(b)), col.name
            ok = ~np.isnan(a)
            assert np.array_equal(a[ok], b[ok]), col.name  # bit-exact values (17 digits)
            assert np.array_equal(np.signbit(a[ok]), np.signbit(b[ok])), col.name
        else:
            assert [x for x in a] == [x for x in b], col.name
