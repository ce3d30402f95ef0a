"""The month bundle format (``.ehb``): one policy-month of the log in a single file.

JSON lines, each one compact, key-sorted UTF-8 JSON (:func:`encode_line`) ending in ``\\n``,
with a ``type`` member. In this order:

- ``header``: the format name and version, the policy, the month and the audit's time zone;
- ``key`` (one or more): the public Ed25519 keys that signed the heads below;
- the log's leaves from leaf 0 to the tree size of the seal holding the month's report
  snapshot, in tree order, each as either a ``record`` (the record's canonical bytes, its
  leaf index, its kind and its leaf hash) or a ``subtree`` (the root of an aligned perfect
  subtree of leaves that are not part of the month), with ``head`` lines (signed tree heads)
  where the leaves so far are exactly a seal's tree: the last leaf line is followed by the
  head of the seal holding the snapshot;
- ``latest`` (optional): the newest signed head at export time and the RFC 9162 consistency
  proof from the last ``head`` to it;
- ``view`` (two): the report snapshot's published view, then its internal view;
- ``manifest``: the count of lines of each type, of records of each kind, and the SHA-256 of
  every byte before it.

Standard library only: the standalone verifier imports this module. See ``docs/bundle.md``.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

FORMAT = "evenhand.month-bundle/1"
SUFFIX = ".ehb"

HEADER = "header"
KEY = "key"
RECORD = "record"
SUBTREE = "subtree"
HEAD = "head"
LATEST = "latest"
VIEW = "view"
MANIFEST = "manifest"
LINE_TYPES = (HEADER, KEY, RECORD, SUBTREE, HEAD, LATEST, VIEW, MANIFEST)

VIEWS = ("published", "internal")
"""The snapshot's views, in the order the bundle holds them."""

MAX_LINE = 64 * 1024 * 1024
"""The longest line a reader accepts (a report snapshot with many groups is the longest)."""

CHECKPOINT_RECORDS = 1_000
"""The exporter writes a signed head at the first seal boundary after this many records since
the last head, so a changed record is placed between two heads a few records apart."""

_ENCODER = json.JSONEncoder(
    sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
)


def encode_line(value: dict[str, Any]) -> bytes:
    """One line of a bundle: canonical JSON and a newline."""
    return _ENCODER.encode(value).encode("utf-8") + b"\n"


def leaf_hex(data: bytes) -> str:
    """The RFC 9162 leaf hash of a record's canonical bytes, in hex."""
    return hashlib.sha256(b"\x00" + data).hexdigest()
