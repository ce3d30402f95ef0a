"""Imports every module that defines tables, so ``Base.metadata`` is complete.

Alembic and the schema-drift test import this; add new model modules here.
"""

from service.store import (  # noqa: F401
    audit_models,
    console_passwords,
    console_sessions,
    log_verifications,
    models,
    sign_in_limits,
)
