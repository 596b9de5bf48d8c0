"""The study spec's `[tables]`, `[[banners]]` and `[[tables.sets]]`: which banner tables to make and how to mark them.

```toml
[tables]
banner = ["sex", "age_band", "region"]   # the default banner: each variable's categories become columns
significance = 0.05                      # level of the marks; [0.05, 0.10] adds a second, lighter mark
low_base = 50                            # cells on fewer respondents are flagged and not tested
suppress_below = 20                      # cells on fewer respondents show no number at all
adjust = "none"                          # or "holm" (Holm 1979) or "bh" (Benjamini and Hochberg 1995), within a row
reference_wave = "W1"                    # optional: every wave is also compared with this one

[[banners]]
name = "shoppers"
columns = ["shop_freq", "aware"]         # a multiple-response set gives one (overlapping) column per item

[[tables.sets]]
stubs = ["satisfaction", "recommend"]    # these variables' tables use the banner "shoppers"
banner = "shoppers"
```

Every banner starts with the Total column. A variable's own table drops its own break. Stubs
not named in any set use the default banner (`[tables].banner`); without `[tables]` no banner
tables are made. `low_base` of 50 and `suppress_below` of 20 are common practice, no source.
`parse_tables` returns the validated `TablesSpec` and every problem found, each naming its key.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

from pipeline.errors import Problem
from pipeline.staging.spec import Study

TABLES_KEYS = ("banner", "significance", "low_base", "suppress_below", "adjust", "reference_wave", "sets")
BANNER_KEYS = ("name", "columns", "label")
SET_KEYS = ("stubs", "banner")
ADJUSTMENTS = ("none", "holm", "bh")
DEFAULT_BANNER = "default"
DEFAULT_LOW_BASE = 50
DEFAULT_SUPPRESS_BELOW = 20


@dataclass(frozen=True)
class BannerSpec:
    """A named banner: its break variables in order (the Total column always comes first)."""

    name: str
    breaks: tuple[str, ...]
    label: str = ""


@dataclass(frozen=True)
class TablesSpec:
    """Validated `[tables]` options.

    levels: significance levels, strongest first (one or two); low_base: minimum unweighted base
    for a cell to be tested and not flagged; suppress_below: cells on fewer respondents show no
    number; adjust: multiplicity control within a row; banners: name -> BannerSpec (the default
    banner under `DEFAULT_BANNER`); stub_banner: variable -> banner name for stubs in a set.
    """

    levels: tuple[float, ...] = (0.05,)
    low_base: int = DEFAULT_LOW_BASE
    suppress_below: int = DEFAULT_SUPPRESS_BELOW
    adjust: str = "none"
    reference_wave: str | None = None
    banners: Mapping[str, BannerSpec] = field(default_factory=dict)
    stub_banner: Mapping[str, str] = field(default_factory=dict)

    def banner_of(self, variable: str) -> BannerSpec | None:
        """The banner of `variable`'s table (None: no banner table for it)."""
        return self.banners.get(self.stub_banner.get(variable, DEFAULT_BANNER))


class _Collect:
    def __init__(self, file: str) -> None:
        self.file = file
        self.problems: list[Problem] = []

    def add(self, rule: str, key: str, message: str, value: object = None) -> None:
        self.problems.append(Problem(rule, f"{key}: {message}", file=self.file, value=None if value is None else str(value)))

    def unknown(self, table: Mapping, key: str, allowed: tuple[str, ...]) -> None:
        for k in table:
            if k not in allowed:
                self.add("unknown-key", f"{key}.{k}", f"unknown key '{k}'; allowed: {', '.join(allowed)}")

    def whole(self, table: Mapping, key: str, name: str, default: int) -> int:
        value = table.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            self.add("wrong-type", f"{key}.{name}", f"must be a whole number >= 0, not {value!r}", value)
            return default
        return value

    def breaks(self, raw: object, key: str, study: Study) -> tuple[str, ...]:
        """Banner break variables: known, not numeric, each once."""
        if not isinstance(raw, list) or not all(isinstance(v, str) for v in raw):
            self.add("wrong-type", key, f"must be an array of variable names, not {raw!r}")
            return ()
        for name in raw:
            variable = study.variables.get(name)
            if variable is None:
                known = ", ".join(study.variables)
                self.add("unknown-variable", key, f"'{name}' is not a codebook variable (known: {known})", name)
            elif variable.type == "numeric":
                self.add("numeric-banner", key, f"'{name}' is numeric: a banner needs categories "
                         "(declare a single-choice variable with its bands)", name)
        if len(set(raw)) != len(raw):
            self.add("bad-value", key, "a variable appears twice in the banner")
        return tuple(raw)


