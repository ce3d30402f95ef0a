"""Running the Alembic migrations from code (``evenhand migrate``, tests, ``/readyz``)."""

from __future__ import annotations

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

from service.resources import migrations_dir


def alembic_config(database_url: str) -> Config:
    config = Config()
    # The package's own migrations/ folder (package data), wherever it is installed.
    config.set_main_option("script_location", str(migrations_dir()))
    # ConfigParser interpolation: a literal % in a URL (escaped password) must be doubled.
    config.set_main_option("sqlalchemy.url", database_url.replace("%", "%%"))
    return config


def upgrade(database_url: str, revision: str = "head") -> None:
    command.upgrade(alembic_config(database_url), revision)


def head_revisions(database_url: str) -> set[str]:
    return set(ScriptDirectory.from_config(alembic_config(database_url)).get_heads())


def current_revisions(engine: Engine) -> set[str]:
    from service.store.db import READ_ONLY

    with engine.connect().execution_options(**{READ_ONLY: True}) as conn:
        return set(MigrationContext.configure(conn).get_current_heads())


def at_head(engine: Engine) -> bool:
    return current_revisions(engine) == head_revisions(engine.url.render_as_string(False))
