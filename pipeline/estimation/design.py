"""The sample design as the variance sees it: strata, PSUs, finite population correction, single-PSU policy.

The variance of an estimated total t = sum_h sum_j z_hj, where z_hj is the weighted total of a
(linearized) variable in PSU j of stratum h, is estimated with the first-stage with-replacement
("ultimate cluster") formula, with the first-stage finite population correction when it is given:

    v(t) = sum_h (1 - f_h) * n_h / (n_h - 1) * sum_j (z_hj - zbar_h)^2,     zbar_h = (1/n_h) sum_j z_hj

n_h PSUs sampled in stratum h, f_h = n_h / N_h their sampling fraction (0 without an FPC).
With an FPC and PSUs that are clusters of respondents (a two-stage design), (1 - f_h) applies to
this between-PSU term only and the within-PSU term sum_h f_h sum_j v2(z_hj) is added
(`PsuLayout.second_stage`; Cochran 1977 section 11.9, from memory), with the second-stage sampling
fraction f_2 declared by the design (`second_stage_fraction`; 0, the safe side, when unknown; 1 for
a one-stage cluster sample, which has no within-PSU term). Without an FPC the with-replacement
formula alone is the usual, slightly conservative, estimator.
References: Cochran (1977), Sampling Techniques, 3rd ed., section 11.8, eq. (11.30) with
replacement (from memory); Wolter (2007), Introduction to Variance Estimation, 2nd ed., section 1.4
(from memory); Lohr (2022), Sampling: Design and Analysis, 3rd ed., sections 3.2 (stratified SRS,
eq. 3.6) and 6.3 / 7.5 (with-replacement PSU variance, from memory). For a stratified SRS of
respondents (each respondent its own PSU, weights N_h / n_h) it is exactly Lohr's eq. (3.6).

Size-proportional first stages (`first_stage = "pps"`): the equal-probability f_h = n_h / N_h does
not describe PSUs drawn with probability proportional to size. Without further information the
variance is the with-replacement formula above with f_h = 0 (no FPC: the usual, slightly
conservative, treatment of a without-replacement PPS first stage; Wolter 2007 section 2.4.5,
from memory). With each PSU's first-stage inclusion probability pi_hj (`psu_inclusion`), the
usual approximation puts (1 - pi_hj) on each PSU's squared deviation,
    v(t) = sum_h n_h / (n_h - 1) sum_j (1 - pi_hj) (z_hj - zbar_h)^2  [+ sum_hj pi_hj (1 - f_2) v2(z_hj)]
(Hajek 1964, Ann. Math. Statist. 35:1491-1523, in its simplified form with the plain stratum
mean; Sarndal, Swensson & Wretman 1992, Model Assisted Survey Sampling, section 3.6; both from
memory), and the two-stage within-PSU term takes pi_hj in place of f_h (with equal probabilities
pi_hj = n_h / N_h and the two forms coincide).

Strata with a single PSU have no within-stratum deviation; the policy says what to do:
  "error"      stop, naming the strata (default);
  "certainty"  treat the lone PSU as selected with certainty: it contributes 0;
  "grand-mean" replace the stratum mean by the grand mean of all PSU totals,
               zbar = (1/P) sum_{h, j} z_hj, and add (1 - f_h) * (z_h1 - zbar)^2 (a conservative
               device; our own precise definition, following the idea of measuring the lone
               PSU's deviation from the overall centre -- from memory, no printed source to hand);
  "collapse"   merge the stratum into a declared partner stratum before computing (Wolter 2007,
               section 2.5, collapsed strata, from memory); N_h add up in the merged stratum.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import polars as pl

from pipeline.errors import DataError, Problem, SpecError
from pipeline.estimation.totals import GroupTotals, sum_by

SinglePsu = Literal["error", "certainty", "grand-mean", "collapse"]
SINGLE_PSU_POLICIES: tuple[str, ...] = ("error", "certainty", "grand-mean", "collapse")
PSU_IDS: tuple[str, ...] = ("within-stratum", "unique")
FpcInput = str | Mapping[str, float] | float | None
FIRST_STAGES: tuple[str, ...] = ("equal", "pps")


@dataclass(frozen=True)
class SampleDesign:
    """Which columns hold the design, and how to treat the FPC and lone PSUs.

    population_size: the first-stage population size N_h of each stratum (PSUs in the stratum's
    population; respondents in a one-stage design): a column holding, per respondent, its stratum's
    N_h, or a mapping stratum label -> N_h, or one number without strata.
    sampling_fraction: alternatively the first-stage sampling fraction f_h = n_h / N_h: a column, a
    mapping stratum label -> f_h, or one number for every stratum. Give at most one of the two;
    neither: with-replacement variance, no FPC.
    psu_ids: "within-stratum" (PSU ids restart within each stratum) or "unique" (unique across strata).
    collapse_with: for single_psu "collapse", stratum label -> partner stratum label.
    second_stage_fraction: f_2, the share of each selected PSU's units taken at the second stage
    (0 when unknown, the safe side; 1 when whole PSUs are taken); used only with an FPC.
    first_stage: "equal" (equal-probability PSUs within stratum: the FPC 1 - n_h/N_h applies) or
    "pps" (size-proportional: no FPC, or with psu_inclusion the (1 - pi_hj) approximation of the
    module docstring). psu_inclusion: with "pps", a column holding each PSU's first-stage
    inclusion probability (the same for every respondent of the PSU).
    """

    weight: str
    strata: str | None = None
    psu: str | None = None
    psu_ids: Literal["within-stratum", "unique"] = "within-stratum"
    population_size: FpcInput = None
    sampling_fraction: FpcInput = None
    single_psu: SinglePsu = "error"
    collapse_with: Mapping[str, str] = field(default_factory=dict)
    second_stage_fraction: float = 0.0
    first_stage: str = "equal"
    psu_inclusion: str | None = None

    def __post_init__(self) -> None:
        problems = []
        if self.first_stage not in FIRST_STAGES:
            message = f"the first stage must be one of {', '.join(FIRST_STAGES)}"
            problems.append(Problem(rule="bad-option", message=message, value=str(self.first_stage)))
        if self.first_stage == "pps" and self._fpc is not None:
            message = ("a size-proportional first stage takes no equal-probability FPC (1 - n_h/N_h); give each "
                       "PSU's inclusion probability instead, or nothing (with-replacement variance)")
            problems.append(Problem(rule="bad-option", message=message))
        if self.psu_inclusion is not None and (self.first_stage != "pps" or self.psu is None):
            message = "PSU inclusion probabilities apply to a size-proportional first stage (pps) with PSUs"
            problems.append(Problem(rule="bad-option", message=message, column=self.psu_inclusion))
        if not 0.0 <= self.second_stage_fraction <= 1.0:
            message = "the second-stage sampling fraction must lie between 0 and 1"
            problems.append(Problem(rule="bad-option", message=message, value=str(self.second_stage_fraction)))
        if self.single_psu not in SINGLE_PSU_POLICIES:
            problems.append(
                Problem(
                    rule="bad-option",
                    message=f"single-PSU policy must be one of {', '.join(SINGLE_PSU_POLICIES)}",
                    value=str(self.single_psu),
                )
            )
        if self.population_size is not None and self.sampling_fraction is not None:
            message = "give the population size or the sampling fraction, not both"
            problems.append(Problem(rule="bad-option", message=message))
        if _is_number(self.population_size) and self.strata is not None:
            message = "with strata the population size is one per stratum: give a column or a mapping, not one number"
            problems.append(Problem(rule="bad-option", message=message, value=str(self.population_size)))
        if _is_number(self.sampling_fraction) and not 0.0 < float(self.sampling_fraction) <= 1.0:  # type: ignore[arg-type]
            message = "the sampling fraction must lie in (0, 1]"
            problems.append(Problem(rule="bad-option", message=message, value=str(self.sampling_fraction)))
        if self.psu_ids not in PSU_IDS:
            message = "psu_ids must be 'within-stratum' or 'unique'"
            problems.append(Problem(rule="bad-option", message=message, value=str(self.psu_ids)))
        if self.single_psu == "collapse" and not self.collapse_with:
            message = "single-PSU policy 'collapse' needs partner strata (collapse_with)"
            problems.append(Problem(rule="bad-option", message=message))
        if problems:
            raise SpecError("the sample design is invalid", problems)

    @property
    def columns(self) -> tuple[str, ...]:
        """The data columns the design reads."""
        fpc = self._fpc
        cols = [self.weight, self.strata, self.psu, fpc if isinstance(fpc, str) else None,
                self.psu_inclusion]
        return tuple(c for c in cols if c is not None)

    @property
    def has_fpc(self) -> bool:
        """Whether a population size or sampling fraction is declared."""
        return self._fpc is not None

    @property
    def _fpc(self) -> FpcInput:
        return self.sampling_fraction if self.sampling_fraction is not None else self.population_size

    def fpc_values(self, frame: pl.DataFrame) -> dict[str, float] | float | None:
        """Stratum label -> N_h (or f_h, with `sampling_fraction`) from the column or mapping, or the one
        number given; a column must be constant within stratum."""
        fpc = self._fpc
        if fpc is None or _is_number(fpc):
            return None if fpc is None else float(fpc)  # type: ignore[arg-type]
        if not isinstance(fpc, str):
            return {str(k): float(v) for k, v in fpc.items()}
        if fpc not in frame.columns:
            what = "sampling-fraction" if self.sampling_fraction is not None else "population-size"
            problem = Problem(rule="missing-column", message=f"{what} column not found", column=fpc)
            raise DataError(f"the data lack the {what} column", [problem])
        stratum = pl.col(self.strata) if self.strata else pl.lit("all")
        per = (
            frame.select(stratum.cast(pl.String).alias("s"), pl.col(fpc).cast(pl.Float64).alias("v"))
            .group_by("s")
            .agg(pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"), pl.col("v").null_count().alias("nulls"))
            .sort("s")
        )
        bad = per.filter((pl.col("lo") != pl.col("hi")) | (pl.col("nulls") > 0) | pl.col("lo").is_null())
        if bad.height:
            raise DataError(
                "the FPC column is not one value per stratum",
                [
                    Problem(
                        rule="fpc-not-constant",
                        message="the population size or sampling fraction must be given, and be the same, "
                        "for every respondent of a stratum",
                        column=fpc,
                        count=bad.height,
                        examples=tuple(bad["s"].head(5).to_list()),
                    )
                ],
            )
        return dict(zip(per["s"].to_list(), per["lo"].to_list(), strict=True))

    def inclusion_values(self, frame: pl.DataFrame, gt: GroupTotals) -> np.ndarray | None:
        """(P,) each PSU's first-stage inclusion probability from `psu_inclusion`, in the PSU order of `gt`.

        DataError when it varies within a PSU, is missing, or lies outside (0, 1]."""
        if self.psu_inclusion is None or self.psu is None:
            return None
        stratum = pl.col(self.strata).cast(pl.String) if self.strata else pl.lit("all")
        per = (
            frame.select(stratum.alias("s"), pl.col(self.psu).cast(pl.String).alias("j"),
                         pl.col(self.psu_inclusion).cast(pl.Float64).alias("v"))
            .group_by("s", "j")
            .agg(pl.col("v").min().alias("lo"), pl.col("v").max().alias("hi"), pl.col("v").null_count().alias("nulls"))
        )
        bad = per.filter((pl.col("lo") != pl.col("hi")) | (pl.col("nulls") > 0) | pl.col("lo").is_null()
                         | (pl.col("lo") <= 0) | (pl.col("hi") > 1))
        if bad.height:
            message = "each PSU needs one inclusion probability in (0, 1], the same for all its respondents"
            examples = tuple(f"{s}/{j}" for s, j in bad.select("s", "j").head(5).iter_rows())
            raise DataError("the PSU inclusion probabilities are invalid", [
                Problem(rule="bad-inclusion-probability", message=message, column=self.psu_inclusion,
                        count=bad.height, examples=examples)])
        lookup = {(s, j): v for s, j, v in per.select("s", "j", "lo").iter_rows()}
        keys = [(gt.stratum_labels[h], label) for h, label in zip(gt.psu_stratum.tolist(), gt.psu_labels, strict=True)]
        return np.array([lookup[k] for k in keys], dtype=np.float64)

    def layout(
        self, gt: GroupTotals, *, fpc_values: Mapping[str, float] | float | None = None,
        inclusion: np.ndarray | None = None
    ) -> PsuLayout:
        """The PSU layout for variance: collapsed strata, sampling fractions f_h (or the PSUs' inclusion
        probabilities of a pps first stage, `inclusion_values`), single-PSU check."""
        psu_stratum, labels = gt.psu_stratum, gt.stratum_labels
        n_h = np.bincount(psu_stratum, minlength=len(labels))
        population = _population_counts(
            labels, n_h, fpc_values, fpc_name=self._fpc, as_fraction=self.sampling_fraction is not None
        )
        if self.has_fpc and population is None:
            raise ValueError("the design has an FPC: pass fpc_values=design.fpc_values(frame)")
        if self.single_psu == "collapse":
            psu_stratum, labels, population = _collapse(psu_stratum, labels, population, self.collapse_with)
            n_h = np.bincount(psu_stratum, minlength=len(labels))
        lone = [labels[h] for h in np.flatnonzero(n_h == 1)]
        if lone and self.single_psu in ("error", "collapse"):
            raise DataError(
                "some strata have a single PSU, so their variance cannot be estimated",
                [
                    Problem(
                        rule="single-psu",
                        message="strata with one PSU; choose a single-PSU policy (certainty, grand-mean, or collapse "
                        "with a partner stratum) or fix the design columns",
                        column=self.strata,
                        count=len(lone),
                        examples=tuple(lone[:20]),
                    )
                ],
            )
        fraction = np.zeros(len(labels)) if population is None else n_h / population
        if self.psu_inclusion is not None and inclusion is None:
            raise ValueError("the design has PSU inclusion probabilities: pass inclusion=design.inclusion_values(...)")
        return PsuLayout(
            psu_stratum=psu_stratum, stratum_labels=labels, fraction=fraction, single_psu=self.single_psu,
            second_stage_fraction=self.second_stage_fraction, inclusion=inclusion,
        )


def _is_number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _population_counts(
    labels: tuple[str, ...], n_h: np.ndarray, values: Mapping[str, float] | float | None, *, fpc_name: object,
    as_fraction: bool,
) -> np.ndarray | None:
    """N_h per stratum from the declared population sizes, or from sampling fractions (N_h = n_h / f_h)."""
    if values is None:
        return None
    if not isinstance(values, Mapping):
        values = dict.fromkeys(labels, float(values))
    column = fpc_name if isinstance(fpc_name, str) else None
    missing = [s for s in labels if s not in values]
    problems = []
    if missing:
        problems.append(
            Problem(
                rule="fpc-missing",
                message="no population size or sampling fraction for these strata",
                column=column,
                count=len(missing),
                examples=tuple(missing[:20]),
            )
        )
    pop = np.array([values.get(s, np.nan) for s in labels], dtype=np.float64)
    as_count = np.where(pop > 0, n_h / np.where(pop > 0, pop, 1.0), np.nan) if as_fraction else pop
    bad = [
        s for s, v, n in zip(labels, as_count, n_h, strict=True) if s not in missing and not (v >= n and np.isfinite(v))
    ]
    if bad:
        problems.append(
            Problem(
                rule="fpc-too-small",
                message="a sampling fraction outside (0, 1]" if as_fraction
                else "a population size smaller than the number of sampled PSUs (or 0 / negative)",
                column=column,
                count=len(bad),
                examples=tuple(bad[:20]),
            )
        )
    if problems:
        raise DataError("the finite population correction is invalid", problems)
    return as_count


def _collapse(
    psu_stratum: np.ndarray, labels: tuple[str, ...], population: np.ndarray | None, partners: Mapping[str, str]
) -> tuple[np.ndarray, tuple[str, ...], np.ndarray | None]:
    """Merge each stratum into its declared partner (one level: partners are not chained)."""
    index = {s: h for h, s in enumerate(labels)}
    unknown = [f"{a}->{b}" for a, b in partners.items() if str(a) not in index or str(b) not in index]
    if unknown:
        raise DataError(
            "collapse partners name strata not in the data",
            [
                Problem(
                    rule="collapse-unknown",
                    message="unknown strata in collapse pairs",
                    count=len(unknown),
                    examples=tuple(unknown[:20]),
                )
            ],
        )
    target = np.arange(len(labels))
    for a, b in partners.items():
        target[index[str(a)]] = index[str(b)]
    kept = np.unique(target)
    renumber = np.full(len(labels), -1)
    renumber[kept] = np.arange(len(kept))
    new_population = None
    if population is not None:
        new_population = np.bincount(renumber[target], weights=population, minlength=len(kept))
    new_labels = tuple("+".join(labels[h] for h in np.flatnonzero(target == k)) for k in kept)
    return renumber[target][psu_stratum], new_labels, new_population


@dataclass(frozen=True)
class PsuLayout:
    """Everything the with-replacement PSU variance needs: each PSU's stratum and each stratum's f_h."""

    psu_stratum: np.ndarray  # (P,) stratum index (after collapsing)
    stratum_labels: tuple[str, ...]
    fraction: np.ndarray  # (H,) first-stage sampling fraction f_h (0 without FPC)
    single_psu: str
    second_stage_fraction: float = 0.0  # f_2 (SampleDesign)
    inclusion: np.ndarray | None = None  # (P,) first-stage inclusion probabilities pi_hj of a pps first stage

    @property
    def psu_fraction(self) -> np.ndarray:
        """(P,) the factor each PSU's deviation loses and its within term gains: pi_hj, or f_h of its stratum."""
        if self.inclusion is not None:
            return np.asarray(self.inclusion, dtype=np.float64)
        return self.fraction[self.psu_stratum]

    @property
    def n_strata(self) -> int:
        """H after collapsing."""
        return len(self.stratum_labels)

    @property
    def df(self) -> int:
        """Design degrees of freedom: PSUs minus strata (Korn & Graubard 1999 section 5.2, from memory)."""
        return len(self.psu_stratum) - self.n_strata

    def domain_df(self, present: np.ndarray) -> np.ndarray:
        """Degrees of freedom of domain estimates: PSUs with domain members minus strata with domain members.

        present: (P, m) whether PSU j holds at least one respondent of estimate k's base (the domain's
        respondents who answered). df_k = #{j : present} - #{h : some PSU of h present}, at least 1
        (Korn & Graubard 1999, Analysis of Health Surveys, section 5.2 on degrees of freedom for
        subpopulations, from memory). For a domain found in every PSU it is the design df, PSUs minus
        strata; a domain living in one stratum with 5 PSUs gets 4.
        """
        present = np.asarray(present, dtype=bool)
        psus = present.sum(axis=0)
        strata = (sum_by(self.psu_stratum, present.astype(np.float64), self.n_strata) > 0).sum(axis=0)
        return np.maximum(psus - strata, 1).astype(np.float64)

    @property
    def has_fpc(self) -> bool:
        """Whether a finite population correction is applied."""
        return bool(np.any(self.psu_fraction > 0))

    def _deviations(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(P, m) PSU totals -> deviations from the stratum (or grand) mean and the per-PSU multiplier."""
        h = self.psu_stratum
        n_h = np.bincount(h, minlength=self.n_strata).astype(np.float64)
        sums = sum_by(h, z, self.n_strata)
        centre = sums / np.maximum(n_h, 1)[:, None]
        lone = n_h == 1
        if self.single_psu == "grand-mean" and lone.any():
            centre[lone] = z.mean(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            factor = np.where(lone, 1.0, n_h / (n_h - 1))
        if self.single_psu != "grand-mean":
            factor = np.where(lone, 0.0, factor)
        dev = z - centre[h]
        dev[np.abs(dev) <= 1e-12 * (np.abs(z) + np.abs(centre[h]))] = 0.0  # rounding noise of equal PSU totals
        return dev, (1.0 - self.psu_fraction) * factor[h]

    def variance(self, z: np.ndarray) -> np.ndarray:
        """(P, m) PSU totals of linearized variables -> (m,) variances.

        v = sum_h (1-f_h) n_h/(n_h-1) sum_j (z_hj - zbar_h)^2 (module docstring, with the single-PSU policy).
        """
        dev, factor = self._deviations(np.asarray(z, dtype=np.float64))
        return (factor[:, None] * dev**2).sum(axis=0)

    def second_stage(self, within: np.ndarray) -> np.ndarray:
        """(P, m) second-stage variances v2(z_hj) of the PSU totals (taken with f_2 = 0) ->
        (m,) sum_h f_h (1 - f_2) sum_j v2(z_hj).

        The second term of the two-stage estimator (Cochran 1977 section 11.9, from memory): with a
        first-stage FPC the PSU term only carries the between-PSU part times (1 - f_h), and the
        within-PSU part enters with weight f_h. 0 without an FPC or when whole PSUs are taken.
        """
        f = self.psu_fraction * (1.0 - self.second_stage_fraction)
        return (f[:, None] * np.asarray(within, dtype=np.float64)).sum(axis=0)

    def second_stage_covariance(self, within: np.ndarray) -> np.ndarray:
        """(P, m, m) second-stage covariances of the PSU totals -> (m, m) sum_h f_h (1 - f_2) sum_j c2_j,
        the covariance form of `second_stage` (same weights)."""
        f = self.psu_fraction * (1.0 - self.second_stage_fraction)
        return np.einsum("j,jab->ab", f, np.asarray(within, dtype=np.float64))

    def covariance(self, z: np.ndarray) -> np.ndarray:
        """(P, m) PSU totals -> (m, m) covariance matrix, the same formula with cross-products."""
        dev, factor = self._deviations(np.asarray(z, dtype=np.float64))
        return (factor[:, None] * dev).T @ dev
