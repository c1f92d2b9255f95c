"""Command line: a thin skin over the public functions. No statistics here.

Exit codes: 0 success, 1 bad input (every problem listed, nothing written),
2 usage error (argparse's own convention).
"""

from __future__ import annotations

import argparse
import sys
import textwrap

from calib import __version__
from calib.errors import InputError

DESCRIPTION = """\
calib puts catches taken with different gears onto one footing.

Calibration experiments (paired tows, side-by-side deployments) show how each
gear's catch of each species relates to a reference gear. calib fits those
conversion factors, checks them, converts survey records to reference-gear
units with the uncertainty carried along, builds harmonized series, says how
much of a trend is the change of gears, and writes a report.

Typical order:  calib check  ->  calib fit  ->  convert  ->  series / trend  ->  report
Before a calibration study:  calib plan (how many pairs are needed)
Try it on invented data first:  calib demo --out demo_output
"""

CAUTION = (
    "Factors hold only for the gears, sizes, habitats and seasons of the calibration "
    "study. Defer to your survey program's standards and qualified review before "
    "management use."
)


class _Formatter(argparse.RawDescriptionHelpFormatter):
    """Keeps paragraph breaks in descriptions; shows a default only where there is one."""

    def _get_help_string(self, action):
        text = action.help or ""
        if (action.default not in (None, False, argparse.SUPPRESS) and action.option_strings
                and "default" not in text):
            text += " (default: %(default)s)"
        return text


