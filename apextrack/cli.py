"""The ``apextrack`` command line: a thin shell over the library.

Each sub-command is declared by one ``_add_<name>`` function that builds its parser and points it
at a small runner; the runners only parse arguments, call library functions and print. User
errors (:class:`~apextrack.errors.ApextrackError`) are printed as one line and exit with code 2;
anything else is an internal error (exit code 1; ``--debug`` shows the traceback).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from .errors import ApextrackError, SettingsError


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors in the project's one-line format (exit code 2)."""

    def error(self, message):  # noqa: D401
        self.exit(2, f"apextrack: error: {message} — see '{self.prog} --help'\n")


class _VersionAction(argparse.Action):
    """``--version``: like argparse's, but reads the version (importlib.metadata) only when asked."""

    def __init__(self, option_strings, dest=argparse.SUPPRESS, default=argparse.SUPPRESS,
                 help="show program's version number and exit"):
        super().__init__(option_strings=option_strings, dest=dest, default=default, nargs=0, help=help)

    def __call__(self, parser, namespace, values, option_string=None):
        from . import __version__

        print(f"apextrack {__version__}")
        parser.exit()


def _float_pair(text: str):
    try:
        x, y = (float(v) for v in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected X,Y in µm, got {text!r}") from None
    return (x, y)


# ----------------------------------------------------------------------------------------------
# analyse
# ----------------------------------------------------------------------------------------------
def _add_analyse(sub):
    p = sub.add_parser("analyse", aliases=["analyze"], help="analyse one stack (default: the bundled demo)",
                       description="Find, track and order the primordia of one time-lapse stack and "
                                   "measure its phyllotaxis; write the tables into --out.")
    p.add_argument("stack", nargs="?", help="TIFF file, folder of timepoint TIFFs or .zarr (default: demo stack)")
    p.add_argument("--out", "-o", required=True, help="results folder")
    p.add_argument("--channel", help="reporter channel: name or 0-based index")
    p.add_argument("--pixel-size", type=float, dest="pixel_size_um", metavar="UM", help="x/y pixel size in µm")
    p.add_argument("--z-step", type=float, dest="z_step_um", metavar="UM", help="z step in µm")
    p.add_argument("--interval", type=float, dest="interval_h", metavar="HOURS", help="time between frames in hours")
    p.add_argument("--time-axis", dest="time_axis", metavar="AXIS", help="axis to use as time when the file does not say")
    p.add_argument("--centre", "--center", type=_float_pair, dest="centre_um", metavar="X,Y",
                   help="apex centre in µm (instead of fitting it)")
    p.add_argument("--min-snr", type=float, dest="min_snr", help="minimum signal-to-noise ratio of a detection")
    p.add_argument("--threads", type=int, metavar="N", help="threads measuring frames at once (default: one per core)")
    p.add_argument("--settings", dest="settings_file", metavar="FILE.toml", help="settings file")
    p.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bars")
    p.set_defaults(func=_run_analyse)


def _run_analyse(args) -> int:
    from .pipeline import analyse

    overrides = {k: getattr(args, k) for k in ("channel", "pixel_size_um", "z_step_um", "interval_h",
                                               "time_axis", "centre_um", "min_snr", "threads")}
    if args.stack is None and not args.quiet:
        print("apextrack: no stack given: analysing the bundled demo stack", file=sys.stderr)
    res = analyse(args.stack, out=args.out, overwrite=args.overwrite, progress=not args.quiet,
                  settings_file=args.settings_file, **overrides)
    s = res.summary

    def fmt(v, unit="", nd=1):
        return "n/a" if v is None else f"{v:.{nd}f}{unit}"

    print(f"{res.summary['stack']}: {s['n_primordia']} primordia, {s['n_tracks']} tracks, "
          f"{s['n_detections']} detections in {s['n_frames']} frames")
    print(f"  chirality {s.get('chirality')}, divergence {fmt(s.get('divergence_mean_deg'), '°')} "
          f"± {fmt(s.get('divergence_sd_deg'), '°')}, plastochron {fmt(s.get('plastochron_h'), ' h')}, "
          f"plastochron ratio {fmt(s.get('plastochron_ratio'), '', 3)}")
    print(f"  results in {res.out_dir}")
    return 0


# ----------------------------------------------------------------------------------------------
# settings
# ----------------------------------------------------------------------------------------------
def _add_settings(sub):
    p = sub.add_parser("settings", help="write or check a settings file",
                       description="Write the default settings (commented, with units) or check a file.")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--write", metavar="FILE.toml", help="write the defaults to FILE.toml")
    g.add_argument("--check", metavar="FILE.toml", help="read FILE.toml and report problems")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file")
    p.set_defaults(func=_run_settings)


def _run_settings(args) -> int:
    from . import settings as settings_mod

    if args.write:
        path = Path(args.write)
        if path.exists() and not args.overwrite:
            raise SettingsError("file exists", path, "use --overwrite or another name")
        settings_mod.save(settings_mod.Settings(), path)
        print(f"default settings written to {path}")
    else:
        settings_mod.load(args.check)
        print(f"{args.check}: settings are valid")
    return 0


# ----------------------------------------------------------------------------------------------
# batch
# ----------------------------------------------------------------------------------------------
def _add_batch(sub):
    p = sub.add_parser("batch", help="analyse many stacks on dask",
                       description="Analyse every stack of a folder (or matching a glob pattern) on dask, one "
                                   "task per stack (long stacks in blocks of frames): results per stack in OUT/<stack>/, one row per stack in "
                                   "OUT/experiment.csv and a report comparing the stacks. A failed stack is "
                                   "reported and the others go on (exit code 3 when any failed).")
    p.add_argument("source", metavar="FOLDER_OR_GLOB", help="folder of stacks, or a quoted glob such as 'data/*.tif'")
    p.add_argument("--out", "-o", required=True, help="output folder")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a running dask scheduler (default: a local cluster)")
    p.add_argument("--workers", type=int, metavar="N", help="worker processes of the local cluster (default: one per core)")
    p.add_argument("--settings", dest="settings_file", metavar="FILE.toml", help="settings file (the same for every stack)")
    p.add_argument("--channel", help="reporter channel: name or 0-based index")
    p.add_argument("--pixel-size", type=float, dest="pixel_size_um", metavar="UM", help="x/y pixel size in µm")
    p.add_argument("--interval", type=float, dest="interval_h", metavar="HOURS", help="time between frames in hours")
    p.add_argument("--frames-per-task", type=int, dest="frames_per_task", metavar="N",
                   help="split stacks longer than N frames into tasks of N frames (default 32; 0: one task per stack)")
    p.add_argument("--overwrite", action="store_true", help="replace existing per-stack results folders")
    p.add_argument("--quiet", "-q", action="store_true", help="no progress bars")
    p.set_defaults(func=_run_batch)


def _run_batch(args) -> int:
    from .batch import run_batch

    if args.workers is not None and args.workers < 1:
        raise SettingsError(f"--workers must be at least 1, not {args.workers}")
    overrides = {k: getattr(args, k) for k in ("channel", "pixel_size_um", "interval_h", "frames_per_task")}
    res = run_batch(args.source, args.out, scheduler=args.scheduler, n_workers=args.workers,
                    overwrite=args.overwrite, progress=not args.quiet, settings_file=args.settings_file, **overrides)
    n = len(res.experiment)
    print(f"{n - res.n_failed} of {n} stack(s) analysed; experiment table {res.out / 'experiment.csv'}")
    if res.report is not None:
        print(f"  experiment report {res.report}")
    for name in res.failed:
        err = res.experiment.loc[res.experiment["stack"] == name, "error"].iloc[0]
        print(f"  failed: {name}: {err}")
    return 3 if res.n_failed else 0


# ----------------------------------------------------------------------------------------------
# compare
# ----------------------------------------------------------------------------------------------
def _add_compare(sub):
    p = sub.add_parser("compare", help="compare two results (imaging or simulation) statistically",
                       description="Compare divergence angles (Watson U², difference of circular means), "
                                   "plastochrons (Kolmogorov–Smirnov), plastochron ratios, permutation and "
                                   "co-initiation frequencies (Fisher) and parastichies of two results folders.")
    p.add_argument("a", help="first results folder (from 'analyse' or 'simulate')")
    p.add_argument("b", help="second results folder")
    p.add_argument("--out", "-o", help="folder for comparison.csv and comparison.png (default: print only)")
    p.add_argument("--seed", type=int, default=0, help="seed of the permutation and bootstrap steps")
    p.set_defaults(func=_run_compare)


def _run_compare(args) -> int:
    import math

    from .comparison import compare_results, write_comparison

    df = compare_results(args.a, args.b, seed=args.seed)

    def cell(v, nd=3):
        if isinstance(v, float):
            return "–" if math.isnan(v) else f"{v:.{nd}g}"
        return "–" if v is None else str(v)

    print(f"{'quantity':<34} {'A':>12} {'B':>12} {'statistic':>10} {'p':>8}  test")
    for row in df.itertuples(index=False):
        print(f"{row.quantity:<34} {cell(row.value_a, 5):>12} {cell(row.value_b, 5):>12} "
              f"{cell(row.statistic):>10} {cell(row.p_value):>8}  {row.test}")
    if args.out:
        paths = write_comparison(df, args.out)
        print(f"written: {', '.join(str(p) for p in paths)}")
    return 0


# ----------------------------------------------------------------------------------------------
# simulate and fit
# ----------------------------------------------------------------------------------------------
class _PatternNames(Sequence):
    """The names of :data:`apextrack.model.patterns.PATTERNS`, sorted, read on first use.

    Building the parser must not import the model (numpy, pandas, scipy): every command, and
    ``--help``, would pay for it. argparse only looks at the choices when ``--pattern`` is given
    or the ``simulate`` help is shown.
    """

    _names: list[str] | None = None

    def _load(self) -> list[str]:
        if self._names is None:
            from .model.patterns import PATTERNS

            self._names = sorted(PATTERNS)
        return self._names

    def __getitem__(self, i):
        return self._load()[i]

    def __len__(self) -> int:
        return len(self._load())


def _add_simulate(sub):
    p = sub.add_parser("simulate", help="simulate a phyllotaxis pattern with the inhibitory-field model",
                       description="Run the Douady–Couder inhibitory-field model for a named pattern and write "
                                   "a results folder in the same schema as 'analyse' (so 'compare' and the "
                                   "report read it unchanged); with --render, also a synthetic stack and its truth.")
    pattern = p.add_argument("--pattern", default="spiral", help="pattern to simulate")
    pattern.choices = _PatternNames()  # set after add_argument, which would format (and so load) them
    p.add_argument("--params", metavar="FILE", help="model parameters (TOML or JSON) overriding the pattern's")
    p.add_argument("--out", "-o", required=True, help="results folder")
    p.add_argument("--render", action="store_true", help="also render a synthetic 3D+t stack with its truth")
    p.add_argument("--seed", type=int, default=0, help="random seed")
    p.add_argument("--overwrite", action="store_true", help="replace an existing folder")
    p.set_defaults(func=_run_simulate)


def _run_simulate(args) -> int:
    from .model.patterns import load_params, run_simulation

    params = load_params(args.params) if args.params else None
    try:
        res = run_simulation(args.pattern, args.out, params=params, render=args.render, seed=args.seed,
                             overwrite=args.overwrite)
    except SettingsError as exc:
        if args.params and exc.path is None:  # a bad value of the parameter file: name the file
            raise SettingsError(exc.what, args.params, exc.hint) from None
        raise
    s = res.summary
    mean = s.get("divergence_mean_deg")
    print(f"{args.pattern}: {len(res.primordia)} primordia, mode {s.get('mode')}, divergence "
          f"{'n/a' if mean is None else f'{mean:.1f}°'}; results in {args.out}")
    return 0


def _add_fit(sub):
    p = sub.add_parser("fit", help="fit the phyllotaxis model to an analysis result",
                       description="Search the inhibition range (and growth rate) of the inhibitory-field model "
                                   "whose simulated divergence angle and plastochron ratio match a results folder.")
    p.add_argument("result", help="results folder of 'apextrack analyse'")
    p.add_argument("--out", "-o", help="write fit.json and fit_grid.csv into this folder")
    p.add_argument("--seed", type=int, default=0, help="random seed")
    p.set_defaults(func=_run_fit)


def _run_fit(args) -> int:
    from .model.fit import fit_model
    from .tables import write_json, write_table

    fit = fit_model(args.result, seed=args.seed)
    pred, obs = fit.predicted, fit.observed
    print(f"best inhibition range ℓ/R = {fit.range_ratio:.3g} (misfit {fit.misfit:.3g})")
    for key in sorted(obs):
        p = pred.get(key)
        print(f"  {key:<24} observed {obs[key]:10.4g}   model {'n/a' if p is None else f'{p:10.4g}'}")
    if args.out:
        out = Path(args.out)
        write_json(fit.to_dict(), out / "fit.json")
        if fit.table is not None:
            write_table(fit.table, out / "fit_grid.csv")
        print(f"written: {out / 'fit.json'}")
    return 0


# ----------------------------------------------------------------------------------------------
# view
# ----------------------------------------------------------------------------------------------
def _add_view(sub):
    p = sub.add_parser("view", help="review a result or a stack in napari",
                       description="Open napari with a results folder (image, tracks, primordia, "
                                   "angles, parastichies and the review widget to correct them) or "
                                   "a stack (with the run widget). No path: the run widget on the demo stack.")
    p.add_argument("path", nargs="?", help="results folder or stack file")
    p.set_defaults(func=_run_view)


def _run_view(args) -> int:
    from .errors import OutputError

    try:
        import napari  # noqa: F401
    except ImportError:
        raise OutputError("napari is not installed", hint="pip install 'apextrack[viewer]'") from None
    from .viewer.app import launch

    launch(args.path)
    return 0


# ----------------------------------------------------------------------------------------------
# score
# ----------------------------------------------------------------------------------------------
def _add_score(sub):
    p = sub.add_parser("score", help="score a results folder against a ground-truth table",
                       description="Measure tracking and birth-order accuracy of a results folder "
                                   "against a ground truth (one row per primordium per frame): CTC "
                                   "DET/TRA, particle-tracking alpha/beta/Jaccard, MOTA, IDF1, the "
                                   "fraction of exact birth ranks and Kendall's tau. Prints them and "
                                   "writes scores.json and scores.csv.")
    p.add_argument("results", help="results folder written by 'apextrack analyse'")
    p.add_argument("truth", help="ground-truth CSV (e.g. <stem>_truth.csv of a synthetic stack)")
    p.add_argument("--gate", type=float, dest="gate_um", metavar="UM", default=None,
                   help="matching distance in µm (default: the scoring module's default)")
    p.add_argument("--out", "-o", default=None,
                   help="folder or .json/.csv name for the scores (default: the results folder)")
    p.set_defaults(func=_run_score)


def _run_score(args) -> int:
    from .scoring import DEFAULT_GATE_UM, score_results, write_scores

    gate = DEFAULT_GATE_UM if args.gate_um is None else args.gate_um
    scores = score_results(args.results, args.truth, gate_um=gate)
    paths = write_scores(scores, args.out if args.out is not None else args.results)
    for key in sorted(scores):
        v = scores[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            continue
        print(f"{key:32s} {v:.6g}" if isinstance(v, float) else f"{key:32s} {v}")
    print(f"scores written to {', '.join(str(p) for p in paths)}")
    return 0


#: Sub-command builders, in the order they are listed by --help.
COMMANDS = [_add_analyse, _add_settings, _add_batch, _add_compare, _add_score, _add_simulate, _add_fit,
            _add_view]


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="apextrack",
                     description="Track primordia on time-lapse stacks of shoot apices and measure "
                                 "their phyllotaxis.")
    parser.add_argument("--version", action=_VersionAction)
    parser.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for add in COMMANDS:
        add(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else list(argv)
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except ApextrackError as exc:
        if args.debug:
            raise
        print(f"apextrack: error: {exc.one_line()}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("apextrack: interrupted; no results were written", file=sys.stderr)
        return 130
    except Exception as exc:  # internal error
        if args.debug:
            raise
        print(f"apextrack: internal error: {type(exc).__name__}: {exc} — run with --debug and report it",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
