"""Per-respondent replicate weights of a weighted wave, for export (`wavebook weigh --export --replicates`).

The book's replicate variance never forms per-respondent replicate weights (`replicates` works on
group totals). An export has to: replicate r's weight of respondent i is

    w_ir = b_i * a_r(psu_i) * f_r(c_i)

with b_i the adjusted base weight (nonresponse and trimming factors held fixed), a_r the PSU
factors of the study's replicate method (the same `make_replicates` call as the book, so the same
replicates, bootstrap draws included) and f_r the weighting recipe replayed on replicate r's class
totals. Estimating from these columns as supplied replicate weights, with the method's multiplier
and centre, repeats the book's replicate variance exactly (`tests/test_replicate_export.py`).
The (n, R) matrix exists here only because the file holds it; the work is one sparse product for
the class totals and one replay of the recipe.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.errors import Problem, SpecError
from pipeline.estimation.design import SampleDesign
from pipeline.estimation.replicate_variance import replicate_df
from pipeline.estimation.replicates import make_replicates
from pipeline.estimation.totals import group_totals

_BASE = "__base_weight"
_CLASS = "__class"
_ROW = "__row"


@dataclass(frozen=True)
class ReplicateExport:
    """The replicate weights of one wave and how to use them.

    weights: (n, R) replicate weights in the order of `ids`; method, multiplier (overall),
    multipliers (per replicate), centre, df: the variance recipe, as `estimate(variance="supplied",
    replicate_method=method, replicate_multiplier=multiplier, replicate_df=df)` takes it (the
    per-replicate multipliers are all 1 except for the stratified jackknife).
    """

    ids: pl.Series
    weights: np.ndarray
    method: str
    multiplier: float
    multipliers: np.ndarray
    centre: str
    df: int

    def metadata(self) -> dict[str, object]:
        """The variance recipe as JSON-ready values (the export's sidecar)."""
        return {"method": self.method, "multiplier": self.multiplier, "multipliers": self.multipliers.tolist(),
                "centre": self.centre, "df": self.df, "replicates": int(self.weights.shape[1])}


def replicate_weights(
    responses: pl.DataFrame,
    design: SampleDesign,
    recipe: object,
    *,
    method: str,
    fay: float = 0.0,
    replicates: int | None = None,
    seed: int | None = None,
    fpc_values: object = None,
) -> ReplicateExport:
    """The wave's re-weighted replicate weights (module docstring) for a generated replicate method.

    responses: the wave's rows with `respondent_id` and the design columns; recipe: its
    `FittedRecipe`; design: the study design as `SampleDesign` (weight column ignored).
    """
    from scipy import sparse

    if method in ("taylor", "supplied"):
        problem = Problem(rule="bad-option", message="replicate weights need a replicate variance method "
                          "(jackknife, stratified-jackknife, brr, fay or bootstrap) in [variance]", value=method)
        raise SpecError("no replicate method to export", [problem])
    ids = recipe.ids.cast(pl.String)  # type: ignore[attr-defined]
    weights = pl.DataFrame({"respondent_id": ids, _BASE: recipe.adjusted_base,  # type: ignore[attr-defined]
                            _CLASS: recipe.classes.astype(np.int64)})  # type: ignore[attr-defined]
    frame = weights.join(responses.with_columns(pl.col("respondent_id").cast(pl.String)), on="respondent_id",
                         how="left", validate="1:1", maintain_order="left")
    psu_column, psu_ids = design.psu, design.psu_ids
    if psu_column is None:  # every respondent its own PSU: number them
        psu_column, psu_ids = _ROW, "unique"
        frame = frame.with_row_index(_ROW)
    gt = group_totals(frame, {"one": pl.lit(1.0)}, weight=_BASE, strata=design.strata, psu=psu_column,
                      classes=_CLASS, psu_ids=psu_ids)
    layout = design.layout(gt, fpc_values=fpc_values)  # type: ignore[arg-type]
    rf = make_replicates(method, layout.psu_stratum, fay=fay, replicates=replicates, seed=seed,
                         sampling_fraction=layout.fraction if layout.has_fpc else None,
                         stratum_labels=layout.stratum_labels,
                         single_psu="certainty" if design.single_psu == "certainty" else "error")
    psu = _psu_index(frame, design.strata, psu_column, gt)
    b = frame[_BASE].to_numpy().astype(np.float64)
    cls = frame[_CLASS].to_numpy()
    onehot = sparse.csr_array((b, (np.arange(len(b)), cls)), shape=(len(b), recipe.class_totals().shape[0]))  # type: ignore[attr-defined]
    a = rf.factors[:, psu]  # (R, n)
    class_totals = np.asarray((sparse.csr_array(a) @ onehot).todense())
    f = recipe.replay(class_totals)  # type: ignore[attr-defined]
    w = (a * b[None, :] * np.take_along_axis(f, np.broadcast_to(cls, a.shape), axis=1)).T
    return ReplicateExport(ids=frame["respondent_id"], weights=w, method=method, multiplier=float(rf.multiplier),
                           multipliers=np.asarray(rf.multipliers, dtype=np.float64), centre=rf.centre,
                           df=int(replicate_df(rf)))


def _psu_index(frame: pl.DataFrame, strata: str | None, psu: str, gt: object) -> np.ndarray:
    """(n,) each row's PSU index in `gt`, by joining the rows' (stratum, PSU) labels to gt's PSU labels."""
    stratum = pl.col(strata).cast(pl.String) if strata else pl.lit("all")
    keys = frame.select(stratum.alias("s"), pl.col(psu).cast(pl.String).alias("j"))
    labels = pl.DataFrame({"s": [gt.stratum_labels[h] for h in gt.psu_stratum.tolist()],  # type: ignore[attr-defined]
                           "j": list(gt.psu_labels), "p": np.arange(gt.n_psus)})  # type: ignore[attr-defined]
    return keys.join(labels, on=["s", "j"], how="left", maintain_order="left")["p"].to_numpy().astype(np.int64)
