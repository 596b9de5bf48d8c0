"""`wavebook check`: validate the spec and wave files without writing anything."""

from __future__ import annotations

import argparse

HELP = "check the study spec and wave files; print every problem (writes nothing)"
EXAMPLE = "wavebook check study.toml --wave W2"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `wavebook check`."""
    parser.add_argument("spec", help="the study spec (TOML)")
    parser.add_argument("--wave", action="append", dest="waves", metavar="ID", help="a wave to check (repeatable; default: all)")


def run(args: argparse.Namespace) -> int:
    """Print each wave's problems and a one-line verdict; exit 1 when any wave has an error."""
    from pipeline.commands.stage import selected_waves
    from pipeline.staging.spec import load_spec
    from pipeline.staging.stage import check_wave

    study = load_spec(args.spec)
    failed = False
    for wave_id in selected_waves(study, args.waves):
        problems = check_wave(study, wave_id)
        errors = sum(p.severity == "error" for p in problems)
        warnings = len(problems) - errors
        for p in problems:
            print(f"  {p.render()}")
        verdict = "ok" if not errors else f"{errors} error{'s' if errors != 1 else ''}"
        print(f"{wave_id}: {verdict}, {warnings} warning{'s' if warnings != 1 else ''}")
        failed = failed or errors > 0
    return 1 if failed else 0
