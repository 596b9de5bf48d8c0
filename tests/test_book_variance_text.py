"""The methodology says what the variance did: what it holds fixed, strata and PSUs only when declared,
replicate re-weighting counts, and a heading that matches the weighting."""

from __future__ import annotations

from pathlib import Path

from conftest import TRACKER_SPEC
from pipeline.book.render import _status
from pipeline.book.weighting import variance_lines
from pipeline.estimation.options import VarianceOptions
from pipeline.staging.spec import load_spec

STEPS = '''
[[weighting]]
step = "rake"
margins = ["region"]
totals = { region = { 1 = 0.55, 2 = 0.45 } }

[[weighting]]
step = "trim"
upper = 4.0
'''


def _study(tmp_path: Path, text: str):
    path = tmp_path / "study.toml"
    path.write_text(text, encoding="utf-8")
    return load_spec(path)


def test_taylor_text_says_what_is_held_fixed(tmp_path: Path) -> None:
    study = _study(tmp_path, TRACKER_SPEC + STEPS)
    text = " ".join(variance_lines(VarianceOptions(), study, calibrated=True))
    assert "trimming factors are held fixed at their full-sample values" in text
    assert "only the auxiliaries of the last calibration step enter the residuals" in text
    assert "primary sampling units within strata" in text
    assert "Every replicate repeats" not in text
    assert _status(study, weighted=True) == "Weighted estimates with confidence intervals"


def test_design_without_strata_or_psus_is_not_described_with_them(tmp_path: Path) -> None:
    bare = TRACKER_SPEC.replace('strata = "region"\npsu = "area"\npsu_ids = "within-stratum"\n', "")
    bare = bare.replace("population = { 1 = 220, 2 = 180 }\n", "")
    study = _study(tmp_path, bare)
    assert study.design.strata is None and study.design.psu is None
    text = " ".join(variance_lines(VarianceOptions(), study, calibrated=False))
    assert "strata" not in text and "primary sampling units" not in text
    assert "respondents (each its own sampling unit)" in text
    # no weighting steps: not headed as weighted estimates
    assert _status(study, weighted=True).startswith("Estimates with design weights")


def test_replicate_text_counts_the_replicates_that_needed_a_collapse(tmp_path: Path) -> None:
    study = _study(tmp_path, TRACKER_SPEC + STEPS)
    options = VarianceOptions(method="bootstrap", replicates=200, seed=1)
    lines = variance_lines(options, study, calibrated=True, replicates={"W1": 200, "W2": 200},
                           replicate_adjustments={"W1": {"collapsed": 3, "unconverged": 0},
                                                  "W2": {"collapsed": 0, "unconverged": 0}})
    text = " ".join(lines)
    assert "in wave W1, 3 of 200 replicates had a margin category with no respondents" in text
    assert "W2" not in text and "trimming factors are held fixed" in text
    clean = " ".join(variance_lines(options, study, calibrated=True, replicate_adjustments={"W1": {"collapsed": 0}}))
    assert "Every replicate met the weighting targets without merging categories" in clean
