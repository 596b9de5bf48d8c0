"""`wavebook estimate`: design-based estimates from one data file, without a study spec."""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from pipeline.renamed import add_retired_options, option_value

if TYPE_CHECKING:
    from pathlib import Path

    import polars as pl

    from pipeline.errors import Problem

HELP = "estimate means, totals, proportions, ratios or quantiles with design-based standard errors"
EXAMPLE = "wavebook estimate wave3.csv --weight wt --strata region --psu area --proportion q1 --by age_band"
# the same choices as pipeline.estimation (design.SINGLE_PSU_POLICIES, api.VARIANCE_METHODS; kept literal so
# that --help needs no numpy or polars import; tests/test_estimate_command.py checks they agree)
SINGLE_PSU_POLICIES = ("error", "certainty", "grand-mean", "collapse")
VARIANCE_METHODS = ("taylor", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap", "supplied")

def add_arguments(parser: argparse.ArgumentParser) -> None:
    """DATA, the design columns, what to estimate, the variance method and the output format."""
    parser.add_argument("data", metavar="DATA", help="respondent file: CSV or Parquet")
    design = parser.add_argument_group("design")
    design.add_argument("--weight", metavar="COL", help="final weight column (default: equal weights)")
    design.add_argument("--strata", metavar="COL", help="stratum column (default: one stratum)")
    design.add_argument("--psu", metavar="COL", help="PSU (cluster) column (default: each respondent is a PSU)")
    design.add_argument(
        "--psu-ids",
        type=option_value("--psu-ids"),
        choices=("within-stratum", "unique"),
        default="within-stratum",
        help="PSU ids restart within each stratum (within-stratum, default) or are unique across strata",
    )
    fpc = design.add_mutually_exclusive_group()
    fpc.add_argument(
        "--population-size",
        metavar="COL|N",
        help="finite population correction from the first-stage population size N_h: a column holding "
        "each stratum's number of first-stage units (PSUs; respondents without --psu), or one number "
        "without --strata",
    )
    fpc.add_argument(
        "--sampling-fraction",
        metavar="COL|F",
        help="finite population correction from the first-stage sampling fraction f_h = n_h / N_h: a column "
        "holding each stratum's fraction, or one number in (0, 1] for every stratum (e.g. 0.02)",
    )
    design.add_argument(
        "--second-stage-fraction",
        type=float,
        default=0.0,
        metavar="F2",
        help="with --psu and a finite population correction: share of each selected PSU's units sampled (default 0, unknown: the "
        "within-PSU variance term is added in full; 1: whole PSUs were taken)",
    )
    design.add_argument(
        "--first-stage",
        choices=("equal", "pps"),
        default="equal",
        help="how PSUs were drawn: equal probability within stratum (default) or pps, probability proportional "
        "to size (no population size or sampling fraction: with-replacement variance unless --psu-inclusion is given)",
    )
    design.add_argument(
        "--psu-inclusion",
        metavar="COL",
        help="with --first-stage pps: each PSU's first-stage inclusion probability, for the (1 - pi) approximation "
        "(Taylor only; default: none)",
    )
    design.add_argument(
        "--single-psu",
        type=option_value("--single-psu"),
        choices=SINGLE_PSU_POLICIES,
        default="error",
        help="what to do with strata that have one PSU (default: error); collapse needs --collapse-with",
    )
    design.add_argument(
        "--collapse-with",
        action="append",
        default=[],
        metavar="STRATUM=PARTNER",
        help="with --single-psu collapse: merge STRATUM into PARTNER before the variance (repeat per pair)",
    )
    what = parser.add_argument_group("what to estimate (repeat any of these)")
    what.add_argument("--mean", action="append", default=[], metavar="COL")
    what.add_argument("--total", action="append", default=[], metavar="COL")
    what.add_argument("--count", action="append", default=[], metavar="COL",
                      help="weighted count of each category, with its standard error")
    what.add_argument("--proportion", action="append", default=[], metavar="COL", help="proportion of each category")
    what.add_argument("--ratio", action="append", default=[], nargs=2, metavar=("NUM_COL", "DEN_COL"))
    what.add_argument(
        "--quantile", action="append", default=[], nargs=2, metavar=("COL", "Q"), help="e.g. --quantile income 0.5"
    )
    what.add_argument("--by", metavar="COL", help="also estimate in each domain COL=VALUE (full design kept)")
    var = parser.add_argument_group("variance")
    var.add_argument(
        "--variance",
        type=option_value("--variance"),
        choices=VARIANCE_METHODS,
        default="taylor",
        help="Taylor linearization (default) or a replicate method",
    )
    var.add_argument(
        "--replicate-cols",
        metavar="PATTERN",
        help="with --variance supplied: regular expression matching whole replicate-weight column names (it must "
        "not match the --weight column)",
    )
    var.add_argument(
        "--replicate-method",
        choices=("sdr", "jackknife", "stratified-jackknife", "brr", "fay", "bootstrap"),
        metavar="METHOD",
        help="with --variance supplied: how the replicate weights were made (default sdr): sdr, jackknife, "
        "stratified-jackknife, brr, fay or bootstrap; sets the default multiplier (Wolter 2007): sdr 4/R, "
        "jackknife (R-1)/R, brr 1/R, fay 1/(R (1-RHO)^2, with --fay RHO), bootstrap 1/R, stratified-jackknife 1 "
        "with --replicate-multipliers",
    )
    var.add_argument(
        "--replicate-df",
        type=int,
        metavar="N",
        help="with --variance supplied: degrees of freedom of the replicate weights (default R - 1; brr and fay "
        "need it: the number of half-sample pairs, not R - 1)",
    )
    var.add_argument(
        "--replicate-multiplier",
        type=float,
        metavar="X",
        help="variance multiplier of the replicate weights (default: that of the method)",
    )
    var.add_argument(
        "--replicate-multipliers",
        metavar="X,Y,...",
        help="with --variance supplied and --replicate-method stratified-jackknife (required there, refused "
        "otherwise): one multiplier per replicate column, in column order, (n_h-1)/n_h of each replicate's stratum",
    )
    var.add_argument(
        "--replicate-centre",
        choices=("full-sample", "replicate-mean"),
        default="full-sample",
        help="with --variance supplied: deviations of the replicate estimates from the full-sample estimate "
        "(full-sample, default) or from the mean of the replicates (replicate-mean)",
    )
    var.add_argument(
        "--fay", type=float, default=0.0, metavar="RHO",
        help="Fay coefficient, for --variance fay or --replicate-method fay only (default 0: none)",
    )
    var.add_argument(
        "--replicates", type=int, metavar="N", help="number of bootstrap replicates (--variance bootstrap only; default 500)"
    )
    var.add_argument("--seed", type=int, metavar="N", help="bootstrap random seed (--variance bootstrap only; default 0)")
    parser.add_argument("--level", type=float, default=0.95, help="confidence level of the intervals (default 0.95)")
    parser.add_argument(
        "--interval",
        choices=("korn-graubard", "logit", "t"),
        default="korn-graubard",
        help="interval of proportions (default korn-graubard: exact binomial limits on the effective sample size; "
        "means, totals and ratios always use t, quantiles the Woodruff interval)",
    )
    parser.add_argument("--format", choices=("csv", "json"), default="csv", help="output format (default csv)")
    parser.add_argument(
        "--digits",
        default="10",
        metavar="N|all",
        help="CSV: significant digits of the numbers (default 10; 'all' for floats that read back exactly); "
        "JSON always keeps full precision",
    )
    add_retired_options(parser)


def run(args: argparse.Namespace) -> int:
    """Read DATA, estimate, print one row per estimate (CSV or a JSON array)."""
    import json
    import sys
    from pathlib import Path

    from pipeline.errors import Problem, UsageError
    from pipeline.estimation.api import estimate
    from pipeline.estimation.result import COLUMNS
    from pipeline.progress import step

    problems = []
    quantiles = []
    for col, q in args.quantile:
        try:
            quantiles.append((col, float(q)))
        except ValueError:
            message = "the quantile probability is not a number"
            problems.append(Problem(rule="bad-quantile", message=message, column=col, value=q))
    if args.digits != "all" and not (args.digits.isdigit() and 1 <= int(args.digits) <= 17):
        problems.append(Problem(rule="bad-option", message="--digits must be a whole number from 1 to 17, or all",
                                value=args.digits))
    if args.variance == "jackknife" and args.strata:
        print("note: --variance jackknife deletes one PSU at a time over the whole sample and ignores --strata; "
              "use --variance stratified-jackknife to keep the strata", file=sys.stderr)
    if not 0.0 < args.level < 1.0:
        problems.append(Problem(rule="bad-option", message="--level must be between 0 and 1", value=str(args.level)))
    collapse = {}
    for pair in args.collapse_with:
        stratum, sep, partner = pair.partition("=")
        if not sep or not stratum or not partner:
            message = "--collapse-with takes STRATUM=PARTNER"
            problems.append(Problem(rule="bad-option", message=message, value=pair))
        collapse[stratum] = partner
    multipliers = None
    if args.replicate_multipliers is not None:
        try:
            multipliers = [float(x) for x in args.replicate_multipliers.split(",")]
        except ValueError:
            problems.append(Problem(rule="bad-option", message="--replicate-multipliers takes numbers separated by "
                                    "commas", value=args.replicate_multipliers))
    if collapse and args.single_psu != "collapse":
        problems.append(Problem(rule="bad-option", message="--collapse-with needs --single-psu collapse"))
    if problems:
        raise UsageError("the estimate options are invalid", problems)
    path = Path(args.data)
    with step(f"reading {path.name}", quiet=args.quiet):
        frame = _read(path)
    for warning in weight_warnings(frame, args.weight, source=str(path)):
        print(warning.render(), file=sys.stderr)
    with step("estimating", quiet=args.quiet):
        result = estimate(
            frame,
            weight=args.weight,
            strata=args.strata,
            psu=args.psu,
            psu_ids=args.psu_ids,
            population_size=_column_or_number(args.population_size),
            sampling_fraction=_column_or_number(args.sampling_fraction),
            mean=args.mean,
            total=args.total,
            count=args.count,
            proportion=args.proportion,
            ratio=[tuple(r) for r in args.ratio],
            quantile=quantiles,
            by=args.by,
            variance=args.variance,
            replicate_cols=args.replicate_cols,
            replicate_method=args.replicate_method,
            replicate_df=args.replicate_df,
            replicate_multiplier=args.replicate_multiplier,
            replicate_multipliers=multipliers,
            replicate_centre=args.replicate_centre,
            fay=args.fay,
            replicates=args.replicates,
            seed=args.seed,
            level=args.level,
            interval=args.interval,
            single_psu=args.single_psu,
            collapse_with=collapse,
            second_stage_fraction=args.second_stage_fraction,
            first_stage=args.first_stage,
            psu_inclusion=args.psu_inclusion,
            source=str(path),
        ).select(COLUMNS)
    if args.format == "json":
        print(json.dumps(result.to_dicts(), indent=1, allow_nan=False))
    else:
        print(_rounded(result, args.digits).write_csv(), end="")
    return 0


def _rounded(frame: pl.DataFrame, digits: str) -> pl.DataFrame:
    """Float columns rounded to `digits` significant digits ("all": unchanged, shortest round-trip form)."""
    import polars as pl

    if digits == "all":
        return frame
    n = int(digits)

    def significant(value: float | None) -> float | None:
        return None if value is None else float(f"{value:.{n}g}")

    floats = [c for c, t in frame.schema.items() if t.is_float()]
    return frame.with_columns(pl.col(c).map_elements(significant, return_dtype=pl.Float64) for c in floats)


def _column_or_number(value: str | None) -> str | float | None:
    """A --population-size / --sampling-fraction value: a number when it reads as one, else a column name."""
    if value is None:
        return None
    try:
        return float(value)
    except ValueError:
        return value


DOMINANT_SHARE = 0.5  # one weight holding more than half the total: common practice, no source


def weight_warnings(frame: pl.DataFrame, weight: str, *, source: str) -> list[Problem]:
    """DataError (all-weights-zero) when every weight is zero; a warning (dominant-weight) with the
    Kish effective n = (sum w)^2 / sum w^2 (Kish 1965, Survey Sampling, section 11.7; from memory) when one
    weight holds more than DOMINANT_SHARE of the total. Other weight problems (missing, negative,
    not numeric) are left to the estimator's own checks."""
    import polars as pl

    from pipeline.errors import DataError, Problem

    if weight not in frame.columns or not frame[weight].dtype.is_numeric() or frame.height == 0:
        return []
    w = frame[weight].cast(pl.Float64).drop_nulls()
    if w.len() and (w == 0).all():
        raise DataError(
            f"{source}: every weight is zero",
            [Problem("all-weights-zero", "every value of the weight column is 0; nothing can be estimated",
                     file=source, column=weight, value="0", count=w.len())],
        )
    total = float(w.sum())
    if not total > 0 or w.len() < 2 or float(w.max()) <= DOMINANT_SHARE * total:
        return []
    n_eff = total**2 / float((w * w).sum())
    return [
        Problem(
            "dominant-weight",
            f"one weight holds {float(w.max()) / total:.0%} of the total weight; the effective sample size is "
            f"{n_eff:.1f} of {w.len():,} respondents, so every estimate rests on very few people",
            severity="warning",
            file=source,
            column=weight,
            value=f"{float(w.max()):g}",
        )
    ]


def _read(path: Path) -> pl.DataFrame:
    """Read a CSV (types inferred from every row) or Parquet file into polars."""
    import polars as pl

    from pipeline.errors import DataError, Problem

    if not path.exists():
        raise FileNotFoundError(f"no such data file: {path}")
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        try:
            return pl.read_parquet(path, glob=False)
        except (pl.exceptions.PolarsError, OSError) as exc:
            problem = Problem(rule="unreadable", message=str(exc).splitlines()[0], file=str(path))
            raise DataError("cannot read the data file", [problem]) from None
    if suffix in (".csv", ".txt"):
        from pipeline.staging.readers import checked_csv_header

        header = checked_csv_header(path)
        try:
            return pl.read_csv(path, infer_schema_length=None, new_columns=header, glob=False)
        except pl.exceptions.PolarsError as exc:
            problem = Problem(rule="unreadable", message=str(exc).splitlines()[0], file=str(path))
            raise DataError("cannot read the data file", [problem]) from None
    raise DataError(
        "unsupported data file",
        [
            Problem(
                rule="file-format", message="DATA must be a .csv or .parquet file", file=str(path), value=path.suffix
            )
        ],
    )