def _add_tables(p: argparse.ArgumentParser, lengths: bool = True) -> None:
    p.add_argument("--hauls", required=True, metavar="FILE",
                   help="hauls table (CSV or Parquet): one row per tow, seine haul or trap set")
    p.add_argument("--catches", required=True, metavar="FILE",
                   help="catches table: one row per haul and species caught (missing species = zero)")
    if lengths:
        p.add_argument("--lengths", metavar="FILE", default=None,
                       help="optional lengths table: measured fish (haul_id, species, length_mm, n)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="calib", description=DESCRIPTION, formatter_class=_Formatter,
                                     epilog=CAUTION)
    parser.add_argument("--version", action="version", version=f"calib {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "check", formatter_class=_Formatter,
        help="validate the tables and summarise what is in them",
        description=textwrap.dedent("""\
            Validate the hauls, catches and (optional) lengths tables and summarise them:
            hauls per gear, calibration groups per gear combination, each species' total
            catch and the number of groups that caught it, and warnings (rare species,
            gears not linked to the reference, groups on different days or far apart).
            Exits 1 with a list of problems (file, row, column, fix) if anything is wrong."""),
    )
    _add_tables(p)
    p.add_argument("--reference", metavar="GEAR", default=None,
                   help="reference gear, to check that every gear is linked to it")
    p.add_argument("--species-recorded", metavar="FILE", default=None,
                   help="optional table (source, species, year_from, year_to): which species each partner "
                        "recorded in which years; zeros are completed only for those")
    p.add_argument("--species-names", metavar="FILE", default=None,
                   help="optional table (name, accepted_name): partners' species names mapped to one "
                        "accepted name before anything else")
    p.add_argument("--min-groups", type=int, default=10, metavar="N",
                   help="warn about species caught in fewer calibration groups than this")
    p.add_argument("--design", choices=["paired", "side-by-side"], default="paired",
                   help="side-by-side: also summarise hauls by site and period (pair_id ignored) and list "
                        "what would stop `calib fit --design side-by-side`")
    p.add_argument("--period-by", choices=["auto", "column", "month", "season", "year"], default="auto",
                   help="side-by-side: what counts as the same period (see calib fit --help)")

    p = sub.add_parser(
        "fit", formatter_class=_Formatter,
        help="fit conversion factors from calibration groups",
        description=textwrap.dedent("""\
            Fit conversion factors from calibration groups (hauls sharing a pair_id).
            factor = expected cpue of the reference gear / cpue of the gear, at the same
            place and time. Writes OUT/factors.csv, OUT/checks.csv, OUT/posterior.nc and
            OUT/manifest.json. The default is the Bayesian hierarchical model: each group's
            total catch of a species is split among the gears that fished there
            (Dirichlet-multinomial, i.e. beta-binomial for two gears), species share
            information per gear. Every factor gets a status: ok, warn or fail."""),
    )
    _add_tables(p)
    p.add_argument("--reference", required=True, metavar="GEAR",
                   help="the gear whose units everything is converted to")
    p.add_argument("--out", required=True, metavar="DIR", help="directory to write the factor set to")
    p.add_argument("--method", choices=["hierarchical", "ratio", "glm"], default="hierarchical",
                   help="hierarchical: Bayesian model (default); ratio: ratio of mean cpue with a "
                        "bootstrap over groups; glm: conditional logit maximum likelihood (quick look)")
    p.add_argument("--overdispersion", choices=["dirichlet-multinomial", "none"],
                   default="dirichlet-multinomial",
                   help="'none' assumes no tow-to-tow patchiness (plain multinomial); for comparison only")
    p.add_argument("--pooling", choices=["partial", "none"], default="partial",
                   help="'none' fits every species on its own with vague priors")
    p.add_argument("--design", choices=["paired", "side-by-side"], default="paired",
                   help="paired: hauls sharing a pair_id are compared (default). side-by-side: gears fished "
                        "the same sites in the same periods but not as pairs; every haul is placed by its "
                        "site and period (pair_id ignored) and counts are modelled with a site x period "
                        "density (negative binomial; --overdispersion none gives Poisson). Only valid if "
                        "the gears sampled the same animals (not marsh edge vs channel)")
    p.add_argument("--period-by", choices=["auto", "column", "month", "season", "year"], default="auto",
                   help="side-by-side: what counts as the same period. auto: the hauls table's 'period' "
                        "column if it has one, else the month (e.g. 2024-05); season: winter Dec-Feb, "
                        "spring Mar-May, summer Jun-Aug, autumn Sep-Nov of a year; year: the year")
    p.add_argument("--patchiness", choices=["gamma", "lognormal"], default=None,
                   help="how catches vary from tow to tow. gamma (default): each group's catch is split "
                        "among the gears (Dirichlet-multinomial). lognormal: every tow carries the same "
                        "multiplicative noise whatever its gear; fitted to the counts themselves (slower)")
    p.add_argument("--compare", action="store_true",
                   help="fit several forms of the model to the same observations, say which the data "
                        "support (leave-one-out cross-validation) and keep that one. With --length-bin "
                        "and/or --covariate: a factor constant in length, changing with length, and "
                        "depending on the covariates, all scored on the measured fish per length class "
                        "(or, with --covariate alone, on each group's catch); writes OUT/comparison.csv. "
                        "Otherwise: the two patchiness forms, unless --patchiness names one; writes "
                        "OUT/comparison.csv and OUT/spread_check.csv")
    p.add_argument("--model", choices=["constant", "length", "covariate"], default=None,
                   help="with --compare and --length-bin/--covariate: keep this form whatever the comparison "
                        "says (the comparison is still written). constant: one factor per species and gear")
    p.add_argument("--species-recorded", metavar="FILE", default=None,
                   help="optional table (source, species, year_from, year_to): zeros are completed only "
                        "for species a source recorded")
    p.add_argument("--species-names", metavar="FILE", default=None,
                   help="optional table (name, accepted_name): partners' names mapped to accepted names")
    p.add_argument("--species-groups", metavar="FILE", default=None,
                   help="optional table (species, group): species borrow strength only within a group, "
                        "e.g. fish apart from crustaceans")
    p.add_argument("--draws", type=int, default=1000, help="posterior draws kept per chain")
    p.add_argument("--tune", type=int, default=1000, help="warm-up iterations per chain (discarded)")
    p.add_argument("--chains", type=int, default=2, help="independent sampler chains")
    p.add_argument("--seed", type=int, default=20261202, help="random seed; the same seed gives the same factors")
    p.add_argument("--interval", type=float, default=0.9, help="central interval level for factor_lower/upper")
    p.add_argument("--bootstrap-reps", type=int, default=1000, help="bootstrap replicates for --method ratio")
    p.add_argument("--status-rule", action="append", default=[], metavar="NAME=VALUE",
                   help="change a status threshold, e.g. --status-rule fail_rhat=1.1 (repeatable). Names: "
                        "fail_rhat, fail_ess_bulk, fail_prior_ratio, warn_rhat, warn_ess, "
                        "warn_on_divergences, ppp_low, ppp_high; defaults in docs/methods.md")
    p.add_argument("--length-bin", type=float, default=None, metavar="MM",
                   help="fit factors that change with length: width of the length classes in mm (e.g. 10). "
                        "Needs --lengths. Each species x gear gets a smooth curve of the factor over length "
                        "and factors.csv one row per length class, only over the lengths the calibration "
                        "measured. Classes never split the classes the lengths were recorded in")
    p.add_argument("--length-min-fish", type=int, default=1, metavar="N",
                   help="with --length-bin: a species' calibrated length range runs from its first to its "
                        "last length class with at least N measured fish")
    p.add_argument("--covariate", action="append", default=[], metavar="NAME",
                   help="let the factor depend on a column of the hauls table that is the same for every "
                        "haul of a calibration group (repeatable), e.g. day_night, habitat, depth_m. A text "
                        "column gives one factor per level (offsets from the most common level); a numeric "
                        "column a slope on the group mean, reported at its 10th, 50th and 90th percentiles. "
                        "convert then uses each record's own value")
    p.add_argument("--quiet", action="store_true", help="no progress bar")

    from calib.convert import add_convert_parser

    add_convert_parser(sub, formatter_class=_Formatter)

    from calib.series import add_series_parser

    add_series_parser(sub, formatter_class=_Formatter)

    from calib.trend import add_trend_parser

    add_trend_parser(sub, formatter_class=_Formatter)

    from calib.plan import add_plan_parser

    add_plan_parser(sub, formatter_class=_Formatter)

    from calib.report import add_report_parser

    add_report_parser(sub, formatter_class=_Formatter)

    p = sub.add_parser(
        "demo", formatter_class=_Formatter,
        help="run the whole job on the bundled invented demo data",
        description=textwrap.dedent("""\
            Run check, fit, convert, series, trend, a small study plan and the report on
            the bundled demo data (an invented estuary with three partner programs, a legacy
            and a new otter trawl, and a beach seine) and print what was found and where the
            files are, ending with the HTML report. Takes a few minutes on 2 cores."""),
    )
    p.add_argument("--out", required=True, metavar="DIR", help="directory for all demo outputs")
    p.add_argument("--draws", type=int, default=1000, help="posterior draws per chain")
    p.add_argument("--tune", type=int, default=1000, help="warm-up iterations per chain")
    p.add_argument("--seed", type=int, default=20261202, help="random seed")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    return parser


