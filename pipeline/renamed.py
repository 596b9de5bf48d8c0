"""Names wavebook no longer accepts, with the name that replaced each one.

A spec key or value, or a command-line option or value, that uses a retired name is refused
with a problem naming its replacement (rules `renamed-key` and `renamed-value` in a spec; a usage
error on the command line); there is no silent fallback to the old meaning. The retired-name test
(tests/test_retired_names.py) reads these tables to check that no help text or document still
uses them.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable

from pipeline.errors import Problem

# spec key (dotted, "*" for any variable) -> retired value -> new value
SPEC_VALUES: dict[str, dict[str, str]] = {
    "variance.method": {"jk1": "jackknife", "jkn": "stratified-jackknife"},
    "design.psu_ids": {"nested": "within-stratum"},
    "design.single_psu": {"centre": "grand-mean"},
    "variables.*.type": {"scale": "rating"},
}
# retired key of a variable table -> new key
VARIABLE_KEYS: dict[str, str] = {"exclude_from_mean": "exclude_from_statistics"}
# retired command-line option -> what to give instead
OPTIONS: dict[str, str] = {
    "--replicate-scale": "--replicate-multiplier",
    "--fpc": "--population-size COL (first-stage units in the stratum's population) or "
    "--sampling-fraction COL|NUMBER",
}
# command-line option -> retired value -> new value
OPTION_VALUES: dict[str, dict[str, str]] = {
    "--variance": SPEC_VALUES["variance.method"],
    "--psu-ids": SPEC_VALUES["design.psu_ids"],
    "--single-psu": SPEC_VALUES["design.single_psu"],
}


def renamed_value(key: str, value: object, *, file: str | None = None) -> Problem | None:
    """The `renamed-value` problem when `value` of spec key `key` is a retired name, else None.

    `key` is the dotted key as shown to the user; `variables.<name>.type` is looked up as
    `variables.*.type`.
    """
    parts = key.split(".")
    pattern = f"{parts[0]}.*.{parts[-1]}" if len(parts) == 3 else key
    table = SPEC_VALUES.get(pattern, {})
    if not isinstance(value, str) or value not in table:
        return None
    return Problem("renamed-value", f'{key} "{value}" is now "{table[value]}"', file=file, value=value)


def renamed_key(key: str, name: str, *, file: str | None = None) -> Problem | None:
    """The `renamed-key` problem when `name`, a key of the variable table `key`, is retired, else None."""
    if name not in VARIABLE_KEYS:
        return None
    return Problem("renamed-key", f"{key}.{name} is now {VARIABLE_KEYS[name]}", file=file)


def option_value(option: str) -> Callable[[str], str]:
    """An argparse `type` that refuses a retired value of `option`, naming the new one (usage error, exit 2)."""
    retired = OPTION_VALUES[option]

    def check(value: str) -> str:
        if value in retired:
            raise argparse.ArgumentTypeError(f'"{value}" is now "{retired[value]}"')
        return value

    return check


class RetiredOption(argparse.Action):
    """A hidden option that stops with a usage error naming its replacement (`OPTIONS`)."""

    def __init__(self, option_strings: list[str], dest: str, **kwargs: object) -> None:
        kwargs.pop("nargs", None)
        super().__init__(option_strings, dest, nargs="?", help=argparse.SUPPRESS, **kwargs)  # type: ignore[arg-type]

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace, values: object,
                 option_string: str | None = None) -> None:
        parser.error(f"{option_string} is now {OPTIONS[str(option_string)]}")


def add_retired_options(parser: argparse.ArgumentParser) -> None:
    """Declare every retired option of `OPTIONS` on `parser`, hidden from --help."""
    for option in OPTIONS:
        parser.add_argument(option, action=RetiredOption, dest=f"_retired{option.replace('-', '_')}",
                            default=argparse.SUPPRESS)
