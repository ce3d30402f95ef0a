"""Reading a batch body so that every refused item is reported, not only the first kind.

A batch is validated as a whole in one pass (the common case: every item is fine). When some
items break the schema, the others are validated too, so the caller can check them against the
store as well and refuse the batch once, listing every bad item with its index, field and
reason (``items.3.score``). Problems with the envelope itself (not JSON, no ``items``, an empty
list, an unknown key) are refused as for any other body.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Generic, TypeVar

import pydantic_core
from pydantic import BaseModel, TypeAdapter, ValidationError

from service.api.errors import validation_details

M = TypeVar("M", bound=BaseModel)


@dataclass(frozen=True, slots=True)
class ParsedBatch(Generic[M]):
    items: list[M]
    """The items that passed the schema, in request order."""
    positions: list[int]
    """Each of those items' index in the request."""
    problems: list[dict[str, Any]]
    """Every schema problem of the other items (error details, fields ``items.<i>....``)."""
    total: int
    """How many items the request holds."""


def _item_error(error: Any) -> bool:
    loc = error.get("loc", ())
    return len(loc) >= 2 and loc[0] == "items" and isinstance(loc[1], int)


def parse_batch(raw: bytes, envelope: type[BaseModel], item: type[M]) -> ParsedBatch[M]:
    """``raw`` read as ``envelope`` (``{"items": [item, ...]}``); raises ``ValidationError`` only
    when the envelope itself is refused."""
    try:
        body = envelope.model_validate_json(raw)
    except ValidationError as exc:
        errors = exc.errors()
        if not all(_item_error(e) for e in errors):
            raise
        data = pydantic_core.from_json(raw)["items"]
        refused = {e["loc"][1] for e in errors}
        positions = [i for i in range(len(data)) if i not in refused]
        # The valid items again through JSON, so they are read exactly as in the first pass.
        good = pydantic_core.to_json([data[i] for i in positions])
        items = TypeAdapter(list[item]).validate_json(good)  # type: ignore[valid-type]
        return ParsedBatch(items, positions, validation_details(errors), len(data))
    items = list(body.items)  # type: ignore[attr-defined]
    return ParsedBatch(items, list(range(len(items))), [], len(items))


def documented_body(envelope: type[BaseModel]) -> dict[str, Any]:
    """``openapi_extra`` for a route that reads its body itself: the envelope's schema, with
    references into the document's components (its item model is there already, as the body
    of the matching single-item route)."""
    schema = envelope.model_json_schema(ref_template="#/components/schemas/{model}")
    schema.pop("$defs", None)
    return {
        "requestBody": {
            "required": True,
            "content": {"application/json": {"schema": schema}},
        }
    }
