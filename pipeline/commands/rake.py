"""`wavebook rake`: rake one data file to population margins, without a study spec."""

from __future__ import annotations

import argparse

HELP = "rake a CSV or Parquet file to population margins (long CSV variable,category,target) and print diagnostics"
EXAMPLE = "wavebook rake wave3.csv --targets population_margins.csv --weight design_wt --trim-max 5 --out wave3_weighted.csv"

ROW = "__wavebook_row"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `wavebook rake`."""
    parser.add_argument("data", metavar="DATA", help="respondent file: CSV or Parquet")
    parser.add_argument("--targets", required=True, metavar="TARGETS.csv",
                        help="margins as variable,category,target (proportions or counts; crossed: 'a x b', '3 x 2')")
    parser.add_argument("--weight", metavar="COL", help="starting (design) weight column (default: equal weights)")
    parser.add_argument("--trim-max", type=float, metavar="X", help="trim weights above X times the mean, then re-rake")
    parser.add_argument("--trim-min", type=float, metavar="X", help="raise weights below X times the mean, then re-rake")
    parser.add_argument("--tolerance", type=float, default=1e-6, metavar="T", help="relative tolerance on every margin (default 1e-6)")
    parser.add_argument("--max-iterations", type=int, default=100, metavar="N", help="raking cycles allowed (default 100)")
    parser.add_argument("--out", metavar="FILE",
                        help="write every input column plus `weight` to FILE (.csv or .parquet; never DATA or TARGETS)")
    parser.add_argument("--force", action="store_true", help="replace an existing --out file that wavebook did not write")


def read_data(path: str) -> object:
    """Read CSV (every column as text, so codes compare exactly as written) or Parquet into polars."""
    from pathlib import Path

    import polars as pl

    from pipeline.errors import DataError, Problem, WavebookError

    file = Path(path)
    if not file.is_file():
        raise FileNotFoundError(f"no data file at {file}")
    suffix = file.suffix.lower()
    if suffix == ".csv":
        from pipeline.staging.readers import checked_csv_header

        return pl.read_csv(file, infer_schema=False, new_columns=checked_csv_header(file), glob=False)
    if suffix == ".parquet":
        try:
            return pl.read_parquet(file, glob=False)
        except (pl.exceptions.PolarsError, OSError) as exc:
            raise DataError(f"cannot read {file}",
                            [Problem("unreadable", str(exc).splitlines()[0], file=str(file))]) from None
    raise WavebookError(f"cannot read {file}: DATA must be a .csv or .parquet file")


def run(args: argparse.Namespace) -> int:
    """Rake the file to every margin of TARGETS, print the diagnostics, write --out atomically."""
    from pathlib import Path

    import numpy as np
    import polars as pl

    from pipeline.errors import DataError, Problem, SpecError, UsageError
    from pipeline.outputs import Input, check_output
    from pipeline.weighting.recipe import fit_recipe
    from pipeline.weighting.steps import RakeStep, TrimStep
    from pipeline.weighting.store import build_report, weights_array, write_frame
    from pipeline.weighting.targets import read_targets_csv, split_margin

    bad = [Problem("usage", f"{flag} must be {rule}, got {value}") for flag, value, ok, rule in (
        ("--trim-max", args.trim_max, args.trim_max is None or args.trim_max > 1, "above 1 (a multiple of the mean)"),
        ("--trim-min", args.trim_min, args.trim_min is None or 0 < args.trim_min < 1, "between 0 and 1"),
        ("--tolerance", args.tolerance, args.tolerance > 0, "positive"),
        ("--max-iterations", args.max_iterations, args.max_iterations >= 1, "at least 1"),
    ) if not ok]
    if bad:
        raise UsageError("invalid options", bad)
    inputs = [Input(Path(args.data), "DATA"), Input(Path(args.targets), "the --targets file")]
    out = check_output(args.out, inputs, force=args.force, option="--out") if args.out else None
    data = read_data(args.data)
    assert isinstance(data, pl.DataFrame)
    targets, problems = read_targets_csv(Path(args.targets), where="--targets")
    if targets is None or problems:
        raise SpecError(f"the targets file {args.targets} is unusable", problems)
    margins = tuple(split_margin(name) for name in targets.margins)
    missing = sorted({v for m in margins for v in m if v not in data.columns})
    if args.weight is not None and args.weight not in data.columns:
        missing.append(args.weight)
    if missing:
        raise DataError(f"{args.data}: columns named in the targets or --weight are absent",
                        [Problem("missing-column", "no such column in the data", file=args.data, column=c) for c in missing])
    if "weight" in data.columns:
        raise DataError(f"{args.data} already has a column 'weight'; rename it before raking")
    rows = data.with_columns(pl.format("row {}", pl.int_range(1, data.height + 1)).alias(ROW))  # messages name rows
    base = weights_array(data, args.weight) if args.weight else np.ones(data.height)
    steps: list = [RakeStep(0, margins, targets, tolerance=args.tolerance, max_iterations=args.max_iterations)]
    if args.trim_max is not None or args.trim_min is not None:
        steps.append(TrimStep(1, upper=args.trim_max, lower=args.trim_min, relative_to="mean"))
    recipe = fit_recipe(rows, steps, base_weights=base, id_column=ROW)
    print(build_report(recipe, wave=Path(args.data).name, n_input=data.height).render())
    if out is not None:
        write_frame(data.with_columns(pl.Series("weight", recipe.weights)), out)
        print(f"wrote {data.height:,} rows with their weight to {args.out}")
    return 0
