"""`wavebook weigh`: weight staged waves with the study's [[weighting]] steps and store the weights."""

from __future__ import annotations

import argparse

HELP = "weight staged waves (base weights, nonresponse, post-stratification, raking, trimming, calibration)"
EXAMPLE = "wavebook weigh study.toml --wave W3 --export weights_w3.parquet"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `wavebook weigh`."""
    parser.add_argument("spec", help="the study spec (TOML)")
    parser.add_argument("--wave", action="append", dest="waves", metavar="ID",
                        help="a wave to weigh (repeatable; default: every staged wave)")
    parser.add_argument("--export", metavar="FILE",
                        help="also write respondent_id, wave, weight to FILE (.csv or .parquet; never an input of the study)")
    parser.add_argument("--force", action="store_true", help="replace an existing --export file that wavebook did not write")
    parser.add_argument(
        "--replicates",
        action="store_true",
        help="with --export and one --wave: add every re-weighted replicate weight (replicate_1 ... replicate_R) "
        "of the [variance] replicate method, and write its method, multipliers, deviation reference and df to "
        "FILE.replicates.json, so that `wavebook estimate --variance supplied` reproduces the book's SEs",
    )


def run(args: argparse.Namespace) -> int:
    """Weigh each selected wave (each stored in its own transaction), print its diagnostics, export if asked."""
    from pipeline.commands.stage import selected_waves
    from pipeline.errors import DataError, Problem, SpecError
    from pipeline.outputs import check_output, study_inputs
    from pipeline.staging.database import open_database, staged_waves
    from pipeline.progress import step
    from pipeline.staging.spec import load_spec
    from pipeline.weighting.store import export_replicates, export_weights, replicate_sidecar, weigh_wave

    study = load_spec(args.spec)
    export = check_output(args.export, study_inputs(study), force=args.force, option="--export") if args.export else None
    if export is not None and args.replicates:
        check_output(replicate_sidecar(export), study_inputs(study), force=args.force, option="--export (its recipe)")
    if not study.database_path.is_file():
        raise DataError(
            f"nothing to weigh: no study database at {study.database_path}",
            [Problem("database-missing", f"stage the waves first: wavebook stage {args.spec}",
                     file=str(study.database_path))],
        )
    con = open_database(study)
    try:
        staged = set(staged_waves(con)["wave"].to_list())
        waves = selected_waves(study, args.waves) if args.waves else [w.id for w in study.waves if w.id in staged]
        for wave_id in waves:
            with step(f"weighing {wave_id}", quiet=args.quiet):
                report = weigh_wave(study, wave_id, con=con)
            print(report.render())
        if not waves:
            raise DataError(f"nothing to weigh: no wave is staged in {study.database_path}",
                            [Problem("wave-not-staged", f"stage the waves first: wavebook stage {args.spec}")])
        if args.replicates:
            if not args.export or len(waves) != 1:
                raise SpecError("--replicates needs --export FILE and exactly one wave (--wave ID)", [Problem(
                    rule="bad-option", message="replicate weights are exported one wave at a time, with --export")])
            path = export
            count = export_replicates(study, waves[0], con=con, path=path)
            print(f"wrote {count:,} replicate weights per respondent to {path} (variance recipe in "
                  f"{path.name}.replicates.json)")
        elif export is not None:
            rows = export_weights(con, waves, export)
            print(f"wrote {rows:,} weights to {args.export}")
    finally:
        con.close()
    return 0
