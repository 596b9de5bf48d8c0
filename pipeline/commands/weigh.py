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
    parser.add_argument("--export", metavar="FILE", help="also write respondent_id, wave, weight to FILE (.csv or .parquet)")


def run(args: argparse.Namespace) -> int:
    """Weigh each selected wave (each stored in its own transaction), print its diagnostics, export if asked."""
    from pathlib import Path

    from pipeline.commands.stage import selected_waves
    from pipeline.staging.database import open_database, staged_waves
    from pipeline.progress import step
    from pipeline.staging.spec import load_spec
    from pipeline.weighting.store import export_weights, weigh_wave

    study = load_spec(args.spec)
    con = open_database(study)
    try:
        staged = set(staged_waves(con)["wave"].to_list())
        waves = selected_waves(study, args.waves) if args.waves else [w.id for w in study.waves if w.id in staged]
        for wave_id in waves:
            with step(f"weighing {wave_id}", quiet=args.quiet):
                report = weigh_wave(study, wave_id, con=con)
            print(report.render())
        if args.export:
            rows = export_weights(con, waves, Path(args.export))
            print(f"wrote {rows:,} weights to {args.export}")
    finally:
        con.close()
    return 0
