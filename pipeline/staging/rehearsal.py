"""`check`'s rehearsal of a wave's weighting: what `run` would meet, found without writing anything.

The wave is staged into a private in-memory database (the same `_write` as staging) and the
study's weighting is fitted on it by `pipeline.weighting.store.fit_wave`, exactly as `run` does.
So `check` fails where `run` would: targets for categories the data lack, a target category
without respondents, trimming bounds the targets cannot meet. With a replicate variance method
it also warns (rule category-in-one-psu) about each weighting category whose respondents all sit
in one PSU: the replicates that drop or down-weight that PSU cannot weight the category to its
target.
"""

from __future__ import annotations

import duckdb
import polars as pl

from pipeline.errors import Problem, WavebookError
from pipeline.staging.database import load_responses
from pipeline.staging.readers import prepare_connection, read_raw
from pipeline.staging.spec import Study, Wave
from pipeline.staging.stage import RAW_TABLE, _write

PSU_KEY = "__wavebook_psu"


def weighting_rehearsal(study: Study, wave: Wave) -> list[Problem]:
    """The problems fitting the study's weighting on `wave` raises (errors), or, when it fits,
    its warnings and the category-in-one-psu warnings of `thin_categories`."""
    from pipeline.estimation.options import parse_variance
    from pipeline.weighting.store import fit_wave

    con = duckdb.connect()
    try:
        prepare_connection(con)
        read_raw(con, wave.file, RAW_TABLE)
        _write(con, study, wave, digest="", warnings=[])
        recipe, _ = fit_wave(study, wave.id, con=con)
        options, _ = parse_variance(study.variance)
        thin = thin_categories(load_responses(con, study, [wave.id]), study, method=options.method)
    except WavebookError as exc:
        return exc.problems or [Problem("weighting", exc.summary, file=str(wave.file))]
    finally:
        con.close()
    return [*recipe.warnings, *thin]


def thin_categories(data: pl.DataFrame, study: Study, *, method: str) -> list[Problem]:
    """Warnings for the categories of each poststratification, raking or calibration margin whose
    respondents all lie in one PSU (PSUs identified within strata when their ids restart), for
    replicate variance methods; nothing for Taylor or without PSUs."""
    from pipeline.weighting.steps import CalibrateStep, PoststratifyStep, RakeStep, parse_steps

    design = study.design
    if method == "taylor" or design.psu is None:
        return []
    psu_parts = [c for c in (design.strata, design.psu) if c is not None]
    frame = data.with_columns(pl.concat_str([pl.col(c).cast(pl.String) for c in psu_parts], separator="\x1f").alias(PSU_KEY))
    found: list[Problem] = []
    for number, step in enumerate(parse_steps(study.weighting, study.step_context()), start=1):
        if isinstance(step, PoststratifyStep):
            margins: tuple[tuple[str, ...], ...] = (step.cells,)
        elif isinstance(step, (RakeStep, CalibrateStep)):
            margins = step.margins
        else:
            continue
        for margin in margins:
            counts = frame.group_by(list(margin)).agg(pl.col(PSU_KEY).n_unique().alias("psus"), pl.len().alias("n"))
            for row in counts.filter(pl.col("psus") == 1).sort(list(margin)).iter_rows(named=True):
                category = " x ".join(str(row[v]) for v in margin)
                found.append(
                    Problem(
                        "category-in-one-psu",
                        f"weighting step {number}: category '{category}' of margin '{' x '.join(margin)}' has its "
                        f"{row['n']} respondent(s) in one PSU; the {method} replicates that drop that PSU cannot "
                        "weight it to its target: collapse it with a neighbour (`collapse`) or use method = \"taylor\"",
                        severity="warning",
                        column=" x ".join(margin),
                        value=category,
                        count=int(row["n"]),
                    )
                )
    return found
