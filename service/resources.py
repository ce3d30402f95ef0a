"""Files the package ships as data, found with :mod:`importlib.resources` so the same code
works from a checkout, an editable install and an installed wheel (no path outside the
package is ever assumed).

- ``service/migrations/``: the Alembic environment and revisions (``evenhand migrate``);
- ``service/policies/``: the policy document's JSON Schema and the example policies.
"""

from __future__ import annotations

from importlib.resources import files
from importlib.resources.abc import Traversable
from pathlib import Path

PACKAGE = "service"


def _directory(name: str) -> Path:
    """A data folder of the package as a file-system path: Alembic reads its scripts from
    disk, so the package must be installed as files (any pip install is; a zip import is not
    supported)."""
    found: Traversable = files(PACKAGE) / name
    path = Path(str(found))
    if not path.is_dir():
        raise FileNotFoundError(f"the installed package has no {name}/ folder at {path}")
    return path


def migrations_dir() -> Path:
    """The Alembic script folder (``env.py``, ``versions/``)."""
    return _directory("migrations")


def policies_dir() -> Path:
    """The folder holding ``schema.json`` and the example policies."""
    return _directory("policies")


def policy_text(file_name: str) -> str:
    """The text of one shipped policy file (``schema.json``, ``fernhollow-follow-up.json``)."""
    return (files(PACKAGE) / "policies" / file_name).read_text(encoding="utf-8")