def _cmd_check(args) -> int:
    from calib.inspect import summarize
    from calib.tables import load_tables

    tables = load_tables(args.hauls, args.catches, args.lengths,
                         species_recorded=args.species_recorded, species_names=args.species_names)
    summary = summarize(tables, reference=args.reference, min_groups=args.min_groups)
    print(summary.text())
    if args.design == "side-by-side":
        from calib.site_periods import describe

        print("\n" + describe(tables, reference=args.reference, period_by=args.period_by))
    return 0


def _status_rules(pairs: list[str]):
    """StatusRules from NAME=VALUE strings; None when there are none."""
    if not pairs:
        return None
    from dataclasses import fields

    from calib.diagnostics import StatusRules

    known = {f.name: f.type for f in fields(StatusRules)}
    changes = {}
    for pair in pairs:
        name, _, value = pair.partition("=")
        name = name.strip().replace("-", "_")
        if name not in known or not value:
            raise SystemExit(_usage_error(f"--status-rule {pair!r}: expected NAME=VALUE with NAME one of "
                                          + ", ".join(known)))
        if name == "warn_on_divergences":
            if value.lower() not in ("true", "false", "yes", "no", "1", "0"):
                raise SystemExit(_usage_error(f"--status-rule {pair!r}: use true or false"))
            changes[name] = value.lower() in ("true", "yes", "1")
        else:
            try:
                changes[name] = float(value)
            except ValueError:
                raise SystemExit(_usage_error(f"--status-rule {pair!r}: {value!r} is not a number")) from None
    return StatusRules(**changes)


def _usage_error(message: str) -> int:
    print(f"calib fit: error: {message}", file=sys.stderr)
    return 2


