"""The models and the Alembic migrations describe the same schema, on both databases."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Engine, inspect

import service.store.all_models  # noqa: F401
from service.store.migrate import at_head
from service.store.models import Base


def test_autogenerate_finds_no_difference(engine: Engine) -> None:
    with engine.connect() as conn:
        context = MigrationContext.configure(
            conn, opts={"compare_type": True, "render_as_batch": True}
        )
        diff = compare_metadata(context, Base.metadata)
    assert diff == []


def test_migrated_database_is_at_head(engine: Engine) -> None:
    assert at_head(engine)
    assert "recommendations" in inspect(engine).get_table_names()