def _levels(collect: _Collect, raw: object) -> tuple[float, ...]:
    values = raw if isinstance(raw, list) else [raw]
    ok = (
        1 <= len(values) <= 2
        and all(isinstance(v, int | float) and not isinstance(v, bool) for v in values)
        and all(0.0 < float(v) <= 0.5 for v in values)
    )
    if not ok:
        collect.add("bad-value", "tables.significance",
                    "must be a level in (0, 0.5], or two of them (e.g. [0.05, 0.10])", raw)
        return (0.05,)
    return tuple(sorted(float(v) for v in values))


def parse_tables(study: Study) -> tuple[TablesSpec | None, list[Problem]]:
    """The validated tables spec of `study` (None when it has no `[tables]`) and every problem found."""
    raw, raw_banners = study.tables, study.banners
    collect = _Collect(str(study.path))
    if not raw and not raw_banners:
        return None, []
    collect.unknown(raw, "tables", TABLES_KEYS)
    levels = _levels(collect, raw.get("significance", 0.05))
    low_base = collect.whole(raw, "tables", "low_base", DEFAULT_LOW_BASE)
    suppress = collect.whole(raw, "tables", "suppress_below", DEFAULT_SUPPRESS_BELOW)
    adjust = raw.get("adjust", "none")
    if adjust not in ADJUSTMENTS:
        collect.add("bad-value", "tables.adjust", f"must be one of {', '.join(ADJUSTMENTS)}", adjust)
        adjust = "none"
    reference = raw.get("reference_wave")
    if reference is not None and reference not in {w.id for w in study.waves}:
        collect.add("bad-value", "tables.reference_wave", "is not a declared wave", reference)
        reference = None
    banners: dict[str, BannerSpec] = {}
    if "banner" in raw:
        banners[DEFAULT_BANNER] = BannerSpec(DEFAULT_BANNER, collect.breaks(raw["banner"], "tables.banner", study))
    for i, table in enumerate(raw_banners):
        key = f"banners[{i}]"
        if not isinstance(table, dict):
            collect.add("wrong-type", key, "must be a table with name and columns")
            continue
        collect.unknown(table, key, BANNER_KEYS)
        name = table.get("name")
        if not isinstance(name, str) or not name:
            collect.add("missing-key", f"{key}.name", "each [[banners]] needs a name")
            continue
        if name in banners:
            collect.add("bad-value", f"{key}.name", "two banners have the same name", name)
        banners[name] = BannerSpec(name, collect.breaks(table.get("columns"), f"{key}.columns", study),
                                   str(table.get("label", "")))
    stub_banner: dict[str, str] = {}
    sets = raw.get("sets", [])
    if not isinstance(sets, list):
        collect.add("wrong-type", "tables.sets", "must be an array of tables ([[tables.sets]])")
        sets = []
    for i, table in enumerate(sets):
        key = f"tables.sets[{i}]"
        if not isinstance(table, dict):
            collect.add("wrong-type", key, "must be a table with stubs and banner")
            continue
        collect.unknown(table, key, SET_KEYS)
        banner = table.get("banner", DEFAULT_BANNER)
        if banner not in banners:
            collect.add("unknown-banner", f"{key}.banner", f"no banner named '{banner}' (known: "
                        f"{', '.join(banners) or 'none'})", banner)
        stubs = table.get("stubs", [])
        if not isinstance(stubs, list) or not all(isinstance(s, str) for s in stubs):
            collect.add("wrong-type", f"{key}.stubs", "must be an array of variable names")
            continue
        for stub in stubs:
            if stub not in study.variables:
                collect.add("unknown-variable", f"{key}.stubs", f"'{stub}' is not a codebook variable", stub)
            elif stub in stub_banner:
                collect.add("bad-value", f"{key}.stubs", f"'{stub}' is in two sets", stub)
            else:
                stub_banner[stub] = str(banner)
    spec = TablesSpec(levels=levels, low_base=low_base, suppress_below=suppress, adjust=str(adjust),
                      reference_wave=reference, banners=banners, stub_banner=stub_banner)
    return (None if collect.problems else spec), collect.problems