def _cmd_fit(args) -> int:
    from calib.fitting import fit

    options = dict(
        lengths=args.lengths, reference=args.reference, method=args.method,
        species_recorded=args.species_recorded, species_names=args.species_names,
        overdispersion=args.overdispersion, pooling=args.pooling, species_groups=args.species_groups,
        draws=args.draws, tune=args.tune, chains=args.chains, seed=args.seed, interval=args.interval,
        n_boot=args.bootstrap_reps, rules=_status_rules(args.status_rule), progressbar=not args.quiet,
        length_bin=args.length_bin, length_min_fish=args.length_min_fish,
        design=args.design, period_by=args.period_by,
        covariates=args.covariate or None,
    )
    if (args.compare or args.patchiness) and args.method != "hierarchical":
        return _usage_error("--compare and --patchiness need --method hierarchical")
    if (args.compare or args.patchiness == "lognormal") and args.pooling != "partial":
        return _usage_error("--patchiness lognormal (and so --compare) is built with --pooling partial only")
    by_form = args.compare and (args.length_bin is not None or bool(args.covariate))
    if by_form:
        from calib.compare import compare_models

        factor_set, comparison = compare_models(args.hauls, args.catches, model=args.model, **options)
    elif args.compare:
        from calib.compare import compare_patchiness

        factor_set, comparison = compare_patchiness(args.hauls, args.catches, patchiness=args.patchiness, **options)
    else:
        factor_set = fit(args.hauls, args.catches, patchiness=args.patchiness or "gamma", **options)
    factor_set.save(args.out)
    print(factor_set.summary())
    files = ["factors.csv", "checks.csv", "posterior.nc", "manifest.json"]
    if by_form:
        print(f"\nWhich form of the factor? (PSIS-LOO on each {comparison.unit}; "
              f"{factor_set.manifest['comparison']['how']})")
        print(comparison.table.to_string(index=False, float_format=lambda v: f"{v:.2f}"))
        print("\n" + comparison.verdict)
        print(f"Kept: {factor_set.manifest['comparison']['kept']}.")
        files += [f"{name}.csv" for name in factor_set.extra_tables]
    elif args.compare:
        print("\nWhich patchiness? (PSIS-LOO on each cell's split given its total)")
        print(comparison.table.to_string(index=False, float_format=lambda v: f"{v:.2f}"))
        print("\nSpread of the split by group total (observed vs each form's 90% predictive band):")
        print(comparison.spread.to_string(index=False, float_format=lambda v: f"{v:.3g}"))
        print("\n" + comparison.verdict)
        print(f"Kept: {factor_set.manifest['comparison']['kept']}.")
        files += [f"{name}.csv" for name in factor_set.extra_tables]
    print(f"\nWrote {args.out}/" + ", ".join(files))
    return 0


def _cmd_convert(args) -> int:
    from calib.convert import run_convert_command

    return run_convert_command(args)


def _cmd_series(args) -> int:
    from calib.series import run_series_command

    return run_series_command(args)


def _cmd_trend(args) -> int:
    from calib.trend import run_trend_command

    return run_trend_command(args)


def _cmd_plan(args) -> int:
    from calib.plan import run_plan_command

    return run_plan_command(args)


def _cmd_report(args) -> int:
    from calib.report import run_report_command

    return run_report_command(args)


def _cmd_demo(args) -> int:
    from calib.demo import run_demo

    run_demo(args.out, draws=args.draws, tune=args.tune, seed=args.seed, progressbar=not args.quiet)
    return 0


