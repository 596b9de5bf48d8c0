"""Staging: from a study spec and raw wave files to the typed `responses` table.

The public entry of the package:

- `load_spec(path) -> Study`: read and check a study spec (`spec.py`);
- `check_wave(study, wave)` / `stage_wave(study, wave, ...)`: run every data check on a wave
  file, and stage it into the study database in one transaction (`stage.py`, `checks.py`,
  `readers.py`);
- `open_database(study)`: the study database with its tables (`database.py`);
- `draft_spec(...)`: a spec draft from a data file, for `wavebook init` (`draft.py`).
"""

from pipeline.staging.database import open_database
from pipeline.staging.draft import draft_spec
from pipeline.staging.spec import Study, load_spec
from pipeline.staging.stage import check_wave, stage_wave

__all__ = ["Study", "check_wave", "draft_spec", "load_spec", "open_database", "stage_wave"]
