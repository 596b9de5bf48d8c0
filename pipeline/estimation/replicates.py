"""Replicate weights: PSU-level factors for the jackknife, BRR/Fay and the bootstrap, and replicate
totals of every cell computed from group totals (no respondent-by-replicate matrix).

Replicate r multiplies the base weight of every respondent of PSU j by `factors[r, j]`. When the
study declares a weighting recipe, each replicate's base weights go through the same recipe
again (its replay on class totals), so the replicate weight of group g = (stratum, PSU j, class c)
is a_r(j) * f_r(c) and all replicate totals of all cells are matrix products on the group totals
(../shared/DESIGN.md). The variance formulas that go with each method are in
`pipeline.estimation.replicate_variance`.

Methods (Wolter 2007, Introduction to Variance Estimation, 2nd ed., chapters 3-5; journal,
volume, page and equation numbers below are from memory; every multiplier is also checked by an
identity or an expectation in tests/test_replicates.py):
  jackknife  delete one PSU, strata ignored: R = P, factor P/(P-1) on the other PSUs, 0 on the
             deleted one; variance multiplier (P-1)/P (Wolter section 4.2, from memory).
  stratified-jackknife
             delete one PSU within its stratum: R = P, factor n_h/(n_h-1) on the other PSUs of
             the deleted PSU's stratum h, 1 elsewhere; multiplier (n_h-1)/n_h per replicate
             (Rust & Rao 1996, Stat. Methods Med. Res. 5:283-310, section 3; Wolter section 4.5).
  brr / fay  balanced repeated replication with exactly 2 PSUs per stratum: replicate r takes
             column h+1 of a normalised Hadamard matrix of order R > H as alpha_rh in {+1, -1};
             factor 1 + (1 - rho) alpha_rh on the stratum's first PSU and 1 - (1 - rho) alpha_rh
             on its second, i.e. 2 - rho and rho (McCarthy 1969; Fay 1989, Proc. ASA Survey
             Research Methods 212-217; Judkins 1990, J. Official Stat. 6:223-234). Variance
             multiplier 1 / (R (1 - rho)^2); rho = 0 is plain BRR.
  bootstrap  Rao-Wu rescaling bootstrap with m_h = n_h - 1 PSUs drawn with replacement in each
             stratum: factor (n_h / (n_h - 1)) * multiplicity (Rao & Wu 1988, JASA 83:231-241,
             eq. 4.1 with m_h = n_h - 1; Rao, Wu & Yue 1992, Survey Methodology 18:209-217,
             section 2); multiplier 1/R. For a linear total the bootstrap expectation of the
             variance is then sum_h n_h/(n_h-1) sum_j (z_hj - zbar_h)^2, the with-replacement
             formula (multinomial moments; checked by simulation in the tests).
  supplied   replicate-weight columns shipped with the data, with their declared method and
             multiplier (`supplied_factors`): successive-difference replication uses 4/R
             (Fay & Train 1995, Proc. ASA Section on Government Statistics 154-159; ACS PUMS
             User Guide section VII.B).

Finite population correction: the jackknife multiplies each replicate's multiplier by
(1 - f_h) of the deleted PSU's stratum (first-stage fraction; Wolter section 4.5, from memory).
BRR, Fay and the bootstrap apply none; the factors' `notes` say so when fractions were declared.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem, SpecError
from pipeline.estimation.hadamard import hadamard, order_at_least
from pipeline.estimation.totals import GroupTotals, sum_by

CENTRES = ("full-sample", "replicate-mean")  # what replicate deviations are taken from
METHODS = ("jackknife", "stratified-jackknife", "brr", "fay", "bootstrap")
SUPPLIED_METHODS = ("jackknife", "stratified-jackknife", "brr", "fay", "bootstrap", "sdr")
DEFAULT_BOOTSTRAP_REPLICATES = 500  # common practice, no source
MAX_FACTOR_BYTES = 2 * 2**30  # largest (R, P) factor matrix built
SPARSE_SHARE = 0.1  # replay through the sparse correction when at most this share of factors differ from 1
FORMULATIONS = ("sparse", "layout", "groups")  # exact formulations of replicate_totals with a recipe
DENSE_FILL = 1.5  # (PSU, class) layout product when P * C <= DENSE_FILL * G (bench data: break-even near 1.8)


@dataclass(frozen=True)
class ReplicateFactors:
    """Replicate r multiplies the base weight of every respondent in PSU j by factors[r, j].

    The variance of an estimate theta is multiplier * sum_r multipliers[r] * (theta_r - centre_r)^2,
    where centre_r is the full-sample estimate ("full-sample") or the mean of the replicates that
    share replicate_stratum[r] ("replicate-mean"; one group for every method but the stratified
    jackknife).
    For supplied replicate weights `factors` has no columns (shape (R, 0)): the replicate totals
    come from the weight columns themselves (`supplied_replicate_totals`).
    """

    factors: np.ndarray  # (R, P)
    multiplier: float  # overall variance multiplier
    multipliers: np.ndarray  # (R,) per-replicate multipliers (ones when unused)
    method: str  # "jackknife" | "stratified-jackknife" | "brr" | "fay" | "bootstrap" | "sdr"
    centre: str = "full-sample"  # deviations around the full-sample estimate, or "replicate-mean"
    df: int | None = None  # degrees of freedom for intervals and tests (see replicate_variance.replicate_df)
    replicate_stratum: np.ndarray | None = None  # (R,) group of each replicate for centre "replicate-mean"
    supplied: bool = False  # True: replicate weights read from the data
    notes: tuple[str, ...] = field(default_factory=tuple)  # methodology notes for the book

    def __post_init__(self) -> None:
        if self.centre not in CENTRES:
            raise SpecError(
                "unknown replicate centre",
                [Problem(rule="bad-option", message=f"centre must be 'full-sample' or 'replicate-mean', not {self.centre!r}")],
            )

    @property
    def n_replicates(self) -> int:
        """R, the number of replicates."""
        return self.factors.shape[0]


def make_replicates(
    method: str,
    psu_stratum: np.ndarray,
    *,
    fay: float = 0.0,
    replicates: int | None = None,
    seed: int | None = None,
    sampling_fraction: np.ndarray | None = None,
    stratum_labels: Sequence[str] | None = None,
    centre: str = "full-sample",
    single_psu: str = "error",
) -> ReplicateFactors:
    """PSU-level replicate factors for `method` (formulas in the module docstring).

    psu_stratum: (P,) stratum index of each PSU (GroupTotals.psu_stratum).
    fay: Fay's rho in [0, 1) for "brr"/"fay" (0 = plain BRR).
    replicates: R for the bootstrap (default 500); ignored otherwise (R is set by the design).
    seed: bootstrap random seed (None = 0, so runs reproduce).
    sampling_fraction: (H,) first-stage sampling fraction per stratum, for the jackknife FPC.
    stratum_labels: names of the strata, used in error messages.
    single_psu: strata with one PSU under "stratified-jackknife" and "bootstrap": "error" (default)
    or "certainty" (the lone PSU keeps factor 1 in every replicate, so the stratum adds no variance,
    as a PSU selected with certainty; the stratified jackknife makes no replicate for it). Collapsing strata is done by passing
    the collapsed `psu_stratum`.

    Raises SpecError for an unknown method or bad option, DataError listing every stratum that the
    method cannot handle (one PSU for the jackknife and bootstrap; not exactly two for BRR).
    """
    psu_stratum = np.asarray(psu_stratum, dtype=np.int64)
    _check_options(method, fay=fay, replicates=replicates, single_psu=single_psu)
    n_strata = int(psu_stratum.max()) + 1 if len(psu_stratum) else 0
    n_h = np.bincount(psu_stratum, minlength=n_strata)
    labels = tuple(stratum_labels) if stratum_labels is not None else tuple(str(h) for h in range(n_strata))
    f_h = np.zeros(n_strata) if sampling_fraction is None else np.asarray(sampling_fraction, dtype=np.float64)
    if f_h.shape != (n_strata,) or np.any((f_h < 0) | (f_h >= 1)):
        raise SpecError(
            "invalid sampling fractions",
            [Problem(rule="bad-option", message=f"need {n_strata} sampling fractions in [0, 1), one per stratum")],
        )
    _check_size(method, len(psu_stratum), replicates)
    if method == "jackknife":
        _require_psus(n_h.sum(keepdims=True), labels=("all strata",), at_least=2, method=method)
        return _jackknife(psu_stratum, f_h, centre=centre, n_strata=n_strata)
    certainty = single_psu == "certainty"
    if method == "stratified-jackknife":
        _require_psus(n_h, labels=labels, at_least=1 if certainty else 2, method=method)
        return _stratified_jackknife(psu_stratum, n_h, f_h, centre=centre)
    if method in ("brr", "fay"):
        _require_two(n_h, labels=labels)
        return _brr(psu_stratum, fay, f_h, centre=centre)
    _require_psus(n_h, labels=labels, at_least=1 if certainty else 2, method=method)
    return _bootstrap(
        psu_stratum,
        n_h,
        f_h,
        replicates=replicates or DEFAULT_BOOTSTRAP_REPLICATES,
        seed=0 if seed is None else seed,
        centre=centre,
    )


def _check_options(method: str, *, fay: float, replicates: int | None, single_psu: str) -> None:
    problems = []
    if single_psu not in ("error", "certainty"):
        problems.append(
            Problem(
                rule="bad-option",
                message=f"single-PSU policy {single_psu!r} is not available with replicates: use 'error' or "
                "'certainty', or collapse the strata first",
            )
        )
    if method not in METHODS:
        problems.append(
            Problem(rule="bad-option", message=f"unknown replicate method {method!r}; use one of {', '.join(METHODS)}")
        )
    if not 0.0 <= fay < 1.0:
        problems.append(Problem(rule="bad-option", message=f"Fay's coefficient must be in [0, 1), not {fay}"))
    if method == "fay" and fay == 0.0:
        problems.append(
            Problem(rule="bad-option", message="method 'fay' needs a coefficient > 0 (with 0, ask for 'brr')")
        )
    if replicates is not None and replicates < 2:
        problems.append(Problem(rule="bad-option", message=f"at least 2 replicates are needed, not {replicates}"))
    if problems:
        raise SpecError("the replicate options are invalid", problems)


def _check_size(method: str, n_psus: int, replicates: int | None) -> None:
    """Refuse factor matrices above MAX_FACTOR_BYTES (a jackknife over respondent-level PSUs)."""
    n_rep = {"jackknife": n_psus, "stratified-jackknife": n_psus, "bootstrap": replicates or DEFAULT_BOOTSTRAP_REPLICATES}.get(method, 0)
    if n_rep * n_psus * 8 > MAX_FACTOR_BYTES:
        raise DataError(
            f"too many PSUs for the '{method}' replicates",
            [
                Problem(
                    rule="too-many-replicates",
                    message=f"{n_psus} PSUs and {n_rep} replicates would need {n_rep * n_psus * 8 / 2**30:.1f} GiB "
                    "of replicate factors; declare the design's PSU column, or use the bootstrap with fewer replicates",
                    count=n_psus,
                )
            ],
        )


def _require_psus(n_h: np.ndarray, *, labels: Sequence[str], at_least: int, method: str) -> None:
    bad = np.flatnonzero(n_h < at_least)
    if len(bad):
        raise DataError(
            f"replicate method '{method}' needs at least {at_least} PSUs in every stratum",
            [
                Problem(
                    rule="single-psu-stratum",
                    message=f"{len(bad)} strata have fewer than {at_least} PSUs; declare a single-PSU policy "
                    "for the design (collapse the stratum with a partner, or treat it as certainty)",
                    count=len(bad),
                    examples=tuple(str(labels[h]) for h in bad[:5]),
                )
            ],
        )


def _require_two(n_h: np.ndarray, *, labels: Sequence[str]) -> None:
    bad = np.flatnonzero(n_h != 2)
    if len(bad):
        raise DataError(
            "balanced repeated replication needs exactly 2 PSUs in every stratum",
            [
                Problem(
                    rule="brr-needs-two-psus",
                    message=f"{len(bad)} strata do not have exactly 2 PSUs (they have "
                    + ", ".join(f"{labels[h]}: {n_h[h]}" for h in bad[:5])
                    + "); use the stratified jackknife ('stratified-jackknife') or the bootstrap instead",
                    count=len(bad),
                    examples=tuple(str(labels[h]) for h in bad[:5]),
                )
            ],
        )


def _fpc_note(method: str, f_h: np.ndarray) -> tuple[str, ...]:
    if np.any(f_h > 0):
        return (f"No finite population correction is applied with {method} replicates.",)
    return ()


def _jackknife(psu_stratum: np.ndarray, f_h: np.ndarray, *, centre: str, n_strata: int) -> ReplicateFactors:
    """Delete-one-PSU jackknife ignoring strata (Wolter 2007 section 4.2, from memory)."""
    p = len(psu_stratum)
    factors = np.full((p, p), p / (p - 1))
    np.fill_diagonal(factors, 0.0)
    notes = ("The unstratified jackknife treats all PSUs as one stratum.",) if n_strata > 1 else ()
    return ReplicateFactors(
        factors=factors,
        multiplier=(p - 1) / p,
        multipliers=1.0 - f_h[psu_stratum],
        method="jackknife",
        centre=centre,
        df=p - 1,
        replicate_stratum=np.zeros(p, dtype=np.int64),
        notes=notes,
    )


def _stratified_jackknife(psu_stratum: np.ndarray, n_h: np.ndarray, f_h: np.ndarray, *, centre: str) -> ReplicateFactors:
    """Stratified delete-one-PSU jackknife (Rust & Rao 1996 section 3; Wolter 2007 section 4.5).

    One replicate per PSU of every stratum with at least 2 PSUs (lone PSUs: certainty, factor 1).
    """
    deleted = np.flatnonzero(n_h[psu_stratum] >= 2)  # (R,) the PSU each replicate deletes
    h = psu_stratum[deleted]
    with np.errstate(divide="ignore"):
        inflate = np.where(n_h >= 2, n_h / np.maximum(n_h - 1, 1), 1.0)
    same = h[:, None] == psu_stratum[None, :]
    factors = np.where(same, inflate[h][:, None], 1.0)
    factors[np.arange(len(deleted)), deleted] = 0.0
    nr = n_h[h]
    sampled = n_h >= 2
    lone = int((n_h == 1).sum())
    return ReplicateFactors(
        factors=factors,
        multiplier=1.0,
        multipliers=(nr - 1) / nr * (1.0 - f_h[h]),
        method="stratified-jackknife",
        centre=centre,
        df=int(n_h[sampled].sum() - sampled.sum()),
        replicate_stratum=h.copy(),
        notes=(f"{lone} single-PSU strata treated as certainty (no variance contribution).",) if lone else (),
    )


def _brr(psu_stratum: np.ndarray, rho: float, f_h: np.ndarray, *, centre: str) -> ReplicateFactors:
    """BRR / Fay factors from a Hadamard matrix of order R > H (full orthogonal balance).

    Columns 1..H of the normalised matrix (the all-ones column 0 is skipped) give alpha_rh, so
    sum_r alpha_rh = 0 and sum_r alpha_rh alpha_rh' = 0 for h != h' (Wolter 2007 section 3.3:
    H < R <= H + 4 for such a set, from memory); R is the smallest constructible order above H.
    """
    n_strata = len(f_h)
    r = order_at_least(n_strata + 1)
    alpha = hadamard(r)[:, 1 : n_strata + 1].astype(np.float64)  # (R, H)
    first = np.zeros(len(psu_stratum), dtype=bool)
    first[np.unique(psu_stratum, return_index=True)[1]] = True
    sign = np.where(first, 1.0, -1.0)
    factors = 1.0 + (1.0 - rho) * alpha[:, psu_stratum] * sign[None, :]
    return ReplicateFactors(
        factors=factors,
        multiplier=1.0 / (r * (1.0 - rho) ** 2),
        multipliers=np.ones(r),
        method="fay" if rho > 0 else "brr",
        centre=centre,
        df=n_strata,
        replicate_stratum=np.zeros(r, dtype=np.int64),
        notes=_fpc_note("BRR" if rho == 0 else "Fay", f_h),
    )


def _bootstrap(
    psu_stratum: np.ndarray, n_h: np.ndarray, f_h: np.ndarray, *, replicates: int, seed: int, centre: str
) -> ReplicateFactors:
    """Rao-Wu rescaling bootstrap, m_h = n_h - 1 (Rao & Wu 1988 eq. 4.1; Rao, Wu & Yue 1992 section 2).

    In each replicate and stratum, m_h = n_h - 1 PSUs are drawn with replacement; PSU j's factor is
    n_h / (n_h - 1) times the number of times it was drawn, so the factors of a stratum sum to n_h.
    All draws of all replicates are made at once (one uniform array, one bincount).
    """
    p, n_strata = len(psu_stratum), len(n_h)
    order = np.argsort(psu_stratum, kind="stable")
    start = np.concatenate([[0], np.cumsum(n_h)[:-1]])
    draw_stratum = np.repeat(np.arange(n_strata), n_h - 1)  # (D,), D = P - H
    rng = np.random.default_rng(seed)
    u = rng.random((replicates, len(draw_stratum)))
    drawn = order[start[draw_stratum] + np.floor(u * n_h[draw_stratum]).astype(np.int64)]
    flat = (np.arange(replicates)[:, None] * p + drawn).ravel()
    counts = np.bincount(flat, minlength=replicates * p).reshape(replicates, p)
    lone = n_h == 1
    inflate = np.where(lone, 0.0, n_h / np.maximum(n_h - 1, 1))
    factors = counts * inflate[psu_stratum][None, :] + lone[psu_stratum][None, :]  # lone PSUs: factor 1
    sampled = ~lone
    notes = _fpc_note("bootstrap", f_h)
    if lone.any():
        notes += (f"{int(lone.sum())} single-PSU strata treated as certainty (no variance contribution).",)
    return ReplicateFactors(
        factors=factors,
        multiplier=1.0 / replicates,
        multipliers=np.ones(replicates),
        method="bootstrap",
        centre=centre,
        df=int(n_h[sampled].sum() - sampled.sum()),
        replicate_stratum=np.zeros(replicates, dtype=np.int64),
        notes=notes,
    )


SUPPLIED_MULTIPLIERS = {  # default overall variance multiplier of supplied replicate weights, by method
    "sdr": "4/R",
    "jackknife": "(R-1)/R",
    "stratified-jackknife": "1 (with the per-replicate multipliers)",
    "brr": "1/R",
    "fay": "1/(R (1-rho)^2)",
    "bootstrap": "1/R",
}


def supplied_option_problems(
    method: object,
    *,
    fay: object = 0.0,
    multiplier: object = None,
    multipliers: object = None,
    df: object = None,
    centre: object = "full-sample",
) -> list[tuple[str, str, object]]:
    """The rules of supplied replicate-weight options: (option, message, value) for each one broken.

    The one statement of these rules: the `estimate` request (`api._check_request`), the study
    spec's `[variance]` table (`options.parse_variance`) and `supplied_factors` all call it, each
    naming the options its own way. Options: replicate_method (how the weights were made, one of
    SUPPLIED_METHODS), fay (Fay's rho: required in (0, 1) for "fay", an error with any other
    method), multiplier (overall, > 0; default from the method), multipliers (per replicate, > 0:
    required for "stratified-jackknife", (n_h - 1)/n_h of each replicate's stratum, Wolter 2007
    section 4.5; an error with any other method), df (a whole number >= 1; required for "brr" and
    "fay": the number of half-sample pairs, Wolter 2007 section 3.5, from memory, not R - 1),
    centre ("full-sample" or "replicate-mean", the mean of all the replicates; not with
    "stratified-jackknife", whose replicate strata are not supplied).
    """
    out: list[tuple[str, str, object]] = []
    if method not in SUPPLIED_METHODS:
        out.append(("replicate_method", f"must be one of {', '.join(SUPPLIED_METHODS)}", method))
        return out

    def number(value: object) -> bool:
        return isinstance(value, int | float) and not isinstance(value, bool) and bool(np.isfinite(value))

    if not number(fay) or not 0.0 <= float(fay) < 1.0:  # type: ignore[arg-type]
        out.append(("fay", "Fay's coefficient must be a number in [0, 1)", fay))
    elif method == "fay" and float(fay) == 0.0:  # type: ignore[arg-type]
        out.append(("fay", "the fay method needs Fay's coefficient rho in (0, 1) (its multiplier is "
                    "1/(R (1-rho)^2)), e.g. 0.5", fay))
    elif method != "fay" and float(fay) != 0.0:  # type: ignore[arg-type]
        out.append(("fay", f"fay applies to the fay method only; it does not apply to {method}", fay))
    if multiplier is not None and (not number(multiplier) or not float(multiplier) > 0):  # type: ignore[arg-type]
        out.append(("multiplier", "must be a number > 0", multiplier))
    if multipliers is not None and method != "stratified-jackknife":
        out.append(("multipliers", "per-replicate multipliers apply to stratified-jackknife replicate weights only; "
                    f"for {method} give the overall multiplier (default {SUPPLIED_MULTIPLIERS[method]})", multipliers))
    elif multipliers is not None and (
        not isinstance(multipliers, list | tuple)
        or not all(number(m) and float(m) > 0 for m in multipliers)  # type: ignore[union-attr]
    ):
        out.append(("multipliers", "must be a list of numbers > 0, one per replicate", multipliers))
    elif method == "stratified-jackknife" and multipliers is None:
        out.append(("multipliers", "stratified-jackknife replicate weights need their per-replicate multipliers, "
                    "(n_h - 1)/n_h of each replicate's stratum, one per replicate column in order", None))
    if df is not None and (isinstance(df, bool) or not isinstance(df, int) or df < 1):
        out.append(("df", "must be a whole number >= 1", df))
    elif method in ("brr", "fay") and df is None:
        out.append(("df", f"{method} replicate weights need their degrees of freedom, the number of half-sample "
                    "pairs (strata), not R - 1 (Wolter 2007 section 3.5, from memory)", None))
    if centre not in CENTRES:
        out.append(("centre", f"must be one of {', '.join(CENTRES)}", centre))
    elif centre == "replicate-mean" and method == "stratified-jackknife":
        out.append(("centre", "stratified-jackknife replicates are centred on their stratum's mean, and the strata of "
                    "supplied replicates are not known: use full-sample", centre))
    return out


def supplied_factors(
    method: str,
    replicates: int,
    *,
    fay: float = 0.0,
    multiplier: float | None = None,
    multipliers: np.ndarray | Sequence[float] | None = None,
    centre: str = "full-sample",
    df: int | None = None,
) -> ReplicateFactors:
    """The variance recipe of replicate-weight columns shipped with the data.

    Default multipliers when `multiplier` is not declared (SUPPLIED_MULTIPLIERS; Wolter 2007,
    Introduction to Variance Estimation): sdr 4/R (Fay & Train 1995; ACS PUMS User Guide VII.B),
    jackknife (R-1)/R, brr 1/R, fay 1/(R (1-rho)^2), bootstrap 1/R; stratified-jackknife 1 with
    the declared per-replicate `multipliers` ((n_h-1)/n_h of each replicate's stratum). df:
    declared (brr and fay must declare it: the number of half-sample pairs), else R - 1 (common
    practice, no source). The option rules are `supplied_option_problems`; SpecError lists every
    rule broken, with the count of replicate columns.
    """
    problems = [
        Problem(rule="bad-option", message=f"{key}: {message}", value=None if value is None else str(value))
        for key, message, value in supplied_option_problems(
            method, fay=fay, multiplier=multiplier, df=df, centre=centre,
            multipliers=None if multipliers is None else [float(m) for m in np.ravel(multipliers)],
        )
    ]
    if replicates < 2:
        problems.append(Problem(rule="bad-option", message=f"at least 2 replicate-weight columns are needed, not {replicates}"))
    if multipliers is not None and np.size(multipliers) != replicates:
        problems.append(
            Problem(rule="bad-option", message=f"multipliers: {np.size(multipliers)} per-replicate multipliers for "
                    f"{replicates} replicate-weight columns")
        )
    if problems:
        raise SpecError("the supplied replicate-weight options are invalid", problems)
    defaults = {
        "sdr": 4.0 / replicates,
        "jackknife": (replicates - 1) / replicates,
        "stratified-jackknife": 1.0,
        "brr": 1.0 / replicates,
        "fay": 1.0 / (replicates * (1.0 - fay) ** 2),
        "bootstrap": 1.0 / replicates,
    }
    return ReplicateFactors(
        factors=np.empty((replicates, 0)),
        multiplier=defaults[method] if multiplier is None else float(multiplier),
        multipliers=np.ones(replicates) if multipliers is None else np.asarray(multipliers, dtype=np.float64).ravel(),
        method=method,
        centre=centre,
        df=replicates - 1 if df is None else df,
        replicate_stratum=np.zeros(replicates, dtype=np.int64),
        supplied=True,
    )


def supplied_replicate_totals(
    frame: pl.DataFrame,
    quantities: dict[str, pl.Expr],
    weights: Sequence[str],
    *,
    source: str | None = None,
    chunk_bytes: int = 256 * 2**20,
) -> np.ndarray:
    """Replicate totals t_rk = sum_i W_ir y_ik from replicate-weight columns: products W^T Y, the
    quantities Y evaluated in blocks of at most `chunk_bytes` of (respondent, quantity) values.

    weights: the R replicate-weight columns, in replicate order. Raises DataError naming every
    missing column and every column with missing or non-finite weights (with counts); `source`
    names the file in those messages. Negative replicate weights are accepted: calibrated
    successive-difference replicates can be negative (the ACS 2017-2021 PUMS files carry some).
    """
    missing = [c for c in weights if c not in frame.columns]
    if missing:
        raise DataError(
            "replicate-weight columns are missing",
            [Problem(rule="missing-column", message="replicate-weight column not in the data", file=source, column=c) for c in missing],
        )
    w = frame.select(pl.col(c).cast(pl.Float64) for c in weights)
    bad = w.select(
        *[pl.col(c).is_null().sum().alias(f"null:{c}") for c in weights],
        *[(~pl.col(c).is_finite()).sum().alias(f"inf:{c}") for c in weights],
    ).row(0, named=True)
    what = {"null": "missing replicate weights", "inf": "non-finite replicate weights"}
    problems = [
        Problem(rule="bad-weight", message=what[key.split(":", 1)[0]], file=source, column=key.split(":", 1)[1], count=n)
        for key, n in bad.items()
        if n
    ]
    if problems:
        raise DataError("the replicate-weight columns are invalid", problems)
    wt = w.to_numpy().T  # (R, n)
    names = list(quantities)
    step = max(1, chunk_bytes // (8 * max(frame.height, 1)))  # quantities per block of (n, k) values
    out = np.empty((len(weights), len(names)))
    for lo in range(0, len(names), step):
        block = names[lo : lo + step]
        y = frame.select(quantities[name].cast(pl.Float64).alias(name) for name in block).to_numpy()
        out[:, lo : lo + len(block)] = wt @ y
    return out


def _class_by_psu(gt: GroupTotals, values: np.ndarray) -> np.ndarray:
    """(G,) -> (P, C): sum of `values` over the groups of each (PSU, class)."""
    out = np.zeros((gt.n_psus, gt.n_classes))
    np.add.at(out, (gt.psu, gt.cls), values)
    return out


def _base_column(gt: GroupTotals, base: str | None) -> np.ndarray:
    if base is None:
        raise ValueError("replaying a weighting recipe needs `base`, the quantity whose totals are the weight sums")
    return gt.totals[:, gt.column(base)]


def reweighted_totals(
    gt: GroupTotals, *, reweight: Callable[[np.ndarray], np.ndarray], base: str
) -> np.ndarray:
    """Full-sample totals after the recipe: t_k = sum_c f(c) Y_c[c, k], f = reweight(B) with B the
    class totals of the weights in `gt` (the quantity `base` = 1 for every respondent). (K,)"""
    b = gt.class_totals(_base_column(gt, base)[:, None])[:, 0]
    f = np.asarray(reweight(b[None, :]), dtype=np.float64)[0]
    return f @ gt.class_totals()


def replicate_totals(
    gt: GroupTotals,
    rf: ReplicateFactors,
    *,
    reweight: Callable[[np.ndarray], np.ndarray] | None = None,
    base: str | None = None,
    chunk_bytes: int = 256 * 2**20,
    how: str = "auto",
) -> np.ndarray:
    """Replicate totals of every quantity: (R, K).

    Without a recipe: t_r = A_r @ Y_psu, i.e. factors (R, P) times PSU totals (P, K).
    With a recipe: B_r(c) = sum_g a_r(j_g) W_g 1[c_g = c] are the replicate class totals of the
    weights (W = totals of the quantity `base`, which is 1 for every respondent), f_r = reweight(B)
    (R, C) are the replayed class factors, and t_rk = sum_g a_r(j_g) f_r(c_g) Y[g, k]
    (../shared/DESIGN.md). Three exact formulations of the same sum (they differ only by
    floating-point rounding); `how` = "auto" picks by cost, or names one of them:
      "sparse"  f_r @ Y_class plus a correction over the groups whose PSU factor differs from 1;
                auto when at most SPARSE_SHARE of the factors differ from 1 (jackknife);
      "layout"  t_r = sum_c f_r(c) (a_r @ Y_c): one BLAS product of the factors (R, P) with the
                totals laid out as (P, C*K), then a batched product with the class factors over
                C; no (R, G) matrix is built; auto when the groups fill at least 1/DENSE_FILL of
                the (PSU, class) grid (bootstrap, BRR, Fay on PSUs holding most classes);
      "groups"  a dense (R, G) @ (G, K) product of the replicate weights a_r(j_g) f_r(c_g); auto
                otherwise (many classes, each in few PSUs: the layout would be mostly zeros).
    The dense ones run in chunks of replicates holding at most `chunk_bytes` of intermediate
    values. No loop over replicates, no respondent-level matrix.
    """
    if rf.supplied:
        raise ValueError("supplied replicate weights have no PSU factors: use supplied_replicate_totals")
    if how not in ("auto", *FORMULATIONS):
        raise ValueError(f"how must be 'auto' or one of {', '.join(FORMULATIONS)}, not {how!r}")
    if rf.factors.shape[1] != gt.n_psus:
        raise ValueError(f"the factors have {rf.factors.shape[1]} PSUs, the group totals {gt.n_psus}")
    if reweight is None:
        return rf.factors @ gt.psu_totals()
    b = rf.factors @ _class_by_psu(gt, _base_column(gt, base))  # (R, C)
    f = np.asarray(reweight(b), dtype=np.float64)
    if f.shape != b.shape:
        raise ValueError(f"reweight returned shape {f.shape}, expected {b.shape}")
    delta = rf.factors - 1.0
    if how == "auto":
        how = _formulation(gt, delta, n_classes=f.shape[1])
    if how == "sparse":
        return f @ gt.class_totals() + _sparse_correction(gt, delta, f)
    if how == "layout":
        return _layout_product(gt, rf.factors, f, chunk_bytes=chunk_bytes)
    rows = max(1, chunk_bytes // (8 * max(len(gt.psu), 1)))
    return np.concatenate(
        [
            (rf.factors[s : s + rows][:, gt.psu] * f[s : s + rows][:, gt.cls]) @ gt.totals
            for s in range(0, rf.n_replicates, rows)
        ]
    )


def _formulation(gt: GroupTotals, delta: np.ndarray, *, n_classes: int) -> str:
    """The cheapest exact formulation of `replicate_totals` (cost rules in its docstring)."""
    if np.count_nonzero(delta) <= SPARSE_SHARE * delta.size:
        return "sparse"
    if gt.n_psus * n_classes <= DENSE_FILL * len(gt.psu):
        return "layout"
    return "groups"


def _psu_class_layout(gt: GroupTotals, n_classes: int) -> np.ndarray:
    """Group totals laid out as a C-contiguous (P, C*K) array: row j holds Y[(j, c), :] for c = 0..C-1
    (zeros where PSU j has no respondent of class c). A view of `gt.totals` when the groups are
    already every (PSU, class) pair in order (GroupTotals sorts groups by stratum, PSU, class)."""
    key = gt.psu * n_classes + gt.cls
    size = gt.n_psus * n_classes
    k = gt.totals.shape[1]
    if len(key) == size and np.array_equal(key, np.arange(size)):
        return np.ascontiguousarray(gt.totals, dtype=np.float64).reshape(gt.n_psus, n_classes * k)
    if np.all(key[1:] > key[:-1]):  # one group per (PSU, class), in order: place the rows
        y = np.zeros((size, k))
        y[key] = gt.totals
        return y.reshape(gt.n_psus, n_classes * k)
    return sum_by(key, gt.totals, size).reshape(gt.n_psus, n_classes * k)


def _layout_product(gt: GroupTotals, factors: np.ndarray, f: np.ndarray, *, chunk_bytes: int) -> np.ndarray:
    """t_rk = sum_c f_r(c) sum_j a_r(j) Y[(j, c), k] (the replicate totals of `replicate_totals`).

    Contracting over PSUs first turns the work into Z = A @ Y_layout, one (R, P) @ (P, C*K) BLAS
    product (multi-threaded), then t_r = f_r @ Z_r (C, K), one einsum over C (a few milliseconds):
    the same R*P*C*K multiply-adds as the (R, G) @ (G, K) product when the grid is full, without
    building or gathering the (R, G) replicate weights. Contracting over classes first would make
    an (R, P*K) intermediate, larger than Z's (R, C*K) whenever P > C. Chunks of replicates keep Z
    within `chunk_bytes`.
    """
    n_rep, n_classes = f.shape
    y = _psu_class_layout(gt, n_classes)
    k = gt.totals.shape[1]
    rows = min(n_rep, max(1, chunk_bytes // (8 * max(y.shape[1], 1))))
    z = np.empty((rows, y.shape[1]))
    out = np.empty((n_rep, k))
    for s in range(0, n_rep, rows):
        e = min(s + rows, n_rep)
        np.matmul(factors[s:e], y, out=z[: e - s])
        np.einsum("rc,rck->rk", f[s:e], z[: e - s].reshape(e - s, n_classes, k), out=out[s:e])
    return out


def _sparse_correction(gt: GroupTotals, delta: np.ndarray, f: np.ndarray) -> np.ndarray:
    """sum_g (a_r(j_g) - 1) f_r(c_g) Y[g, :] over the (replicate, PSU) pairs with a_r(j) != 1."""
    from scipy import sparse

    order = np.argsort(gt.psu, kind="stable")
    count = np.bincount(gt.psu, minlength=gt.n_psus)
    start = np.concatenate([[0], np.cumsum(count)[:-1]])
    r_idx, p_idx = np.nonzero(delta)
    reps = count[p_idx]
    rows = np.repeat(r_idx, reps)
    offset = np.arange(reps.sum()) - np.repeat(np.cumsum(reps) - reps, reps)
    groups = order[np.repeat(start[p_idx], reps) + offset]
    values = np.repeat(delta[r_idx, p_idx], reps) * f[rows, gt.cls[groups]]
    matrix = sparse.csr_matrix((values, (rows, groups)), shape=(delta.shape[0], len(gt.psu)))
    return np.asarray(matrix @ gt.totals)