def _check_settings(parser: argparse.ArgumentParser, args) -> None:
    """Settings that parse but make no sense are usage errors (exit 2)."""
    if getattr(args, "design", "paired") == "side-by-side" and getattr(args, "method", "hierarchical") != "hierarchical":
        parser.error("--design side-by-side is fitted with --method hierarchical only")
    interval = getattr(args, "interval", None)
    if interval is not None and not 0 < interval < 1:
        parser.error("--interval must be between 0 and 1, e.g. 0.9 for a 90% interval")
    if getattr(args, "length_bin", None) is not None:
        if not args.length_bin > 0:
            parser.error("--length-bin must be a positive number of mm, e.g. 10")
        if args.lengths is None:
            parser.error("--length-bin needs --lengths FILE (the measured fish)")
        if args.method != "hierarchical" or args.pooling != "partial":
            parser.error("--length-bin works with --method hierarchical and --pooling partial only")
        if getattr(args, "design", "paired") != "paired":
            parser.error("--length-bin works with --design paired only (side-by-side length factors are not built)")
    if getattr(args, "covariate", None):
        if getattr(args, "length_bin", None) is not None and not getattr(args, "compare", False):
            parser.error("--covariate and --length-bin cannot be fitted together yet: fit them separately, or "
                         "add --compare to see which of the two forms the data support")
        if args.method != "hierarchical" or args.pooling != "partial":
            parser.error("--covariate works with --method hierarchical and --pooling partial only")
        if getattr(args, "design", "paired") != "paired":
            parser.error("--covariate works with --design paired only (side-by-side covariate factors are not built)")
    if getattr(args, "model", None) is not None:
        if not args.compare:
            parser.error("--model picks one of the forms --compare fits; add --compare (without it, "
                         "--length-bin or --covariate alone set the form)")
        if args.model == "length" and args.length_bin is None:
            parser.error("--model length needs --length-bin MM (and --lengths FILE)")
        if args.model == "covariate" and not args.covariate:
            parser.error("--model covariate needs --covariate NAME")
        if args.length_bin is None and not args.covariate:
            parser.error("--model applies to the comparison of --length-bin / --covariate forms; for the "
                         "patchiness comparison use --patchiness to keep one")
    if getattr(args, "compare", False) and (args.length_bin is not None or args.covariate) and args.patchiness:
        parser.error("--compare with --length-bin/--covariate compares factor forms under the default "
                     "patchiness; compare patchiness forms in a separate run (--compare alone)")
    if getattr(args, "design", "paired") == "side-by-side" and (getattr(args, "compare", False)
                                                                or getattr(args, "patchiness", None) == "lognormal"):
        parser.error("--compare and --patchiness lognormal work with --design paired only")
    for name in ("draws", "tune", "chains", "bootstrap_reps", "min_groups", "length_min_fish"):
        value = getattr(args, name, None)
        if value is not None and value < (0 if name == "tune" else 1):
            parser.error(f"--{name.replace('_', '-')} must be a positive whole number")


COMMANDS = {"check": _cmd_check, "fit": _cmd_fit, "convert": _cmd_convert, "series": _cmd_series,
            "trend": _cmd_trend, "plan": _cmd_plan, "report": _cmd_report, "demo": _cmd_demo}


HELP_WIDTH = 88  # columns of the generated help pages (docs/commands), whatever the terminal


def help_text(command: str | None = None, width: int = HELP_WIDTH) -> str:
    """What ``calib [COMMAND] --help`` prints, wrapped at ``width`` columns."""
    import contextlib
    import io
    import os

    saved = os.environ.get("COLUMNS")
    os.environ["COLUMNS"] = str(width)  # argparse wraps to the terminal width it reads from COLUMNS
    try:
        parser = build_parser()
        if command is not None:
            parser = _subparsers(parser)[command]
        buffer = io.StringIO()
        with contextlib.redirect_stdout(buffer):
            parser.print_help()
        return buffer.getvalue()
    finally:
        if saved is None:
            del os.environ["COLUMNS"]
        else:
            os.environ["COLUMNS"] = saved


def _subparsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def command_names() -> list[str]:
    """The subcommands, in the order ``calib --help`` lists them."""
    return list(_subparsers(build_parser()))


def command_page(command: str | None) -> str:
    """Markdown page of one command (None: the overview) generated from its ``--help``."""
    name = "calib" if command is None else f"calib {command}"
    lines = [f"# {name}", "",
             "<!-- Generated from the command's --help by `python docs/commands/update.py`; do not edit by hand. "
             "tests/test_docs.py checks that it matches. -->", ""]
    if command is None:
        lines += ["Every command has its own page:", ""]
        lines += [f"- [calib {c}]({c}.md)" for c in command_names()]
        lines.append("")
    lines += ["```text", f"$ {name} --help", help_text(command).rstrip("\n"), "```", ""]
    return "\n".join(lines)


def write_command_pages(directory) -> list:
    """Write docs pages (README.md for ``calib``, COMMAND.md for each command) into ``directory``."""
    from pathlib import Path

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    written = []
    for command in [None, *command_names()]:
        path = directory / ("README.md" if command is None else f"{command}.md")
        path.write_text(command_page(command))
        written.append(path)
    return written


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``calib`` console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    _check_settings(parser, args)
    try:
        return COMMANDS[args.command](args)
    except InputError as err:
        print(err.format(), file=sys.stderr)
        print("Nothing was written.", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
