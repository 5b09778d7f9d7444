"""The command line: a thin shell that wires the stages together. Exit codes are in pooling.errors."""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from importlib import resources
from pathlib import Path

from . import errors as E

DEMO_FILE = "demo_castings.csv"
REPORT_RANGE = 1e100  # reporter options, like data (stats.choose_unit), stay within magnitudes 1e-100 to 1e100


# ---------------------------------------------------------------------------------------------
# option parsing (values are checked here, at the edge)


def _add_text_format_options(p: argparse.ArgumentParser) -> None:
    """How a CSV is written: its encoding, field separator and number format (fit and ingest read alike)."""
    p.add_argument("--encoding", help="text encoding of a CSV (default: UTF-8, with or without BOM)")
    p.add_argument("--delimiter", help="CSV field separator (default: detected)")
    p.add_argument(
        "--thousands",
        metavar="SEP",
        help="digit-group separator inside numbers, e.g. ',' for 1,234.5 or '.' for 1.234,5 (default: none)",
    )
    p.add_argument(
        "--decimal-comma",
        dest="decimal_comma",
        action="store_true",
        help="numbers are written with a decimal comma, e.g. 1,5 (default: a decimal point)",
    )


def _num(text: str, what: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise E.InputError(f"bad option {what}: expected a number, found '{text}'") from None
    if x != x or x in (float("inf"), float("-inf")):
        raise E.InputError(f"bad option {what}: expected a finite number, found '{text}'")
    return x


def parse_prior(text: str, option: str):
    """flat | normal:LOC:SCALE | half-normal:SCALE | half-cauchy:SCALE | reciprocal | gamma:SHAPE:RATE |
    scaled-inv-chi2:DOF:SCALE2."""
    from . import model as m

    parts = text.strip().lower().split(":")
    kind, args = parts[0], parts[1:]
    shapes = {
        "--mu": {"flat": (m.Flat, 0), "normal": (m.Normal, 2)},
        "--tau": {"flat": (m.Flat, 0), "half-normal": (m.HalfNormal, 1), "half-cauchy": (m.HalfCauchy, 1)},
        "--s2": {"reciprocal": (m.Reciprocal, 0), "gamma": (m.Gamma, 2)},
        "--sigma2": {"reciprocal": (m.Reciprocal, 0), "scaled-inv-chi2": (m.ScaledInvChi2, 2)},
    }[option]
    if kind not in shapes:
        forms = {
            "--mu": "flat or normal:LOC:SCALE",
            "--tau": "flat, half-normal:SCALE or half-cauchy:SCALE",
            "--s2": "reciprocal or gamma:SHAPE:RATE",
            "--sigma2": "reciprocal or scaled-inv-chi2:DOF:SCALE2",
        }[option]
        raise E.InputError(f"bad option {option}: expected {forms}; found '{text}'")
    cls, nargs = shapes[kind]
    if len(args) != nargs:
        raise E.InputError(f"bad option {option}: '{kind}' takes {nargs} number(s) after ':'; found '{text}'")
    return cls(*(_num(a, option) for a in args))


def _nu(args):
    from . import model as m

    if args.nu is not None and args.nu_grid is not None:
        raise E.InputError("bad options: give either --nu (a fixed value) or --nu-grid, not both")
    if args.nu is not None:
        return m.NuFixed(_nu_value(args.nu, "--nu"))
    if args.nu_grid is not None:
        return m.NuGrid(tuple(_nu_value(x, "--nu-grid") for x in args.nu_grid.split(",") if x.strip()))
    return m.NuGrid()


NU_MIN, NU_MAX = 1e-6, 1e12


def _nu_value(text: str, option: str) -> float:
    """A nu from 1e-6 to 1e12. nu counts prior pseudo-measurements of each group's variance: below 1e-6
    it adds less than a millionth of one measurement (and values near the smallest double break the
    report's scales); above 1e12 every sigma_j^2 equals s^2 to about 1e-6 (relative sd sqrt(2/nu)),
    which is the shared structure, and draws of nu near 1e308 overflow any sum of them."""
    x = _num(text, option)
    if 0 < x < NU_MIN:
        raise E.InputError(
            f"bad option {option}: nu below {NU_MIN:.0e} adds less than a millionth of a measurement "
            f"to each group's variance; give a nu of at least {NU_MIN:.0e}; found '{text}'"
        )
    if x > NU_MAX:
        raise E.InputError(
            f"bad option {option}: nu above {NU_MAX:.0e} makes every group's variance equal s^2 to "
            f"about 1e-6; use --within shared instead; found '{text}'"
        )
    return x


def _add_fit_options(p: argparse.ArgumentParser, data: bool = True, out_required: bool = False):
    if data:
        p.add_argument("data", help="CSV or Parquet file: one row per measurement (or per group, see below)")
        p.add_argument("--group", required=True, help="column holding the group label")
        p.add_argument("--value", help="column of measurements (long table)")
        p.add_argument("--size", help="column of group sizes n (one row per group, with --mean and --sd)")
        p.add_argument("--mean", help="column of group means (with --size and --sd)")
        p.add_argument("--sd", help="column of group standard deviations, ddof=1 (with --size and --mean)")
        p.add_argument("--estimate", help="column of group estimates (known structure, with --std-error)")
        p.add_argument("--std-error", dest="std_error", help="column of the estimates' standard errors")
        _add_text_format_options(p)
        # --- many files, or a cluster (pooling.dask_stats; needs the extra pooling[dask]) -------
        p.add_argument(
            "--cluster",
            metavar="ADDRESS",
            help="compute the group statistics on the Dask scheduler at ADDRESS, e.g. tcp://10.0.0.5:8786 "
            "(the files must be readable at the same path by every worker). Without it, a DATA that "
            "is a folder or a quoted glob such as 'parts/*.parquet' is read with Dask on this "
            "machine. Needs: pip install pooling[dask]",
        )
        # --- end of many files ---------------------------------------------------------------
    g = p.add_argument_group("model")
    g.add_argument(
        "--within",
        choices=["separate", "shared", "known"],
        help="within-group variance structure (default: separate; known with --estimate)",
    )
    g.add_argument(
        "--between",
        default="heavy",
        metavar="FORM",
        help="between-group distribution: heavy (default: Student-t, its df learned from the data, so "
        "that an outlying group neither drags the others nor is dragged), heavy:DF (df fixed), or "
        "normal",
    )
    g.add_argument("--mu", default="flat", help="prior on mu: flat (default) or normal:LOC:SCALE")
    g.add_argument(
        "--tau",
        default="flat",
        help="prior on tau: flat (default; needs 3+ groups), half-normal:SCALE or half-cauchy:SCALE",
    )
    g.add_argument(
        "--s2", default="reciprocal", help="prior on s^2 (separate): reciprocal (default, ∝ 1/s^2) or gamma:SHAPE:RATE"
    )
    g.add_argument(
        "--sigma2",
        default="reciprocal",
        help="prior on the shared sigma^2 (shared): reciprocal (default, ∝ 1/sigma^2, flat on log sigma) or "
        "scaled-inv-chi2:DOF:SCALE2 (as if DOF earlier degrees of freedom had given the variance "
        "SCALE2, in squared units of the data)",
    )
    g.add_argument("--nu", help="hold nu (separate) at this value")
    g.add_argument(
        "--nu-grid",
        dest="nu_grid",
        help="comma-separated grid of nu values, equal prior weights (default: 1,1.5,2,3,4,5,6,8,10,14,20,30,50,100)",
    )
    # --- group-level predictors: why groups differ ------------------------------------------------
    g.add_argument(
        "--category",
        action="append",
        metavar="COL",
        help="a categorical group-level predictor: a column holding each group's level (a method, an "
        "instrument, a region), one value per group; each level is compared with a reference level. "
        "Repeat for more",
    )
    g.add_argument(
        "--numeric",
        action="append",
        metavar="COL",
        help="a numeric group-level predictor (an age, an altitude), one value per group, centred at its "
        "mean over the groups and kept in its own units. Repeat for more",
    )
    g.add_argument(
        "--reference",
        action="append",
        metavar="COL=LEVEL",
        help="the reference level of a --category column (default: the level with the most groups)",
    )
    g.add_argument(
        "--effects",
        default="flat",
        metavar="PRIOR",
        help="prior on the predictors' effects: flat (default) or normal:SCALE (centred at 0; SCALE in the "
        "data's units, per unit of the column for a numeric predictor)",
    )
    # --- end of group-level predictors -----------------------------------------------------------
    r = p.add_argument_group("run")
    r.add_argument("--chains", type=int, default=4)
    r.add_argument("--draws", type=int, default=1000, help="draws per chain before run-length control (default 1000)")
    r.add_argument("--warmup", type=int, default=1000, help="warm-up sweeps per chain (default 1000)")
    r.add_argument("--max-draws", dest="max_draws", type=int, help="cap on draws per chain (default 4 x --draws)")
    r.add_argument("--seed", type=int, help="seed for reproducible draws (default: fresh, recorded in summary.json)")
    r.add_argument("--threads", type=int, help="threads for the chains (default: min(chains, cores))")
    o = p.add_argument_group("output")
    o.add_argument(  # refit checks it itself, after the store option (main() returns 2 rather than exit)
        "--out", required=data, help="run folder to create" + (" (required)" if out_required and not data else "")
    )
    o.add_argument("--replace", action="store_true", help="replace the run folder if it exists")
    o.add_argument("--quiet", action="store_true", help="no progress bar and no table")

    # --- reporter options (pooling.report; read by report.ReportOptions.from_args) -------------
    def _finite(text):
        try:
            x = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, found '{text}'") from None
        if x != x or x in (float("inf"), float("-inf")):
            raise argparse.ArgumentTypeError(f"expected a finite number, found '{text}'")
        # the reporter computes in the user's units, as for data (stats.choose_unit): within 1e+-100
        if abs(x) > REPORT_RANGE:
            raise argparse.ArgumentTypeError(
                f"expected a number of magnitude at most {REPORT_RANGE:.0e} (the "
                f"range the report computes in), found '{text}'"
            )
        return x

    def _positive(text):
        x = _finite(text)
        if x <= 0:
            raise argparse.ArgumentTypeError(f"expected a number above 0, found '{text}'")
        if x < 1 / REPORT_RANGE:
            raise argparse.ArgumentTypeError(
                f"expected a number of at least {1 / REPORT_RANGE:.0e} (the range the "
                f"report computes in), found '{text}'"
            )
        return x

    def _level(text):
        x = _finite(text)
        if not 0 < x < 1:
            raise argparse.ArgumentTypeError(f"expected a level between 0 and 1 (for example 0.9), found '{text}'")
        return x

    def _count(text):
        try:
            k = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, found '{text}'") from None
        if k < 1:
            raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, found '{text}'")
        return k

    q = p.add_argument_group("report")
    q.add_argument("--level", type=_level, default=0.95, metavar="L", help="credible interval level (default 0.95)")
    q.add_argument(
        "--top",
        type=_count,
        metavar="K",
        help="report P(among the K best); K at most the number of groups (default 3, or every group when there "
        "are fewer)",
    )
    q.add_argument(
        "--best",
        choices=["highest", "lowest"],
        default="highest",
        help="which end of the scale is best for ranks (default highest)",
    )
    q.add_argument("--threshold", type=_finite, metavar="X", help="report P(theta_j above / below this value)")
    q.add_argument("--lower-limit", dest="lower_limit", type=_finite, metavar="X", help="lower specification limit")
    q.add_argument("--upper-limit", dest="upper_limit", type=_finite, metavar="X", help="upper specification limit")
    q.add_argument(
        "--allowed-bias",
        dest="allowed_bias",
        type=_positive,
        metavar="D",
        help="report P(|theta_j - mu| > this) for each group",
    )
    q.add_argument(
        "--compare",
        action="append",
        metavar="GROUPS",
        help="groups for the head-to-head matrix P(theta_a > theta_b): repeat the option, or list "
        "labels separated by commas",
    )
    q.add_argument(
        "--assigned-value",
        dest="assigned_value",
        type=_finite,
        metavar="X",
        help="x_pt for z-scores (default: ISO 13528 Algorithm A robust mean of the group means)",
    )
    q.add_argument(
        "--sigma-pt",
        dest="sigma_pt",
        type=_positive,
        metavar="S",
        help="sigma_pt for z-scores (default: ISO 13528 Algorithm A robust sd of the group means)",
    )
    q.add_argument(
        "--decide-at",
        dest="decide_at",
        default="0.95",
        metavar="P",
        help="a group is on a side of --threshold (or outside or inside the limits) when its probability "
        "is at least P, otherwise undecided (default 0.95)",
    )
    q.add_argument(
        "--labs",
        action="store_true",
        help="the groups are laboratories in a round: show the interlaboratory view (also shown when "
        "--assigned-value or --sigma-pt is given)",
    )
    # --- end of reporter options -------------------------------------------------------------
    # --- summary mode (pooling.summary): many groups in bounded memory -------------------------
    m = p.add_argument_group("summary mode (many groups)")
    m.add_argument(
        "--summary",
        choices=["auto", "on", "off"],
        default="auto",
        help="keep running per-group summaries instead of every draw: auto (default) above 20,000 "
        "groups or when the draws would exceed 8 GiB; draws.nc then holds the hyperparameters and "
        "the kept groups only, groups.csv every group",
    )
    m.add_argument(
        "--keep",
        action="append",
        metavar="GROUPS",
        help="in summary mode, keep every draw of these groups (repeat the option, or separate labels "
        "with commas); groups named by --compare are kept too",
    )
    m.add_argument(
        "--keep-sample",
        dest="keep_sample",
        type=int,
        default=200,
        metavar="N",
        help="in summary mode, also keep every draw of N groups drawn by a fixed rule (default 200)",
    )
    m.add_argument(
        "--summary-bins",
        dest="summary_bins",
        type=int,
        default=64,
        metavar="B",
        help="histogram bins per group for interval limits in summary mode (default 64; the limits' "
        "error bound is one bin)",
    )
    # --- end of summary mode -------------------------------------------------------------------


class _Parser(argparse.ArgumentParser):
    """argparse, with its refusals on one line (a usage block would bury what was wrong in a nightly log)."""

    def error(self, message):
        self.exit(E.EXIT_BAD_INPUT, _one_line(f"pooling: bad option: {message} (see `{self.prog} --help`)") + "\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="pooling",
        description="Compare many groups with a partial-pooling normal model.",
        epilog="exit codes: 0 success; 2 bad input; 3 results written but diagnostics targets missed; "
        "4 nothing new to do; 5 stopped by the user; 6 output cannot be written; 1 internal error",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    p_fit = sub.add_parser("fit", help="fit grouped measurements and write a run folder")
    _add_fit_options(p_fit)
    p_demo = sub.add_parser("demo", help="fit the embedded demo data (36 invented suppliers) and write a run folder")
    _add_fit_options(p_demo, data=False)
    p_demo.set_defaults(seed=1)
    _add_store_parsers(sub)  # the store of batches: ingest, batches, withdraw, refit, history
    return parser


# ---------------------------------------------------------------------------------------------
# the commands


def _stats_from_args(args):
    from . import stats as S

    modes = {
        "value": args.value is not None,
        "summary": any(x is not None for x in (args.size, args.mean, args.sd)),
        "known": args.estimate is not None or args.std_error is not None,
    }
    if sum(modes.values()) != 1:
        raise E.InputError(
            "bad options: give exactly one of --value COL (measurements), --size/--mean/--sd COLs "
            "(one row per group) or --estimate/--std-error COLs (estimates with standard errors)"
        )
    read = {
        "encoding": args.encoding,
        "delimiter": args.delimiter,
        "thousands": args.thousands,
        "decimal": "," if args.decimal_comma else None,
    }
    # --- many files, or a cluster: the statistics step on Dask (pooling.dask_stats) ----------
    from . import dask_stats

    extra = list(getattr(args, "category", None) or []) + list(getattr(args, "numeric", None) or [])
    if getattr(args, "cluster", None) or dask_stats.looks_like_many(args.data):
        if extra:
            raise E.InputError(
                "bad options: --category and --numeric columns are read from one file; a folder, a glob "
                "or --cluster does not read them"
            )
        if not modes["value"]:
            raise E.InputError(
                "bad options: a folder, a glob or --cluster reads measurements (--value COL); "
                "one row per group or estimates with standard errors come in one file"
            )
        return dask_stats.read_table_dask(args.data, args.group, args.value, scheduler=args.cluster, **read)
    # --- end of many files ---------------------------------------------------------------------
    if modes["value"]:
        return S.read_table(args.data, args.group, args.value, group_columns=extra, **read)
    if modes["summary"]:
        if None in (args.size, args.mean, args.sd):
            raise E.InputError("bad options: one row per group needs all of --size, --mean and --sd")
        return S.from_summaries(args.data, args.group, args.size, args.mean, args.sd, group_columns=extra, **read)
    if None in (args.estimate, args.std_error):
        raise E.InputError("bad options: estimates need both --estimate and --std-error")
    return S.from_estimates(args.data, args.group, args.estimate, args.std_error, group_columns=extra, **read)


def _decide_at(text) -> float:
    """--decide-at: a probability above 0.5 and below 1 (checked after parsing, so the message is one line)."""
    x = _num(str(text), "--decide-at")
    if not 0.5 < x < 1:
        raise E.InputError(f"bad option --decide-at: expected a probability above 0.5 and below 1, found '{text}'")
    return x


def _model_from_args(args, stats):
    from .model import Model

    within = args.within or ("known" if stats.kind == "known" else "separate")
    return Model(
        within=within,
        mu=parse_prior(args.mu, "--mu"),
        tau=parse_prior(args.tau, "--tau"),
        s2=parse_prior(args.s2, "--s2"),
        sigma2=parse_prior(getattr(args, "sigma2", None) or "reciprocal", "--sigma2"),
        nu=_nu(args),
        between=getattr(args, "between", None) or "heavy",
        predictors=_predictors_from_args(args, stats),
        effects=_effects(getattr(args, "effects", None)),
    )


def _predictors_from_args(args, stats) -> tuple:
    """--category, --numeric and --reference as model.Category and model.Numeric, in the order given
    (categories first). --reference COL=LEVEL is matched against the --category columns, so that a column or a
    level may itself hold '='."""
    from .model import Category, Numeric

    cats = list(getattr(args, "category", None) or [])
    nums = list(getattr(args, "numeric", None) or [])
    refs: dict[str, str] = {}
    for text in getattr(args, "reference", None) or []:
        col = next((c for c in sorted(cats, key=len, reverse=True) if text.startswith(c + "=")), None)
        if col is None:
            raise E.InputError(
                f"bad option --reference: expected COLUMN=LEVEL with COLUMN one of the --category "
                f"columns ({', '.join(cats) or 'none given'}); found '{text}'"
            )
        if col in refs:
            raise E.InputError(f"bad option --reference: the reference level of '{col}' is given twice")
        refs[col] = text[len(col) + 1 :]
    for col in cats + nums:
        if (cats + nums).count(col) > 1:
            raise E.InputError(f"bad options: the column '{col}' is named twice among --category and --numeric")
    return tuple(Category(c, refs.get(c)) for c in cats) + tuple(Numeric(c) for c in nums)


def _effects(text):
    """--effects: flat or normal:SCALE (a normal prior centred at 0 on every effect)."""
    from . import model as m

    if text is None or text.strip().lower() == "flat":
        return m.Flat()
    parts = text.strip().lower().split(":")
    if parts[0] != "normal" or len(parts) != 2:
        raise E.InputError(f"bad option --effects: expected flat or normal:SCALE; found '{text}'")
    scale = _num(parts[1], "--effects")
    if not scale > 0:
        raise E.InputError(f"bad option --effects: the scale must be above 0; found '{parts[1]}'")
    return m.Normal(0.0, scale)


MAX_CHAINS = 1000
MAX_SWEEPS = 10_000_000


def _settings_from_args(args):
    from .sampler import Settings

    if args.chains is not None and args.chains > MAX_CHAINS:
        # each chain keeps its own state, generator and warm-up: a million chains exhaust memory before
        # the first draw, and more chains give no better estimate than longer ones
        raise E.InputError(
            f"bad option --chains: at most {MAX_CHAINS} chains; found {args.chains}; ask for more "
            "draws per chain (--draws) instead"
        )
    for option, value in (("--warmup", args.warmup), ("--draws", args.draws), ("--max-draws", args.max_draws)):
        # this sampler settles within hundreds of sweeps and reaches its ESS targets within thousands; a
        # chain that has not after ten million will not after more: a different prior is the cure
        if value is not None and value > MAX_SWEEPS:
            raise E.InputError(
                f"bad option {option}: at most {MAX_SWEEPS:,} sweeps per chain; found {value:,}. "
                "A few thousand are plenty when the diagnostics pass; if they do not, try a proper "
                "prior on tau rather than longer chains"
            )

    return Settings(
        chains=args.chains,
        draws=args.draws,
        warmup=args.warmup,
        seed=args.seed,
        max_draws=args.max_draws,
        threads=args.threads,
    )


def run_fit(args, stats, argv, *, init=None, more=None, after=None, protect=()) -> int:
    """Fit, compute the answers, write the run folder, print. `init`: chains' starting states; `more(fit, res,
    folder)` adds files to the folder before it is renamed into place; `after(fit, res, out)` runs once the
    folder is in place (a refit records the run there) and returns what changed since the last run (a refit's
    change report, which the terminal prints after the answer) or None; `protect`:
    (what, path) pairs that --out may not be or hold (the input files, the store)."""
    from . import fit as do_fit
    from .asked import ReportOptions, check_k
    from .output import check_target, write_run
    from .results import compute, resolve_groups
    from .terminal import print_results

    model = _model_from_args(args, stats)
    settings = _settings_from_args(args)
    check_target(Path(args.out), args.replace, protect)  # refuse before sampling, not after
    options = ReportOptions.from_args(args)  # every report option is checked before sampling
    from .asked import split_compare

    resolve_groups(tuple(stats.labels), split_compare(options.compare, tuple(stats.labels)))
    check_k(options.k, stats.J, "--top")  # more than the groups there are is refused, not cut
    # --- hardening: extreme magnitudes -------------------------------------------------------------
    # The statistics and the sampler hold data of 1e-300 or 1e300 in a power-of-two unit, but the
    # reporter computes in the user's units, where a variance of such numbers under- or overflows
    # (wrong spreads at 1e-300, a crash at 1e300). Refuse before sampling rather than write a wrong report.
    if stats.unit != 1.0:
        from .stats import unit_hint

        raise E.InputError(
            f"bad input in '{stats.source}': the values are of magnitude near {stats.unit:.0e}, beyond what the "
            f"report can show; express them in other units (for example times {unit_hint(stats.unit)}) and fit again, "
            "or fit from Python with pooling.fit, whose draws keep these units"
        )
    # --- end of hardening block ----------------------------------------------------------------------
    summary = _summary_args(args, stats, more, options)
    _check_memory(args, stats.J, model, settings, summary["summary"])
    fit = do_fit(stats, model, settings, progress=False if args.quiet else None, init=init, **summary)
    _check_finite(fit, stats)
    holder: dict = {}

    def answers():  # computed while draws.nc is written (output.write_run)
        holder["res"] = compute(fit, options)
        return holder["res"]

    extra = None if more is None else (lambda folder: more(fit, holder["res"], folder))
    out = write_run(
        fit,
        answers,
        Path(args.out),
        replace=args.replace,
        command=["pooling"] + list(argv),
        extra=extra,
        protect=protect,
    )
    res = holder["res"]
    recorded = False
    try:
        changes = None
        if after is not None:
            with _STOPS.deferred():  # a stop while the store records the run waits until it is recorded
                changes = after(fit, res, out)
                recorded = True
        if not args.quiet:
            _printing(lambda: print_results(res, out, changes=changes))
    except KeyboardInterrupt:  # the folder is complete and in place: say so, not "nothing was written"
        if after is None:
            state = ""
        elif recorded:
            state = " and recorded in the store"
        else:
            state = "; the store has not recorded this run, so the next refit fits again"
        raise E.Interrupted(f"stopped by the user after the run folder '{out}' was written{state}") from None
    if not res.targets_met:
        run = res.run
        from .report.numbers import plural, rerun_advice

        missed = plural(res.diagnostics["missed_count"], "quantity", "quantities")
        _say(
            f"warning: diagnostics targets missed for {missed} after "
            f"{run['draws_per_chain']} draws per chain; results were written to '{out}' but need care: "
            f"{rerun_advice(res.diagnostics, run['draws_requested'])} (see summary.json, 'diagnostics')"
        )
        return E.EXIT_TARGETS_MISSED
    return E.EXIT_OK


def _check_finite(fit, stats) -> None:
    """Refuse to write (or record) a run whose draws of mu or tau are not finite numbers. Seen with
    forgetting weights so small that every group's effective n is below about 1e-3: the variance block
    then overflows, whatever the priors, and every answer would be NaN."""
    import numpy as np

    draws = getattr(fit, "kept", fit).draws  # summary mode: the kept fit holds the run's hyperparameter draws
    for name in ("mu", "tau"):
        x = draws(name)
        if not np.all(np.isfinite(x)):
            n = np.asarray(stats.n, dtype=float)
            raise E.ModelError(
                f"bad model: {np.mean(~np.isfinite(x)):.0%} of the draws of {name} are not finite numbers: "
                f"the data carry too little weight for the sampler (the largest group size, or effective "
                f"n after forgetting, is {n.max():.3g}); nothing was written. Give more data, or a "
                "longer --half-life"
            )


def _physical_memory() -> int | None:
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, OSError, ValueError):
        return None


#: The run needs about this many times the memory of the draws it keeps: the draws in the user's units,
#: the diagnostics' sorted copies and the answers' per-draw tables come on top (measured with
#: `pooling fit`, default model, 4 chains: peak memory grew by 1.15 to 1.7 times the kept draws'
#: bytes at 500 and 2,000 groups; 2 leaves room for the extension rounds' joining).
MEMORY_FACTOR = 2.0
#: Beyond this many group-sweeps (chains x (warm-up + draws at the cap) x groups) a run takes days: the
#: kernel does about 40 to 50 ns per group and sweep on one core (DEVELOPERS.md), so 1e13 is 5 days.
MAX_GROUP_SWEEPS = 1e13


def _check_memory(args, J: int, model, settings, summary) -> None:
    """Refuse, before anything is allocated, draws that cannot fit in this machine's memory, and a run
    whose sweeps would take days.

    Every draw up to the cap is kept: chains x cap x 8 bytes x (the numbers kept per draw). A draw keeps
    mu, tau, the kernel's count, s and nu (`separate`), df (heavy tails) and, per group, theta, sigma
    (`separate`) and lambda (heavy tails); in summary mode the kept groups' theta, sigma, lambda and rank.
    The whole run needs about MEMORY_FACTOR times that.
    """
    from . import summary as S

    within = model.within
    sep = within == "separate"
    heavy = getattr(model.between, "name", "heavy") != "normal"
    if summary in (None, "auto"):
        summary = J > S.AUTO_GROUPS or S.full_draw_bytes(J, within, settings) > S.AUTO_BYTES
    elif summary == "on":
        summary = True
    elif summary == "off":
        summary = False
    scalars = 3 + (2 if sep else 0) + (1 if heavy else 0)
    if summary:
        kept = min(
            J,
            len(getattr(args, "keep", None) or [])
            + len(getattr(args, "compare", None) or [])
            + max(0, getattr(args, "keep_sample", 200) or 0)
            + S.TOP_KEEP,
        )
        per_draw = scalars + 1 + kept * (2 + sep + heavy)
    else:
        per_draw = scalars + J * (1 + sep + heavy) + (1 if within == "shared" else 0)
    cap = settings.draw_cap
    sweeps = float(settings.chains) * (settings.warmup + cap) * max(J, 1)
    if sweeps > MAX_GROUP_SWEEPS:
        days = sweeps * 45e-9 / 86400
        raise E.InputError(
            f"bad options --warmup/--draws: {settings.chains} chains x ({settings.warmup} warm-up + "
            f"{cap} draws at the cap) x {J} groups are {sweeps:.2g} group-sweeps, about {days:.0f} days "
            f"of one core; at most {MAX_GROUP_SWEEPS:.0e}: ask for fewer sweeps (a few thousand per "
            "chain are plenty when the diagnostics pass)"
        )
    keep = settings.chains * cap * per_draw * 8
    need = int(keep * MEMORY_FACTOR)
    have = _physical_memory()
    if have is None or need <= have:
        return
    which = "--max-draws" if settings.max_draws is not None else "--draws (the cap is 4 x --draws)"
    raise E.InputError(
        f"bad option {which.split()[0]}: {settings.chains} chains x {cap} draws at the cap x {per_draw} "
        f"numbers per draw x 8 bytes are {_gib(keep)} of draws, and the run needs about "
        f"{MEMORY_FACTOR:g} times that ({_gib(need)} of memory), more than this machine's {_gib(have)}; "
        f"ask for fewer draws with {which}" + ("" if summary else ", or use summary mode (--summary on)")
    )


def _gib(nbytes: int) -> str:
    return f"{nbytes / 2**40:.1f} TiB" if nbytes >= 2**40 else f"{nbytes / 2**30:.1f} GiB"


def _inputs(data) -> list[tuple[str, str]]:
    """What --out may not be or hold: the input file, or the files and folder of a glob or a folder."""
    text = str(data)
    if "://" in text:
        return []
    try:
        if any(ch in text for ch in "*?[") and not Path(text).exists():
            import glob

            return [("the input file", f) for f in sorted(glob.glob(text, recursive=True))]
        return [("the input folder" if Path(text).is_dir() else "the input file", text)]
    except OSError:  # a name the file system refuses: nothing there to protect
        return []


def cmd_fit(args, argv) -> int:
    return run_fit(args, _stats_from_args(args), argv, protect=_inputs(args.data))


def demo_path() -> Path:
    return Path(str(resources.files("pooling") / "data" / DEMO_FILE))


def cmd_demo(args, argv) -> int:
    from . import stats as S

    args.out = args.out or "pooling-demo"
    stats = S.read_table(demo_path(), "supplier", "strength_mpa")
    if not args.quiet:
        _printing(
            print, "demo: tensile strength (MPa) of test bars from 36 invented casting suppliers, 2 to 52 bars each"
        )
    return run_fit(args, stats, argv, protect=_inputs(demo_path()))


# --- summary mode (pooling.summary) -------------------------------------------------------------
def _summary_args(args, stats, more, options) -> dict:
    """pooling.fit's summary-mode arguments. A refit (`more` set) keeps every draw: its change report
    compares the draws of every group."""
    choice = getattr(args, "summary", None) or "auto"
    if more is not None:
        if choice == "on":
            raise E.InputError(
                "bad options: --summary on is not available with refit, whose change report "
                "compares every group's draws; use --summary off or auto"
            )
        return {"summary": False}
    from .asked import split_compare
    from .summary import SummaryOptions

    keep = split_compare(
        list(getattr(args, "keep", None) or []) + list(getattr(args, "compare", None) or []), stats.labels
    )
    sopts = SummaryOptions(keep=keep, sample=getattr(args, "keep_sample", 200), bins=getattr(args, "summary_bins", 64))
    return {"summary": choice, "options": options, "keep": sopts}


# --- end of summary mode ---------------------------------------------------------------------------


# ---------------------------------------------------------------------------------------------
# the store of batches (nightly reruns): pooling ingest | batches | withdraw | refit | history | checkup | copy-store

STORE_HELP = (
    "the store: a file path (SQLite; created by ingest), a PostgreSQL URL postgresql://HOST/DATABASE "
    "or a libpq service written service=NAME, either followed by #STORE to choose the store inside the "
    "database (default #pooling). Passwords come from the password file or a service file, never from "
    "the command line"
)


def _add_store_parsers(sub):
    p = sub.add_parser("ingest", help="add one delivery of measurements to a store of batches (creating the store)")
    p.add_argument("store", help=STORE_HELP)
    p.add_argument("file", help="CSV or Parquet file: one row per measurement")
    p.add_argument("--group", required=True, help="column holding the group label")
    p.add_argument("--value", required=True, help="column of measurements")
    p.add_argument("--batch", help="name of the batch in the ledger (default: the file's name)")
    p.add_argument(
        "--at",
        help="the batch's own date, e.g. 2024-05-31 or 2024-05-31T06:00+02:00 (default: now; "
        "UTC when no offset is given); ages for --half-life count from it",
    )
    p.add_argument(
        "--replace",
        action="store_true",
        help="replace the batch of the same name, or take back content that was withdrawn (the ledger keeps the "
        "old record, and a withdrawn batch's time and reason of withdrawal)",
    )
    _add_text_format_options(p)
    p.add_argument(
        "--column",
        action="append",
        metavar="COL",
        help="a group-level column to keep with the batch (a method, an instrument, an age): one value per "
        "group, the same in every batch; refit uses it with --category COL or --numeric COL. Every "
        "active batch keeps the same columns. Repeat for more",
    )
    p.add_argument(
        "--same-quantity",
        action="store_true",
        help="the file's value column (or group column) has a name no active batch uses, but holds the same "
        "quantity (grouping): the column was only renamed. Without it such a batch is refused, as a delivery "
        "of another quantity",
    )
    p.add_argument("--quiet", action="store_true", help="print nothing on success")
    p = sub.add_parser("batches", help="list the ledger of a store: every batch, its status, and the recorded runs")
    p.add_argument("store", help=STORE_HELP)
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p = sub.add_parser("withdraw", help="withdraw a batch (a bad delivery); the ledger keeps its record")
    p.add_argument("store", help=STORE_HELP)
    p.add_argument("batch", help="name of the batch, as `pooling batches` shows it")
    p.add_argument("--reason", help="a note kept in the ledger")
    p = sub.add_parser("history", help="write one page of how the answers moved over a store's recorded runs")
    p.add_argument("store", help=STORE_HELP)
    p.add_argument(
        "--out",
        required=True,
        help="the page to write, for example history.html (a history page there is replaced; any other file is refused)",
    )
    p = sub.add_parser(
        "refit",
        help="merge every active batch, fit, write the run folder (with what changed and "
        "the history so far) and record the run in the store",
    )
    p.add_argument("store", help=STORE_HELP)
    _add_fit_options(p, data=False, out_required=True)
    f = p.add_argument_group("store")
    f.add_argument(
        "--half-life",
        dest="half_life",
        metavar="DAYS",
        help="forget old batches: a batch DAYS old counts with weight "
        "0.5^(age/DAYS) on its n and M2 (default: no forgetting)",
    )
    f.add_argument("--as-of", dest="as_of", metavar="DATE", help="reference date for batch ages (default: now)")
    f.add_argument(
        "--force",
        action="store_true",
        help="refit even when no batch was added or withdrawn since the last recorded run (otherwise exit 4)",
    )
    f.add_argument(
        "--fresh-start",
        dest="fresh_start",
        action="store_true",
        help="start the chains afresh instead of from the last run's final states",
    )
    # the change report reads --threshold, --lower-limit, --upper-limit, --level, --best and --decide-at
    p = sub.add_parser(
        "checkup",
        help="check a whole store: every checksum, the schema version and (SQLite) the "
        "file's integrity; one line per problem",
        epilog="exit codes: 0 the store is sound; 2 problems were found (each printed on its own line) "
        "or it is not a store; 6 the store cannot be reached, try again later",
    )
    p.add_argument("store", help=STORE_HELP)
    p = sub.add_parser(
        "copy-store",
        help="copy a whole store, with its history and recorded runs, into a new store "
        "(SQLite to PostgreSQL or back); verified number by number before it is committed",
    )
    p.add_argument("source", help="the store to copy (" + STORE_HELP + ")")
    p.add_argument(
        "target",
        help="the new store: a file that does not exist yet, or a store name not yet used in a PostgreSQL database",
    )


def _opt_num(args, name, flag):
    v = getattr(args, name, None)
    return None if v is None else v if isinstance(v, (int, float)) else _num(v, flag)


def _watch_from_args(args):
    from .store.changes import Watch

    return Watch(
        threshold=_opt_num(args, "threshold", "--threshold"),
        lower=_opt_num(args, "lower_limit", "--lower-limit"),
        upper=_opt_num(args, "upper_limit", "--upper-limit"),
        decide_at=_opt_num(args, "decide_at", "--decide-at"),
        level=_opt_num(args, "level", "--level") or 0.95,
        best=getattr(args, "best", None) or "highest",
    )


def _shown(store: str) -> str:
    """The store argument as it may be printed (a URL's password is refused before anything is printed)."""
    from .store.location import parse_location

    return parse_location(store).display


def cmd_ingest(args, argv) -> int:
    from .store import jobs

    columns = list(args.column or [])
    info, created = jobs.ingest_file(
        args.store,
        args.file,
        args.group,
        args.value,
        batch=args.batch,
        at=args.at,
        replace=args.replace,
        encoding=args.encoding,
        delimiter=args.delimiter,
        thousands=args.thousands,
        decimal="," if args.decimal_comma else None,
        columns=columns,
        same_quantity=args.same_quantity,
    )
    if not args.quiet:
        if created:
            print(f"created the store '{_shown(args.store)}'")
        kept = f", with the group-level columns {', '.join(repr(c) for c in columns)}" if columns else ""
        print(
            f"ingested batch '{info.name}': {info.rows} measurements in {info.groups} groups{kept}, dated "
            f"{info.dated_at} (sha256 {info.sha256[:12]})"
        )
    return E.EXIT_OK


def _kept(columns: dict, batch_id: int, text: bool = False):
    """The group-level columns a batch keeps, as `pooling batches` shows them: None (JSON) or a pointer to checkup
    (text) for a batch whose statistics fail their checksum."""
    names = columns.get(batch_id)
    if names is None:
        return "(damaged: see pooling checkup)" if text else None
    return ", ".join(names) if text else list(names)


def cmd_batches(args, argv) -> int:
    import json

    from .report.numbers import plural
    from .store import jobs

    batches, runs, columns = jobs.ledger_listing(args.store)
    if args.json:
        print(
            json.dumps(
                {
                    "store": _shown(args.store),
                    "batches": [
                        {**b.to_dict(), "columns": _kept(columns, b.id), "checksum_ok": b.id in columns}
                        for b in batches
                    ],
                    "runs": [
                        {
                            "id": r.id,
                            "created_at": r.created_at,
                            "folder": r.folder,
                            "state_sha256": r.state_sha256,
                            "batch_ids": list(r.batch_ids),
                            "half_life_days": r.half_life_days,
                            "targets_met": r.targets_met,
                        }
                        for r in runs
                    ],
                },
                indent=2,
                ensure_ascii=False,
            )
        )
        return E.EXIT_OK
    from .terminal import text_table

    head = [("id", ">"), ("name", "<"), ("status", "<"), ("rows", ">"), ("groups", ">"), ("dated", "<")]
    head += [("changed", "<"), ("sha256", "<"), ("columns", "<"), ("note", "<")]
    cells = [
        [b.id, b.name, b.status, b.rows, b.groups, b.dated_at, b.changed_at, b.sha256[:12]]
        + [_kept(columns, b.id, text=True), b.note]
        for b in batches
    ]
    for line in text_table(head, cells):
        print(line)
    active = sum(b.status == "active" for b in batches)
    print(f"{len(batches)} batches in the ledger, {active} active; {len(runs)} recorded runs", end="")
    damaged = sum(b.id not in columns for b in batches)
    if damaged:
        print(f"; {plural(damaged, 'batch', 'batches')} failing their checksum (see pooling checkup)", end="")
    if runs:
        r = runs[-1]
        print(
            f"; the last, run {r.id} of {r.created_at}, is in '{r.folder}'"
            + ("" if r.targets_met else " (diagnostics targets missed)"),
            end="",
        )
    print()
    return E.EXIT_OK


def cmd_withdraw(args, argv) -> int:
    from .store import jobs

    info = jobs.withdraw_batch(args.store, args.batch, args.reason)
    print(f"withdrew batch '{info.name}' ({info.rows} measurements) at {info.changed_at}; the next refit leaves it out")
    return E.EXIT_OK


def cmd_refit(args, argv) -> int:
    from .store import jobs

    if args.out is None:
        raise E.InputError("bad options: refit needs --out DIR, the run folder to create")
    half = _opt_num(args, "half_life", "--half-life")
    watch = _watch_from_args(args)
    shown = _shown(args.store)  # refuses a URL holding a password before anything is read or written
    plan = jobs.plan_refit(args.store, half_life_days=half, as_of=args.as_of, force=args.force)
    if plan.stats.J == 0 and half is not None:
        _all_weights_underflowed(plan, half)
    _check_store_columns(args, plan.stats, shown)
    model = _model_from_args(args, plan.stats)
    if half is not None:
        _check_weighted(plan, half, model)
    init = None if args.fresh_start else plan.init_for(model, args.chains)
    settings = {
        "chains": args.chains,
        "draws": args.draws,
        "warmup": args.warmup,
        "max_draws": args.max_draws,
        "seed": args.seed,
        "warm_start": init is not None,
    }

    def after(fit, res, out):  # the run is recorded before anything is printed: a closed pipe cannot lose it
        try:
            jobs.record_run(plan, fit, out, settings)
        except E.PoolingError as exc:  # the folder is complete: say so, and that the next refit fits again
            exc.args = (f"the run folder '{out}' was written, but the store did not record the run: {exc}",)
            raise
        return plan.report

    def more(fit, res, folder):
        report = jobs.write_changes(plan, fit, watch, folder)
        # the history as it will stand once this run is recorded: the recorded runs and this one
        from .report.history import HISTORY_FILE, write_history

        ledger, runs = jobs.list_batches(plan.store_path)
        write_history(
            folder / HISTORY_FILE,
            _store_name(shown),
            ledger,
            runs + [jobs.run_record(plan, fit, Path(args.out), settings)],
        )
        return report

    store = str(args.store)
    protect = [("the store", store)] + [
        ("the store's journal", store + x) for x in ("-wal", "-shm", "-journal") if Path(store + x).exists()
    ]
    argv = [shown if a == args.store else a for a in argv]  # summary.json records the command as shown
    return run_fit(args, plan.stats, argv, init=init, more=more, after=after, protect=protect)


def _check_store_columns(args, stats, shown: str) -> None:
    """A refit's predictors are the --category and --numeric columns it names (as for `pooling fit`), read from the
    group-level columns the store's active batches keep (`pooling ingest --column`)."""
    kept = sorted(stats.columns)
    for option in ("category", "numeric"):
        for col in getattr(args, option, None) or []:
            if col not in stats.columns:
                have = ", ".join(f"'{c}'" for c in kept) if kept else "none"
                raise E.InputError(
                    f"bad option --{option}: the store '{shown}' keeps no group-level column '{col}' "
                    f"with its active batches (it keeps: {have}); ingest the batches with --column "
                    f"{col}, or leave out --{option} {col}"
                )


def _all_weights_underflowed(plan, half: float) -> None:
    """Every batch's weight 0.5^(age/half-life) is below the smallest double: say so, with the ages."""
    from .store.combine import age_days

    ages = [age_days(b.dated_at, plan.reference) for b in plan.snapshot.batches]
    young = "" if min(ages) == max(ages) else f", the youngest {min(ages):.4g} days"
    raise E.InputError(
        f"bad option --half-life: every batch's weight 0.5^(age/half-life) underflows to zero at a "
        f"half-life of {half:g} days: the oldest batch is {max(ages):.4g} days old "
        f"({max(ages) / half:.4g} half-lives){young}, and a weight stays above zero only within about "
        "1074 half-lives; give a longer --half-life"
    )


def _fits(stats, model) -> str | None:
    """None when `model` can be fitted to `stats`, else the model's own one-line refusal."""
    from .model import build

    try:
        build(stats, model)
    except E.ModelError as exc:
        return str(exc)
    return None


def _check_weighted(plan, half: float, model) -> None:
    """A half-life that leaves too little weight for `model` (while the unweighted batches would do) is
    refused as such, with the figures: the largest effective n, the newest batch's weight, and about the
    shortest half-life that would do."""
    import math

    import numpy as np

    from .stats import _show
    from .store.combine import combine, forgetting_weights

    why = _fits(plan.stats, model)
    if why is None:
        return
    batches = list(plan.snapshot.batches)

    def weighed(h):
        w = forgetting_weights(batches, plan.reference, h) if h is not None else None
        return combine(plan.snapshot.stats, w, source=plan.stats.source)

    if _fits(weighed(None), model) is not None:
        return  # the data without forgetting are refused too: the model's own message says why
    lo, hi = half, half * 2.0
    while _fits(weighed(hi), model) is not None and hi < 1e300:
        lo, hi = hi, hi * 2.0
    for _ in range(30):  # bisection on a log scale, to about 2% of the half-life
        if hi / lo < 1.02:
            break
        mid = math.sqrt(lo * hi)
        lo, hi = (lo, mid) if _fits(weighed(mid), model) is None else (mid, hi)
    n = np.asarray(plan.stats.n, dtype=float)
    j = int(np.argmax(n))
    figures = (
        f"the largest effective n is {n[j]:.3g} (group {_show(plan.stats.labels[j])}; {plan.stats.J} groups "
        f"with {float(n.sum()):.3g} in all) and the newest batch weighs {max(plan.weights):.3g}"
    )
    advice = f"give a longer --half-life (about {_round_up(hi)} days or more here), or refit without one"
    if model.within in ("separate", "shared") and "measurements" in why:  # the model's replication check
        need = (
            "some group with an effective n of at least 2, of measurements that differ"
            if model.within == "separate"
            else "more measurements than groups, by an effective n of at least 1"
        )
        raise E.InputError(
            f"bad option --half-life: a half-life of {half:g} day{'' if half == 1 else 's'} leaves too little weight to estimate "
            f"the within-group variance: {figures}, while the {model.within} structure needs {need}; "
            f"{advice}"
        )
    raise E.InputError(
        f"bad option --half-life: a half-life of {half:g} day{'' if half == 1 else 's'} leaves too little weight ({figures}), "
        f"and the weighted data are refused: {why.removeprefix('bad model: ')}; {advice}"
    )


def _round_up(x: float) -> str:
    """x rounded up to two significant figures, as text."""
    import math

    if x <= 0 or not math.isfinite(x):
        return f"{x:g}"
    step = 10.0 ** (math.floor(math.log10(x)) - 1)
    return f"{math.ceil(x / step - 1e-9) * step:.3g}"


def _store_name(shown: str) -> str:
    """The store as a page names it: a file's name, or the shown location of a database store."""
    return f"'{Path(shown).name}'" if "://" not in shown and not shown.startswith("service=") else f"'{shown}'"


def cmd_history(args, argv) -> int:
    from .output import check_parent
    from .report.history import write_history
    from .store import jobs

    shown = _shown(args.store)
    ledger, runs = jobs.list_batches(args.store)
    out = check_parent(Path(args.out))
    write_history(out, _store_name(shown), ledger, runs)
    print(f"wrote '{out}': {len(runs)} recorded runs of the store '{shown}'")
    return E.EXIT_OK


def cmd_checkup(args, argv) -> int:
    from .store import jobs

    shown, problems, facts = jobs.check_store(args.store)
    if problems:
        for line in problems:
            print(f"{shown}: {line}")
        raise E.InputError(
            f"bad store '{shown}': {len(problems)} problem(s) found (listed above); restore the store "
            "from a backup, or copy what is sound elsewhere"
        )
    print(f"{shown}: sound: every checksum matches; {facts}")
    return E.EXIT_OK


def cmd_copy_store(args, argv) -> int:
    from .store import jobs

    source, target, content = jobs.copy_store(args.source, args.target)
    groups = sum(len(s.labels) for s in content.stats.values())
    print(
        f"copied '{source}' to '{target}': {len(content.lines)} batches ({groups} group rows) and "
        f"{len(content.runs)} recorded runs, read back and identical to the original"
    )
    return E.EXIT_OK


STORE_COMMANDS = {
    "ingest": cmd_ingest,
    "batches": cmd_batches,
    "withdraw": cmd_withdraw,
    "refit": cmd_refit,
    "history": cmd_history,
    "checkup": cmd_checkup,
    "copy-store": cmd_copy_store,
}


# ---------------------------------------------------------------------------------------------
# stops (Ctrl-C, SIGTERM) and closed pipes


class _Stops:
    """What a SIGTERM (a scheduler's stop) does at each moment of a command.

    While the command works it raises KeyboardInterrupt, once, so that the command stops cleanly as
    on Ctrl-C (a second SIGTERM does not cut short the clean-up of the first). Inside `deferred()` a
    stop (SIGTERM or Ctrl-C) waits until the block is done: a run being recorded in the store is
    recorded or not, never in doubt. After the command has finished a SIGTERM changes nothing but the
    exit code, which becomes 5 (`late`); the program's exit (`run`) honours it up to its last step.
    """

    def __init__(self, program: bool = False):
        self.program = program
        self.working = True
        self.stopping = False
        self.deferring = False
        self.pending = False
        self.late = False

    def handler(self, signum, frame):
        if not self.working:
            self.late = True
            return
        if self.deferring:
            self.pending = True
            return
        if self.stopping:
            return
        self.stopping = True
        raise KeyboardInterrupt

    def deferred(self):
        import contextlib

        @contextlib.contextmanager
        def held():
            main_thread = threading.current_thread() is threading.main_thread()
            sigint = signal.signal(signal.SIGINT, self.handler) if main_thread else None
            self.deferring, self.pending = True, False
            try:
                yield
            finally:
                self.deferring = False
                if sigint is not None:
                    signal.signal(signal.SIGINT, sigint)
                if self.pending:
                    self.pending = False
                    self.stopping = True
                    raise KeyboardInterrupt

        return held()


_STOPS = _Stops()


def _one_line(text: str) -> str:
    """The text with every character that would end a line (str.splitlines: newline, carriage return,
    vertical tab, form feed, U+0085, U+2028, U+2029 and others) escaped: a message is one line, even
    when it quotes a file name or an option value that holds such a character."""
    if len(text.splitlines()) <= 1 and not text.endswith(("\n", "\r")):
        return text
    return "".join(ch if len(f"a{ch}b".splitlines()) == 1 else repr(ch)[1:-1] for ch in text)


def _say(line: str) -> None:
    """One line on stderr; a closed stderr is not a reason to fail."""
    try:
        print(_one_line(line), file=sys.stderr)
        sys.stderr.flush()
    except (OSError, ValueError):
        pass


def _silence_stdout() -> None:
    """stdout's reader has gone (`| head`): send the rest to /dev/null, so that neither later prints
    nor the interpreter's flush at exit fail."""
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        return
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, fd)
    finally:
        os.close(devnull)


