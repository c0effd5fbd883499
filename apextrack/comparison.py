"""Statistical comparison of two phyllotaxis result sets (simulation vs imaging, or two
experiments).

Each input is a results folder as written by ``apextrack analyse`` (or by a simulation, which
writes the same files): ``divergence.csv`` (``angle_deg``, ``interval_h``), ``primordia.csv``
and ``summary.json``. :func:`compare_results` returns one row per quantity with both values,
the test statistic, its p-value, the test used and what that test assumes.

What every test here assumes — read before trusting a p-value
------------------------------------------------------------
All tests treat the values of one record as **independent draws from one distribution**.
Successive divergence angles along one meristem are not independent: a primordium placed too
far makes the next angle smaller (negative serial correlation), and a permutation of birth order
changes two or three successive angles together (2α, −α, 2α). Plastochrons are serially
correlated too. The effective sample size is therefore smaller than the number of angles and
the p-values below are optimistic (too small) when the correlation is strong. Pooling several
meristems in one folder mixes plants; the tests do not model plant-to-plant variation.

Examples
--------
>>> import numpy as np
>>> from apextrack.comparison import watson_u2
>>> round(watson_u2([10.0, 20.0], [10.0, 20.0]), 12)
0.0
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from .circular import circ_mean, wrap180, wrap360
from .errors import AnalysisError, ResultsError
from .tables import atomic_write_bytes, read_json, read_table, to_csv_text, atomic_write_text

__all__ = ["watson_u2", "watson_u2_batch", "watson_u2_asymptotic_p", "watson_u2_test",
           "circular_mean_difference", "plastochron_ks", "permutation_fisher",
           "read_result_folder", "compare_results", "comparison_figure", "write_comparison"]

COLUMNS = ["quantity", "value_a", "value_b", "statistic", "p_value", "ci_low", "ci_high",
           "test", "notes"]

_INDEPENDENCE = ("assumes the values of each record are independent draws from one "
                 "distribution; successive values along one meristem are serially correlated "
                 "(questionable), so the p-value is optimistic")


# ----------------------------------------------------------------------------- Watson U²


def watson_u2_batch(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Watson's two-sample U² for many pairs of samples at once.

    Parameters
    ----------
    a : ndarray, shape (R, n1)
        R first samples (angles in degrees).
    b : ndarray, shape (R, n2)
        R second samples.

    Returns
    -------
    ndarray, shape (R,)
        U² of each pair (see :func:`watson_u2`; ties handled as there).
    """
    a = np.atleast_2d(wrap360(np.asarray(a, dtype=float)))
    b = np.atleast_2d(wrap360(np.asarray(b, dtype=float)))
    n1, n2 = a.shape[1], b.shape[1]
    n = n1 + n2
    x = np.concatenate([a, b], axis=1)
    is_a = np.zeros(x.shape, dtype=bool)
    is_a[:, :n1] = True
    order = np.argsort(x, axis=1, kind="stable")
    xs = np.take_along_axis(x, order, axis=1)
    ia = np.take_along_axis(is_a, order, axis=1)
    d = np.cumsum(ia, axis=1) / n1 - np.cumsum(~ia, axis=1) / n2
    # tied values: every member of a tie group takes d at the group's last position
    last = np.ones(x.shape, dtype=bool)
    last[:, :-1] = xs[:, 1:] != xs[:, :-1]
    idx = np.where(last, np.arange(n)[None, :], n)
    end = np.minimum.accumulate(idx[:, ::-1], axis=1)[:, ::-1]
    d = np.take_along_axis(d, end, axis=1)
    return n1 * n2 / n ** 2 * (np.sum(d * d, axis=1) - np.sum(d, axis=1) ** 2 / n)


def watson_u2(a, b) -> float:
    """Watson's U² statistic of two samples of angles (degrees).

    With F1, F2 the empirical distribution functions of the samples (sizes n1, n2, N = n1 + n2)
    and H that of the pooled sample, U² = (n1 n2 / N) ∫ [F1 − F2 − ∫(F1 − F2) dH]² dH
    (Watson 1962, Biometrika 49; Mardia & Jupp 2000, Directional Statistics, §8.3). Evaluated
    at the pooled ordered sample, with d_k = F1 − F2 just after the k-th value:
    U² = (n1 n2 / N²) [Σ d_k² − (Σ d_k)² / N]. Tied values count with their multiplicity at
    the value of d after the tie. The statistic does not depend on where 0° is put.
    """
    a = np.asarray(a, dtype=float).ravel()
    b = np.asarray(b, dtype=float).ravel()
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        return math.nan
    return float(watson_u2_batch(a[None, :], b[None, :])[0])


