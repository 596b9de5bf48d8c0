"""Load the DuckDB SQL files of `sql/`.

SQL files are Jinja2 templates only where identifiers vary (a study's own column names):
identifiers go through the `ident` filter, which double-quotes them; values are never
templated but bound as parameters (`?` or `$name`) by the caller.
"""

from __future__ import annotations

from functools import cache

import jinja2

from pipeline.resources import resource_dir


def quote_ident(name: str) -> str:
    """Quote an SQL identifier for DuckDB: wrap in double quotes, doubling any inner quote."""
    return '"' + str(name).replace('"', '""') + '"'


@cache
def _environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(resource_dir("sql"))),
        autoescape=False,  # SQL, not HTML: identifiers are quoted by the `ident` filter instead
        undefined=jinja2.StrictUndefined,
        keep_trailing_newline=True,
    )
    env.filters["ident"] = quote_ident
    return env


def sql(name: str, **context: object) -> str:
    """Return the SQL of `sql/<name>`, rendered with `context` (identifiers only, never values)."""
    return _environment().get_template(name).render(**context)
