"""Locate the folders that ship beside the code: `sql/`, `templates/` and `sample_data/`.

From a checkout (or an editable install) they sit at the project root, one level above this
package; a built wheel carries them inside the package (see `force-include` in pyproject.toml).
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

_PACKAGE_DIR = Path(__file__).resolve().parent


@cache
def resource_dir(name: str) -> Path:
    """Return the folder `name` ("sql", "templates" or "sample_data"), wherever it was installed."""
    for candidate in (_PACKAGE_DIR / name, _PACKAGE_DIR.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(
        f"wavebook cannot find its '{name}' folder (looked in {_PACKAGE_DIR} and {_PACKAGE_DIR.parent}); "
        "reinstall the package"
    )
