"""`wavebook stage`: check and load wave files into the study database."""

from __future__ import annotations

import argparse

HELP = "check wave files and stage them into the study database (each wave replaced atomically)"
EXAMPLE = "wavebook stage study.toml --wave W3"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of `wavebook stage`."""
    parser.add_argument("spec", help="the study spec (TOML)")
    parser.add_argument("--wave", action="append", dest="waves", metavar="ID", help="a wave to stage (repeatable; default: all)")


def selected_waves(study: object, wanted: list[str] | None) -> list[str]:
    """The wave ids to work on, in spec order (all when `wanted` is empty); SpecError for unknown ids."""
    from pipeline.errors import Problem, SpecError

    declared = [w.id for w in study.waves]  # type: ignore[attr-defined]
    if not wanted:
        return declared
    unknown = [w for w in wanted if w not in declared]
    if unknown:
        raise SpecError(
            "unknown wave id",
            [
                Problem("unknown-wave", f"no wave '{w}' in the spec; declared waves: {', '.join(declared)}", value=w)
                for w in unknown
            ],
        )
    return [w for w in declared if w in wanted]


def run(args: argparse.Namespace) -> int:
    """Stage each selected wave, printing a summary line and its warnings; every wave is tried."""
    import sys

    from pipeline.errors import DataError
    from pipeline.staging.spec import load_spec
    from pipeline.staging.stage import stage_wave

    study = load_spec(args.spec)
    failures: list[DataError] = []
    for wave_id in selected_waves(study, args.waves):
        try:
            report = stage_wave(study, wave_id, quiet=args.quiet)
        except DataError as exc:
            print(exc.render(), file=sys.stderr)
            failures.append(exc)
            continue
        print(report.summary())
        for p in report.warnings:
            print(f"  {p.render()}")
    if failures:
        raise DataError(
            f"{len(failures)} wave{'s' if len(failures) != 1 else ''} not staged (problems above); "
            "the other waves were staged",
        )
    return 0
