"""Base weights from the sample design, and the weighting-class nonresponse adjustment.

Base weight (Horvitz & Thompson 1952; Lohr, Sampling: Design and Analysis, 3rd ed., section 2.4
and 3.2): d_i = 1 / pi_i from a selection-probability column; or a supplied weight column; or
N_h / n_h in a one-stage stratified design whose stratum populations are declared; or equal
weights (1) for non-probability samples and designs without weight information.

Nonresponse adjustment by weighting classes (Lohr 3rd ed., section 8.5.1): within class c,
respondents' weights are multiplied by (sum_{R_c} d + sum_{NR_c} d) / sum_{R_c} d; ineligible
units keep their weight out of the population and, like nonrespondents, leave the data set.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem
from pipeline.weighting.classes import build_classes
from pipeline.weighting.diagnostics import ClassResponse
from pipeline.weighting.steps import NonresponseStep

EXAMPLES = 5


def _examples(ids: pl.Series, mask: np.ndarray) -> tuple[str, ...]:
    return tuple(str(x) for x in ids.filter(pl.Series(mask)).head(EXAMPLES).to_list())


def check_base(weights: np.ndarray, ids: pl.Series, *, column: str, source: str) -> None:
    """Raise one DataError if any base weight is missing, not finite, zero or negative (with counts and example ids)."""
    problems = []
    missing = ~np.isfinite(weights)
    if missing.any():
        problems.append(Problem("base-weight-missing", f"{source}: base weight missing or not finite", column=column,
                                count=int(missing.sum()), examples=_examples(ids, missing)))
    bad = np.isfinite(weights) & (weights <= 0)
    if bad.any():
        problems.append(Problem("base-weight-nonpositive", f"{source}: base weight zero or negative", column=column,
                                count=int(bad.sum()), examples=_examples(ids, bad)))
    if problems:
        raise DataError(f"{source}: base weights are unusable", problems)


def design_base_weights(data: pl.DataFrame, study, *, id_column: str = "respondent_id") -> tuple[np.ndarray, str]:  # noqa: ANN001
    """Base weights of the staged rows from `study.design`; returns (weights, how they were formed)."""
    design = study.design
    ids = data[id_column]
    source = f"wave data ({data.height} rows)"
    if design.kind == "nonprobability":
        return np.ones(data.height), "equal base weights (non-probability sample)"
    if design.base_weight is not None:
        w = data[design.base_weight].cast(pl.Float64).fill_null(float("nan")).to_numpy().astype(float)
        check_base(w, ids, column=design.base_weight, source=source)
        return w, f"base weight column '{design.base_weight}'"
    if design.selection_probability is not None:
        col = design.selection_probability
        p = data[col].cast(pl.Float64).fill_null(float("nan")).to_numpy().astype(float)
        over = np.isfinite(p) & (p > 1)
        if over.any():
            raise DataError(f"{source}: selection probabilities above 1", [
                Problem("selection-probability", "selection probability above 1", column=col, count=int(over.sum()),
                        examples=_examples(ids, over))])
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where(np.isfinite(p) & (p > 0), 1.0 / p, np.where(np.isfinite(p), -1.0, np.nan))
        check_base(w, ids, column=col, source=source)
        return w, f"1 / selection probability '{col}'"
    if design.strata is not None and design.psu is None and design.population:
        strata = data[design.strata].cast(pl.String)
        sizes = {str(k): float(v) for k, v in design.population.items()}
        n_h = strata.value_counts()
        counts = dict(zip(n_h[design.strata].to_list(), n_h["count"].to_list()))
        undeclared = sorted(set(counts) - set(sizes))
        if undeclared:
            raise DataError(f"{source}: strata without a declared population", [
                Problem("stratum-population", f"stratum '{s}' has no entry in design.population", column=design.strata,
                        value=s, count=counts[s]) for s in undeclared])
        per = {s: sizes[s] / counts[s] for s in counts}
        return strata.replace_strict(per, return_dtype=pl.Float64).to_numpy(), "stratum population / stratum sample size"
    return np.ones(data.height), "equal base weights (no weight information in the design)"


@dataclass(frozen=True)
class NonresponseResult:
    """Factor per input row (1 for rows dropped), rows kept (respondents), class response table, dropped counts."""

    factor: np.ndarray
    keep: np.ndarray
    response: tuple[ClassResponse, ...]
    dropped: dict[str, int]


def adjust_nonresponse(data: pl.DataFrame, base: np.ndarray, step: NonresponseStep, *, id_column: str) -> NonresponseResult:
    """Weighting-class nonresponse adjustment (see module docstring); all status problems in one DataError."""
    where = f"weighting step {step.index + 1}"
    status = data[step.status].cast(pl.String)
    responded = status.is_in(list(step.responded)).fill_null(False).to_numpy()
    nonresp = status.is_in(list(step.nonrespondent)).fill_null(False).to_numpy()
    inelig = status.is_in(list(step.ineligible)).fill_null(False).to_numpy()
    unknown = ~(responded | nonresp | inelig)
    problems: list[Problem] = []
    if unknown.any():
        values = status.filter(pl.Series(unknown)).fill_null("(missing)").value_counts(sort=True)
        for value, count in values.iter_rows():
            problems.append(Problem("status-unknown", f"{where}: status code not listed as responded, nonrespondent or "
                                    "ineligible", column=step.status, value=str(value), count=int(count),
                                    examples=_examples(data[id_column], (status.fill_null("(missing)") == value).to_numpy())))
    classes = build_classes(data, step.classes)
    w_r = classes.totals(base * responded)
    w_nr = classes.totals(base * nonresp)
    n_r = np.bincount(classes.index, weights=responded, minlength=classes.size)
    n_nr = np.bincount(classes.index, weights=nonresp, minlength=classes.size)
    n_in = np.bincount(classes.index, weights=inelig, minlength=classes.size)
    labels = classes.labels()
    for c in np.flatnonzero((n_r == 0) & (n_nr > 0)):
        problems.append(Problem("nonresponse-empty-class", f"{where}: class {labels[c]} has nonrespondents but no "
                                "respondent to carry their weight; merge it with another class", value=labels[c],
                                count=int(n_nr[c])))
    if problems:
        raise DataError(f"{where}: cannot adjust for nonresponse", problems)
    class_factor = np.divide(w_r + w_nr, w_r, out=np.ones_like(w_r), where=w_r > 0)
    factor = np.where(responded, class_factor[classes.index], 1.0)
    response = tuple(
        ClassResponse(labels[c], int(classes.counts[c]), int(n_r[c]), int(n_nr[c]), int(n_in[c]),
                      float(n_r[c] / (n_r[c] + n_nr[c])) if n_r[c] + n_nr[c] else float("nan"),
                      float(w_r[c] / (w_r[c] + w_nr[c])) if w_r[c] + w_nr[c] else float("nan"), float(class_factor[c]))
        for c in range(classes.size)
    )
    dropped = {"nonrespondents": int(nonresp.sum()), "ineligible": int(inelig.sum())}
    return NonresponseResult(factor, responded, response, dropped)