def _printing(fn, *args) -> None:
    """Print through fn; if stdout's reader has gone, stop printing and go on with the command."""
    try:
        fn(*args)
        sys.stdout.flush()
    except BrokenPipeError:
        _silence_stdout()


def main(argv: list[str] | None = None, *, _stops: _Stops | None = None) -> int:
    global _STOPS
    argv = list(sys.argv[1:] if argv is None else argv)
    stops = _STOPS = _stops or _Stops()
    # SIGTERM (a scheduler's stop) is handled like Ctrl-C: stop cleanly, leave nothing half-written
    previous = signal.signal(signal.SIGTERM, stops.handler) if hasattr(signal, "SIGTERM") else None
    code = E.EXIT_INTERNAL
    try:
        try:
            parser = build_parser()
            args = parser.parse_args(argv)
            if getattr(args, "decide_at", None) is not None:
                args.decide_at = _decide_at(args.decide_at)
            code = {"fit": cmd_fit, "demo": cmd_demo, **STORE_COMMANDS}[args.command](args, argv)
        except E.PoolingError as exc:
            _say(f"pooling: {exc}")
            code = exc.exit_code
        except KeyboardInterrupt:
            _say("pooling: stopped by the user; nothing was written")
            code = E.EXIT_INTERRUPTED
        except BrokenPipeError:  # stdout's reader went away after the command's work: not a failure
            _silence_stdout()
            code = E.EXIT_OK
        except MemoryError as exc:
            _say(
                f"pooling: out of memory ({exc}); fewer draws (--draws, --max-draws) or chains, or summary mode "
                "(--summary on), need less"
            )
            code = E.EXIT_BAD_INPUT
        except Exception as exc:  # a bug: one line, the traceback only on request
            if os.environ.get("POOLING_DEBUG"):
                raise
            _say(
                f"pooling: internal error: {type(exc).__name__}: {exc} (set POOLING_DEBUG=1 for details; "
                "please report it)"
            )
            code = E.EXIT_INTERNAL
    except KeyboardInterrupt:  # a stop that landed while an outcome was being reported
        code = E.EXIT_INTERRUPTED
    finally:
        stops.working = False  # from here a SIGTERM only turns the exit code into 5
        _printing(lambda: None)  # stdout's last flush, here where a closed pipe is handled
        if previous is not None and not stops.program:
            signal.signal(signal.SIGTERM, previous)
    return E.EXIT_INTERRUPTED if stops.late else code