def watson_u2_asymptotic_p(u2, terms: int = 200):
    """Upper-tail probability of the limiting null distribution of U².

    P(U² > u) = 2 Σ_{m≥1} (−1)^(m−1) exp(−2 m² π² u) (Watson 1961, Biometrika 48; the same
    limit holds for the two-sample statistic, Watson 1962). Its 5% point is 0.187 (Stephens
    1970, J. R. Stat. Soc. B 32; Mardia & Jupp 2000, Appendix table). The series is summed to
    ``terms`` terms (it converges for u ≥ 0.001, where it gives 1 to 10 decimals; below that
    1 is returned) and clipped to [0, 1].
    """
    u = np.asarray(u2, dtype=float)
    m = np.arange(1, terms + 1, dtype=float)
    shape = u.shape
    uu = np.maximum(u.reshape(-1, 1), 1e-3)  # below 1e-3 the result is replaced by 1
    sign = np.where(m % 2 == 1, 1.0, -1.0)
    p = 2.0 * np.sum(sign * np.exp(-2.0 * m ** 2 * math.pi ** 2 * uu), axis=1)
    p = np.where(u.reshape(-1) < 1e-3, 1.0, np.clip(p, 0.0, 1.0))
    p = np.where(np.isnan(u.reshape(-1)), np.nan, p)
    return float(p[0]) if shape == () else p.reshape(shape)


