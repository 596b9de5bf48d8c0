"""`check`'s rehearsal of a wave's weighting: what `run` would meet, found without writing anything.

The wave is staged into a private in-memory database (the same `_write` as staging) and the
study's weighting is fitted on it by `pipeline.weighting.store.fit_wave`, exactly as `run` does.
So `check` fails where `run` would: targets for categories the data lack, a target category
without respondents, trimming bounds the targets cannot meet. With a replicate variance method
it also warns (rule category-in-one-psu) about each weighting category whose respondents all sit
in one PSU: the replicates that drop or down-weight that PSU cannot weight the category to its
target; and (rule category-thin-in-stratum) about each category that, within a stratum of two or
more PSUs, sits in fewer than 2 of them: a replicate that resamples or drops that PSU loses the
category's share of the stratum, and its re-weighting rests on the other strata alone.
"""

from __future__ import annotations

import duckdb
import polars as pl

from pipeline.errors import Problem, WavebookError
from pipeline.staging.database import load_responses
from pipeline.staging.readers import prepare_connection, read_raw
from pipeline.staging.spec import Study, Wave
from pipeline.staging.stage import RAW_TABLE, _write
from pipeline.staging.wave_columns import typed_file_columns

PSU_KEY = "__wavebook_psu"


def weighting_rehearsal(study: Study, wave: Wave) -> list[Problem]:
    """The problems fitting the study's weighting on `wave` raises (errors), or, when it fits,
    its warnings and the category-in-one-psu / category-thin-in-stratum warnings of `thin_categories`."""
    from pipeline.estimation.options import parse_variance
    from pipeline.weighting.store import fit_wave

    con = duckdb.connect()
    try:
        prepare_connection(con)
        read_raw(con, wave.file, RAW_TABLE, typed_file_columns(study, wave.id))
        _write(con, study, wave, digest="", warnings=[])
        recipe, _ = fit_wave(study, wave.id, con=con)
        options, _ = parse_variance(study.variance)
        thin = thin_categories(load_responses(con, study, [wave.id]), study, method=options.method, wave_id=wave.id)
    except WavebookError as exc:
        return exc.problems or [Problem("weighting", exc.summary, file=str(wave.file))]
    finally:
        con.close()
    return [*recipe.warnings, *thin]


def thin_categories(data: pl.DataFrame, study: Study, *, method: str, wave_id: str) -> list[Problem]:
    """Warnings for the categories of each poststratification, raking or calibration margin that
    rest on too few PSUs, for the variance methods that re-weight replicates (none for Taylor,
    supplied replicates, or a design without PSUs; PSUs are identified within strata when their
    ids restart):

    - category-in-one-psu: all the category's respondents lie in one PSU of the whole sample;
    - category-thin-in-stratum: in a stratum with 2 or more PSUs, the category's respondents lie
      in fewer than 2 of them (a category wholly inside one PSU is reported by the first rule
      only; a stratum with a single PSU is the `single_psu` setting's business)."""
    from pipeline.weighting.steps import CalibrateStep, PoststratifyStep, RakeStep, parse_steps

    design = study.design
    if method in ("taylor", "supplied") or design.psu is None:
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
            in_one = counts.filter(pl.col("psus") == 1).sort(list(margin))
            for row in in_one.iter_rows(named=True):
                category = " x ".join(str(row[v]) for v in margin)
                found.append(
                    Problem(
                        "category-in-one-psu",
                        f"wave {wave_id}, weighting step {number}: category '{category}' of margin '{' x '.join(margin)}' has its "
                        f"{row['n']} respondent(s) in one PSU; the {method} replicates that drop that PSU cannot "
                        "weight it to its target: collapse it with a neighbour (`collapse`) or use method = \"taylor\"",
                        severity="warning",
                        column=" x ".join(margin),
                        value=category,
                        count=int(row["n"]),
                    )
                )
            if design.strata is not None:
                found += _thin_in_stratum(frame, design.strata, margin, in_one.select(list(margin)), number, method, wave_id)
    return found


def _thin_in_stratum(
    frame: pl.DataFrame, strata: str, margin: tuple[str, ...], in_one: pl.DataFrame, number: int, method: str, wave_id: str
) -> list[Problem]:
    """category-thin-in-stratum warnings of one margin: (stratum, category) cells of a stratum with
    2 or more PSUs whose respondents lie in fewer than 2 of its PSUs, leaving out the categories
    `in_one` (wholly inside one PSU, already reported)."""
    keys = [strata, *[v for v in margin if v != strata]]
    stratum_psus = frame.group_by(strata).agg(pl.col(PSU_KEY).n_unique().alias("stratum_psus"))
    cells = (
        frame.join(in_one, on=list(margin), how="anti", nulls_equal=True)
        .group_by(keys)
        .agg(pl.col(PSU_KEY).n_unique().alias("psus"), pl.len().alias("n"))
        .join(stratum_psus, on=strata)
        .filter((pl.col("psus") < 2) & (pl.col("stratum_psus") >= 2))
        .sort(keys)
    )
    found = []
    for row in cells.iter_rows(named=True):
        category = " x ".join(str(row[v]) for v in margin)
        found.append(
            Problem(
                "category-thin-in-stratum",
                f"wave {wave_id}, weighting step {number}: category '{category}' of margin '{' x '.join(margin)}' lies in "
                f"{row['psus']} of the {row['stratum_psus']} PSUs of stratum '{row[strata]}' ({strata}); the {method} "
                "replicates that resample or drop that PSU lose the category in this stratum: collapse it with a "
                "neighbour (`collapse`) or use method = \"taylor\"",
                severity="warning",
                column=" x ".join(margin),
                value=category,
                count=int(row["n"]),
            )
        )
    return found