def run() -> None:
    """The program `pooling`: main() with SIGTERM handled up to the process's last step.

    Python restores the default action of SIGTERM late in its shutdown, which would let a stop that
    lands there end the process by the signal, with no exit code. So the exit is taken in the last
    atexit function (registered first, it runs last): any SIGTERM until then gives exit 5.
    """
    import atexit

    stops = _Stops(program=True)
    result = {"code": E.EXIT_INTERNAL}

    def leave():
        code = E.EXIT_INTERRUPTED if stops.late else result["code"]
        if stops.late and result["code"] != E.EXIT_INTERRUPTED:
            _say("pooling: stopped by the user as it ended; the work it reported above is complete")
        _printing(lambda: None)
        try:
            sys.stderr.flush()
        except (OSError, ValueError):
            pass
        os._exit(code)

    atexit.register(leave)
    from ._memory import keep_freed_memory

    keep_freed_memory()  # a process that ends with its run: freed work arrays are reused (pooling/_memory.py)
    try:
        result["code"] = main(_stops=stops)
    except SystemExit as exc:  # argparse leaves by SystemExit: --help and --version with 0, a refusal with 2
        result["code"] = exc.code if isinstance(exc.code, int) else E.EXIT_OK if exc.code is None else E.EXIT_INTERNAL
    sys.exit(result["code"])


if __name__ == "__main__":
    run()
