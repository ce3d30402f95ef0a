"""The JSON Schema of a policy document, generated from the pydantic model."""

from __future__ import annotations

import json
from typing import Any

from service.policy.document import PolicyDocument


def policy_schema() -> dict[str, Any]:
    schema = PolicyDocument.model_json_schema(by_alias=True, mode="validation")
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}


def schema_text() -> str:
    """The exact text committed as ``service/policies/schema.json``."""
    return json.dumps(policy_schema(), indent=2, sort_keys=True, ensure_ascii=False) + "\n"
