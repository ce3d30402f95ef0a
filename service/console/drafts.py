"""A new draft from the console: the submitted form (pasted text or an uploaded file), the
JSON read from it, and the confirmation page's summary of the groups and rules in sentences.

The document is checked by the API's own path (``lifecycle.check_submission``); this module
only reads the form and says what the document holds. Pure functions, no I/O.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from email.message import Message
from email.parser import BytesParser
from email.policy import HTTP
from typing import Any
from urllib.parse import parse_qs

from service.console.rule_view import describe_rule
from service.errors import Unprocessable
from service.policy.document import DEFAULT_RULE_KEY, PolicyDocument, resolve_rule_key

FIELDS = ("csrf", "name", "document", "step", "content_hash")


def form_fields(content_type: str, body: bytes) -> dict[str, str]:
    """The fields of a URL-encoded or ``multipart/form-data`` form (a file field's content as
    UTF-8 text). Multipart bodies are read by the standard library's MIME parser."""
    kind = content_type.split(";")[0].strip().lower()
    if not body:
        return {}
    try:
        if kind == "application/x-www-form-urlencoded":
            parsed = parse_qs(body.decode("utf-8"), keep_blank_values=True)
            return {k: v[0] for k, v in parsed.items() if v}
        if kind == "multipart/form-data":
            head = f"Content-Type: {content_type}\r\nMIME-Version: 1.0\r\n\r\n".encode("latin-1")
            message = BytesParser(policy=HTTP).parsebytes(head + body)
            if not message.is_multipart():
                raise Unprocessable("the multipart form could not be read")
            return _parts(message)
    except UnicodeError:
        raise Unprocessable("the form is not UTF-8 text") from None
    raise Unprocessable("the console accepts URL-encoded or multipart forms only")


def _parts(message: Message) -> dict[str, str]:
    fields: dict[str, str] = {}
    for part in message.walk():
        if part.is_multipart():
            continue
        name = part.get_param("name", header="content-disposition")
        if not isinstance(name, str) or name not in (*FIELDS, "upload"):
            continue
        payload = part.get_payload(decode=True)
        text = payload.decode("utf-8") if isinstance(payload, bytes) else ""
        fields[name] = text
    return fields


def document_text(fields: dict[str, str]) -> str:
    """The document: an uploaded file if one was chosen, else the pasted text."""
    uploaded = fields.get("upload", "")
    return uploaded if uploaded.strip() else fields.get("document", "")


def read_json(text: str) -> Any:
    """The JSON value of ``text``, or 422 ``malformed_json`` saying where it went wrong."""
    if not text.strip():
        raise Unprocessable(
            "paste a policy document or choose a file", code="malformed_json", field="document"
        )
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise Unprocessable(
            f"the document is not valid JSON: line {exc.lineno}, column {exc.colno}: {exc.msg}",
            code="malformed_json",
            field="document",
        ) from None


@dataclass(frozen=True, slots=True)
class GroupLine:
    group: str
    rule_key: str | None
    sentence: str


@dataclass(frozen=True, slots=True)
class DraftSummary:
    """What the confirmation page says about a document before it is stored."""

    settings: list[str]
    groups: list[GroupLine]
    rules: list[GroupLine]


def summarise(document: PolicyDocument) -> DraftSummary:
    settings = [
        f"Score: {document.score_meaning}, from {document.score_range[0]:g} "
        f"to {document.score_range[1]:g}.",
        f"The action is {document.action_label!r} (otherwise {document.no_action_label!r}); "
        f"the favourable outcome is {document.favourable!r}.",
        f"Costs: a false positive costs {document.costs.false_positive:g}, "
        f"a false negative {document.costs.false_negative:g}.",
        f"Groups are read from the attributes {', '.join(document.groups.attributes)}; "
        f"unknown groups: {document.groups.fallback.unknown_groups}.",
    ]
    if document.targets is None:
        settings.append("No targets: the audit checks the rules as written.")
    else:
        tolerance = document.targets.tolerance
        settings.append(
            f"Targets: criterion {document.targets.criterion.value}"
            + ("" if tolerance is None else f", tolerance {tolerance:g}")
            + "."
        )
    groups = []
    for group in document.groups.known:
        key = resolve_rule_key(document, group)
        if key is None:
            sentence = "No rule applies: its cases are refused."
        elif key == DEFAULT_RULE_KEY and document.groups.fallback.default is not None:
            sentence = "Uses the fallback default rule. " + describe_rule(
                document.groups.fallback.default
            )
        else:
            own = "" if key == group else f"Uses the rule of {key!r}. "
            sentence = own + describe_rule(document.rules[key])
        groups.append(GroupLine(group, key, sentence))
    rules = [GroupLine(key, key, describe_rule(rule)) for key, rule in document.rules.items()]
    default = document.groups.fallback.default
    if default is not None:
        rules.append(GroupLine("fallback (default rule)", DEFAULT_RULE_KEY, describe_rule(default)))
    return DraftSummary(settings, groups, rules)