def watson_u2_test(a, b, method: str = "permutation", n_permutations: int = 9999,
                   seed: int = 0) -> tuple[float, float]:
    """Watson's two-sample U² test that two samples of angles come from one distribution.

    Parameters
    ----------
    a, b : array_like
        Angles in degrees.
    method : {"permutation", "asymptotic"}
        ``"asymptotic"``: p from the limiting distribution (:func:`watson_u2_asymptotic_p`),
        good when both samples hold about 20 or more angles. ``"permutation"``: the pooled
        angles are reassigned at random to the two groups ``n_permutations`` times (numpy
        Generator seeded with ``seed``) and p = (1 + #{U²* ≥ U²}) / (n_permutations + 1);
        valid for small samples as long as the angles are exchangeable.
    n_permutations : int
        Number of random reassignments.
    seed : int
        Seed of the permutation test.

    Returns
    -------
    (u2, p) : tuple of float

    Notes
    -----
    Assumes independent angles within each sample (questionable along one meristem: successive
    divergence angles are negatively correlated) and a continuous distribution (ties are
    handled but make the asymptotic p conservative). U² is sensitive to any difference of the
    distributions on the circle — location and spread alike — and does not depend on the
    choice of origin.
    """
    a = np.asarray(a, dtype=float).ravel()
    b = np.asarray(b, dtype=float).ravel()
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size < 2 or b.size < 2:
        return math.nan, math.nan
    u2 = watson_u2(a, b)
    if method == "asymptotic":
        return u2, watson_u2_asymptotic_p(u2)
    if method != "permutation":
        raise ValueError(f"unknown method {method!r}")
    rng = np.random.default_rng(seed)
    pooled = np.concatenate([a, b])
    n1 = a.size
    exceed = 0
    done = 0
    chunk = max(1, min(int(n_permutations), 200_000 // pooled.size))
    while done < n_permutations:
        k = min(chunk, n_permutations - done)
        perm = rng.permuted(np.broadcast_to(pooled, (k, pooled.size)), axis=1)
        u = watson_u2_batch(perm[:, :n1], perm[:, n1:])
        exceed += int(np.sum(u >= u2 - 1e-12))
        done += k
    return u2, (1 + exceed) / (n_permutations + 1)


# ----------------------------------------------------------------------------- other tests


def circular_mean_difference(a, b, n_boot: int = 2000, confidence: float = 0.95,
                             seed: int = 0) -> tuple[float, float, float]:
    """Difference of circular mean directions, mean(a) − mean(b) in [−180, 180), with a
    percentile bootstrap interval (each sample resampled with replacement, seeded).

    Assumes each sample is independent and identically distributed (angles along one meristem
    are serially correlated, so the interval is too narrow when that correlation is strong) and
    that the distributions are unimodal enough for a mean direction to mean something.

    Returns
    -------
    (difference, ci_low, ci_high) : tuple of float
        The interval is continuous: ``ci_low <= difference <= ci_high`` (it may pass ±180).
    """
    a = np.asarray(a, dtype=float).ravel()
    b = np.asarray(b, dtype=float).ravel()
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    ma, mb = circ_mean(a), circ_mean(b)
    if math.isnan(ma) or math.isnan(mb):
        return math.nan, math.nan, math.nan
    diff = float(wrap180(ma - mb))
    if a.size < 2 or b.size < 2 or n_boot < 1:
        return diff, math.nan, math.nan
    rng = np.random.default_rng(seed)
    ra = np.deg2rad(a[rng.integers(0, a.size, size=(n_boot, a.size))])
    rb = np.deg2rad(b[rng.integers(0, b.size, size=(n_boot, b.size))])
    mba = np.rad2deg(np.arctan2(np.sin(ra).mean(1), np.cos(ra).mean(1)))
    mbb = np.rad2deg(np.arctan2(np.sin(rb).mean(1), np.cos(rb).mean(1)))
    dev = wrap180(wrap180(mba - mbb) - diff)
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.quantile(dev, [alpha, 1.0 - alpha])
    return diff, float(diff + lo), float(diff + hi)


def plastochron_ks(a, b) -> tuple[float, float]:
    """Two-sample Kolmogorov–Smirnov test of two samples of plastochrons (h).

    ``scipy.stats.ks_2samp`` (exact p for small samples). Assumes independent plastochrons
    (they are serially correlated along a meristem) from continuous distributions; sensitive to
    any difference of the distributions, most to a shift of the median.
    """
    a = np.asarray(a, dtype=float).ravel()
    b = np.asarray(b, dtype=float).ravel()
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size < 1 or b.size < 1:
        return math.nan, math.nan
    r = stats.ks_2samp(a, b)
    return float(r.statistic), float(r.pvalue)


def permutation_fisher(k_a: int, n_a: int, k_b: int, n_b: int) -> tuple[float, float]:
    """Fisher's exact test (two-sided) that organs are permuted equally often in two records.

    The 2×2 table is [[k_a, n_a − k_a], [k_b, n_b − k_b]] (permuted / not permuted organs).
    Assumes organs are independent (a permutation involves two or three neighbouring organs at
    once, so counts of organs overstate the information; counts of permutation events are an
    alternative) and fixed margins.

    Returns
    -------
    (odds_ratio, p) : tuple of float
    """
    table = np.array([[k_a, n_a - k_a], [k_b, n_b - k_b]], dtype=np.int64)
    if np.any(table < 0):
        raise AnalysisError("permuted organs cannot outnumber organs")
    r = stats.fisher_exact(table, alternative="two-sided")
    return float(r.statistic), float(r.pvalue)


# ----------------------------------------------------------------------------- folders


def read_result_folder(folder: str | Path) -> dict:
    """Read the files of one results (or simulation) folder that a comparison needs.

    Returns
    -------
    dict
        ``divergence`` (DataFrame), ``primordia`` (DataFrame), ``summary`` (dict), ``path``.

    Raises
    ------
    ResultsError
        When the folder, a file or a required column is missing, or summary.json is not an
        object.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise ResultsError("results folder not found", folder,
                           "give a folder written by apextrack analyse or simulate")
    div = read_table(folder / "divergence.csv", "divergence")
    prim = read_table(folder / "primordia.csv", "primordia")
    summ = read_json(folder / "summary.json")
    if not isinstance(summ, dict):
        raise ResultsError("summary is not a JSON object", folder / "summary.json",
                           "re-run the analysis")
    return {"divergence": div, "primordia": prim, "summary": summ, "path": folder}


def _permutation_counts(res: dict):
    """(permuted organs, organs, where from) or None."""
    s = res["summary"]
    n_org = s.get("n_primordia", len(res["primordia"]))
    if isinstance(s.get("n_permuted"), (int, float)) and n_org:
        return int(s["n_permuted"]), int(n_org), "summary.json n_permuted"
    perms = s.get("permutations")
    if isinstance(perms, list) and n_org:
        ranks = set()
        for p in perms:
            if isinstance(p, dict) and isinstance(p.get("ranks"), list):
                ranks.update(int(r) for r in p["ranks"])
        return len(ranks), int(n_org), "summary.json permutations"
    return None


def _ratio_values(res: dict):
    """Per-pair plastochron ratios (divergence.csv) or the summary value and its SE."""
    div = res["divergence"]
    if "plastochron_ratio" in div.columns:
        v = pd.to_numeric(div["plastochron_ratio"], errors="coerce").to_numpy(float)
        return "values", v[np.isfinite(v)]
    s = res["summary"]
    val = s.get("plastochron_ratio")
    if isinstance(val, dict):  # {"value":..., "sd"/"ci": ...}
        se = val.get("se", val.get("sd"))
        ci = val.get("ci")
        val = val.get("value")
    else:
        se = s.get("plastochron_ratio_se", s.get("plastochron_ratio_sd"))
        ci = s.get("plastochron_ratio_ci")
    if se is None and isinstance(ci, (list, tuple)) and len(ci) == 2 and None not in ci:
        se = (float(ci[1]) - float(ci[0])) / (2 * 1.959963984540054)
    if not isinstance(val, (int, float)):
        return None
    return "summary", (float(val), None if se is None else float(se))


def _reasons(ra: dict, rb: dict, key: str) -> str:
    """The analysis' own reasons for a missing quantity, as a note suffix."""
    out = []
    for name, r in (("a", ra), ("b", rb)):
        why = r["summary"].get("reasons")
        if isinstance(why, dict) and why.get(key):
            out.append(f"{name}: {why[key]}")
    return ("; " + "; ".join(out)) if out else ""


def _row(quantity, va, vb, stat, p, test, notes, lo=math.nan, hi=math.nan):
    return {"quantity": quantity, "value_a": va, "value_b": vb, "statistic": stat,
            "p_value": p, "ci_low": lo, "ci_high": hi, "test": test, "notes": notes}


def compare_results(a, b, seed: int = 0, n_permutations: int = 9999,
                    n_boot: int = 2000) -> pd.DataFrame:
    """Compare two results folders quantity by quantity.

    Parameters
    ----------
    a, b : str, Path or dict
        Results folders (or the dict of :func:`read_result_folder`).
    seed : int
        Seed of the permutation and bootstrap steps (results are repeatable).
    n_permutations : int
        Permutations of the Watson U² test.
    n_boot : int
        Bootstrap resamples of the mean-difference interval.

    Returns
    -------
    DataFrame
        Columns ``quantity, value_a, value_b, statistic, p_value, ci_low, ci_high, test,
        notes``; rows: divergence angle distribution (Watson U², permutation p), difference of
        circular means (bootstrap CI), plastochron distribution (two-sample KS), plastochron
        ratio, permutation frequency (Fisher's exact), co-initiation frequency (Fisher's
        exact), parastichy pair and class (descriptive). A quantity a folder does not report
        gets NaN and a note saying what is missing.
    """
    ra = a if isinstance(a, dict) else read_result_folder(a)
    rb = b if isinstance(b, dict) else read_result_folder(b)
    ang_a = ra["divergence"]["angle_deg"].to_numpy(float)
    ang_b = rb["divergence"]["angle_deg"].to_numpy(float)
    for r, ang in ((ra, ang_a), (rb, ang_b)):
        if np.sum(np.isfinite(ang)) < 2:
            raise AnalysisError("fewer than 2 divergence angles: nothing to compare",
                                Path(r["path"]) / "divergence.csv",
                                "a comparison needs at least 2 angles in each folder")
    rows = []
    u2, p = watson_u2_test(ang_a, ang_b, method="permutation", n_permutations=n_permutations,
                           seed=seed)
    rows.append(_row("divergence_angle_distribution", circ_mean(ang_a), circ_mean(ang_b), u2, p,
                     "Watson two-sample U² (Watson 1962), permutation p-value "
                     f"({n_permutations} permutations, seed {seed})",
                     f"values are circular means (deg); n = {np.isfinite(ang_a).sum()} and "
                     f"{np.isfinite(ang_b).sum()} angles; asymptotic p = "
                     f"{watson_u2_asymptotic_p(u2):.4g}; {_INDEPENDENCE}"))
    diff, lo, hi = circular_mean_difference(ang_a, ang_b, n_boot=n_boot, seed=seed)
    rows.append(_row("divergence_mean_difference_deg", circ_mean(ang_a), circ_mean(ang_b), diff,
                     math.nan, f"difference of circular means a − b, percentile bootstrap 95% CI "
                     f"({n_boot} resamples, seed {seed})",
                     f"no p-value: read the CI (contains 0 = no shift shown); {_INDEPENDENCE}",
                     lo, hi))
    pa = ra["divergence"]["interval_h"].to_numpy(float)
    pb = rb["divergence"]["interval_h"].to_numpy(float)
    d, p = plastochron_ks(pa, pb)
    rows.append(_row("plastochron_distribution_h", float(np.nanmedian(pa)) if pa.size else math.nan,
                     float(np.nanmedian(pb)) if pb.size else math.nan, d, p,
                     "two-sample Kolmogorov–Smirnov (scipy.stats.ks_2samp)",
                     f"values are medians (h); {_INDEPENDENCE}; assumes continuous distributions"))
    rows.append(_ratio_row(ra, rb))
    pca, pcb = _permutation_counts(ra), _permutation_counts(rb)
    if pca and pcb:
        odds, p = permutation_fisher(pca[0], pca[1], pcb[0], pcb[1])
        rows.append(_row("permutation_frequency", pca[0] / pca[1], pcb[0] / pcb[1], odds, p,
                         "Fisher's exact test, two-sided (scipy.stats.fisher_exact); statistic "
                         "is the odds ratio", f"{pca[0]}/{pca[1]} vs {pcb[0]}/{pcb[1]} organs "
                         f"({pca[2]}, {pcb[2]}); assumes independent organs, but a permutation "
                         "involves 2–3 neighbours at once"))
    else:
        which = " and ".join(n for n, c in (("a", pca), ("b", pcb)) if not c)
        rows.append(_row("permutation_frequency", math.nan, math.nan, math.nan, math.nan,
                         "Fisher's exact test", f"not reported in summary.json of {which} "
                         "(n_permuted or permutations)" + _reasons(ra, rb, "permutations")))
    ca, cb = ra["primordia"]["co_initiated"], rb["primordia"]["co_initiated"]
    if len(ca) and len(cb):
        ka, kb = int(ca.sum()), int(cb.sum())
        odds, p = permutation_fisher(ka, len(ca), kb, len(cb))
        rows.append(_row("co_initiation_frequency", ka / len(ca), kb / len(cb), odds, p,
                         "Fisher's exact test, two-sided (scipy.stats.fisher_exact); statistic "
                         "is the odds ratio", f"{ka}/{len(ca)} vs {kb}/{len(cb)} primordia flagged "
                         "co-initiated; assumes independent primordia"))
    rows.append(_parastichy_row(ra["summary"], rb["summary"]))
    df = pd.DataFrame(rows, columns=COLUMNS)
    for c in ("statistic", "p_value", "ci_low", "ci_high"):
        df[c] = df[c].astype(float)
    df.attrs["data"] = {"angles_a": ang_a.tolist(), "angles_b": ang_b.tolist(),
                        "intervals_a": pa.tolist(), "intervals_b": pb.tolist(),
                        "labels": [f"A: {_label(ra)}", f"B: {_label(rb)}"]}
    return df


def _label(res: dict) -> str:
    p = res.get("path")
    return Path(p).name if p else "?"


def _ratio_row(ra, rb):
    va, vb = _ratio_values(ra), _ratio_values(rb)
    name = "plastochron_ratio"
    if va is None or vb is None:
        which = " and ".join(n for n, v in (("a", va), ("b", vb)) if v is None)
        return _row(name, math.nan, math.nan, math.nan, math.nan, "none",
                    f"plastochron ratio not reported by {which}"
                    + _reasons(ra, rb, "plastochron_ratio"))
    if va[0] == "values" and vb[0] == "values" and va[1].size and vb[1].size:
        d, p = plastochron_ks(np.log(va[1]), np.log(vb[1]))
        return _row(name, float(np.exp(np.mean(np.log(va[1])))),
                    float(np.exp(np.mean(np.log(vb[1])))), d, p,
                    "two-sample Kolmogorov–Smirnov on ln R (scipy.stats.ks_2samp)",
                    f"values are geometric means; {_INDEPENDENCE}")

    def _val_se(v):
        if v[0] == "values":
            x = np.log(v[1])
            return float(np.exp(x.mean())), (float(np.exp(x.mean()) * x.std(ddof=1)
                                                   / math.sqrt(x.size)) if x.size > 1 else None)
        return v[1]

    (xa, sa), (xb, sb) = _val_se(va), _val_se(vb)
    if sa is None or sb is None or (sa == 0 and sb == 0):
        return _row(name, xa, xb, xa - xb, math.nan, "difference a − b",
                    "no uncertainty reported for at least one record: no test")
    z = (xa - xb) / math.hypot(sa, sb)
    p = 2.0 * stats.norm.sf(abs(z))
    return _row(name, xa, xb, z, p, "Wald z-test of the difference (normal approximation)",
                f"SE {sa:.3g} and {sb:.3g} from the reported uncertainty; assumes the two "
                "estimates are independent and approximately normal")


def _parastichy_row(sa: dict, sb: dict):
    def get(s):
        pair = s.get("parastichy_pair")
        cls = s.get("parastichy_class")
        if isinstance(pair, (list, tuple)) and len(pair) == 2:
            pair = (int(pair[0]), int(pair[1]))
        else:
            pair = None
        return pair, cls

    (pa, ca), (pb, cb) = get(sa), get(sb)
    if pa is None or pb is None:
        return _row("parastichy_class", math.nan, math.nan, math.nan, math.nan, "none",
                    "parastichy pair not reported in summary.json of "
                    + " and ".join(n for n, v in (("a", pa), ("b", pb)) if v is None))
    same = (sorted(pa) == sorted(pb)) and (ca == cb)
    fmt = lambda p, c: f"({p[0]}, {p[1]}) {c or ''}".strip()
    return _row("parastichy_class", fmt(pa, ca), fmt(pb, cb), float(same), math.nan,
                "descriptive: same contact parastichy pair and class (1) or not (0)",
                "one pair per record: no test is possible; compare several meristems for one")


# ----------------------------------------------------------------------------- figure/output


def comparison_figure(angles_a, angles_b, intervals_a=(), intervals_b=(), labels=("A", "B")):
    """Figure overlaying the divergence-angle distributions (rose and histogram, circular means
    marked) and the plastochron distributions (cumulative) of two records.

    Parameters
    ----------
    angles_a, angles_b : array_like
        Divergence angles (deg).
    intervals_a, intervals_b : array_like, optional
        Plastochrons (h).
    labels : pair of str
        Legend names of the two records.

    Returns
    -------
    matplotlib.figure.Figure
        Drawn with the Agg canvas (no display needed, no pyplot state).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(11, 3.8), layout="constrained")
    FigureCanvasAgg(fig)
    ax0 = fig.add_subplot(1, 3, 1, projection="polar")
    ax1 = fig.add_subplot(1, 3, 2)
    ax2 = fig.add_subplot(1, 3, 3)
    bins = np.linspace(0, 360, 37)
    colours = ("tab:blue", "tab:orange")
    for ang, iv, lab, col in zip((angles_a, angles_b), (intervals_a, intervals_b), labels,
                                 colours):
        ang = np.asarray(ang, dtype=float).ravel()
        ang = wrap360(ang[np.isfinite(ang)])
        h, _ = np.histogram(ang, bins=bins, density=True)
        ax0.bar(np.deg2rad(bins[:-1]), h, width=np.deg2rad(10), align="edge", alpha=0.45,
                color=col, label=lab)
        ax1.hist(ang, bins=bins, density=True, alpha=0.45, color=col, label=lab)
        m = circ_mean(ang)
        if not math.isnan(m):
            ax1.axvline(m, color=col, lw=1.5)
        iv = np.asarray(iv, dtype=float).ravel()
        iv = np.sort(iv[np.isfinite(iv)])
        if iv.size:
            ax2.step(iv, np.arange(1, iv.size + 1) / iv.size, where="post", color=col, label=lab)
    ax0.set_yticklabels([])
    ax0.set_title("divergence angles")
    ax1.set_xlabel("divergence angle (deg)")
    ax1.set_ylabel("density (1/deg)")
    ax1.set_xlim(0, 360)
    ax1.legend(frameon=False)
    ax2.set_xlabel("plastochron (h)")
    ax2.set_ylabel("cumulative share")
    ax2.set_title("plastochrons")
    return fig


def write_comparison(df: pd.DataFrame, out_dir: str | Path) -> list[Path]:
    """Write ``comparison.csv`` and ``comparison.png`` into ``out_dir``, atomically.

    The figure is drawn from the angles and plastochrons that :func:`compare_results` keeps in
    ``df.attrs``; a table without them (e.g. read back from CSV) gets the CSV only.

    Returns
    -------
    list of Path
        Files written.
    """
    out_dir = Path(out_dir)
    csv = out_dir / "comparison.csv"
    atomic_write_text(csv, to_csv_text(df))
    written = [csv]
    data = df.attrs.get("data")
    if data:
        fig = comparison_figure(data["angles_a"], data["angles_b"], data["intervals_a"],
                                data["intervals_b"], labels=data["labels"])
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=120)
        png = out_dir / "comparison.png"
        atomic_write_bytes(png, buf.getvalue())
        written.append(png)
    return written
