"""Checking a month bundle line by line (standard library and ``cryptography`` only): its
format, keys, records, subtrees, signed heads, the snapshot's views, the recount and the
manifest, in the order of ``service.log.bundle_format`` (see :mod:`service.log.bundle_verify`).
"""

from __future__ import annotations

import hashlib
import json
from typing import IO, Any

from service.log import bundle_format as fmt
from service.log.bundle_compare import compare
from service.log.bundle_recount import MonthCounter, Recount, RecountProblem
from service.log.bundle_result import Problem, Result, Unreadable
from service.log.heads import TreeHead, key_id, public_key_from_bytes, verify_head
from service.log.merkle import TreeBuilder, verify_consistency


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise ValueError(f"member {k!r} appears twice")
        out[k] = v
    return out


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def parse_json(data: bytes | str) -> Any:
    return json.loads(data, object_pairs_hook=_no_duplicates, parse_constant=_refuse_constant)


def _hex(value: Any, size: int, what: str) -> bytes:
    if not isinstance(value, str) or len(value) != 2 * size:
        raise ValueError(f"{what} is not {size} bytes in hex")
    return bytes.fromhex(value)


def _int(value: Any, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ValueError(f"{what} is not a non-negative integer")
    return value


class BundleChecker:
    """Reads a bundle line by line and checks each as it comes; :meth:`run` raises
    :class:`~service.log.bundle_result.Problem` at the first that fails."""

    def __init__(self, handle: IO[bytes], trusted: dict[str, bytes] | None) -> None:
        self.handle = handle
        self.trusted = trusted
        self.result = Result()
        self.number = 0
        self.digest = hashlib.sha256()
        self.keys: dict[str, bytes] = {}
        self.tree = TreeBuilder()
        self.last_head: TreeHead | None = None
        self.last_head_line = 0
        self.counter: MonthCounter | None = None
        self.snapshot: dict[str, Any] | None = None
        self.views: dict[str, dict[str, Any]] = {}
        self.versions: dict[int, str] = {}
        self.lines: dict[str, int] = {}
        self.stage = fmt.HEADER
        self.header: dict[str, Any] = {}

    # -- reading ---------------------------------------------------------------------------

    def _next(self) -> dict[str, Any] | None:
        raw = self.handle.readline(fmt.MAX_LINE + 1)
        if not raw:
            return None
        self.number += 1
        if len(raw) > fmt.MAX_LINE:
            raise self._problem("the line is longer than a bundle line can be")
        if not raw.endswith(b"\n"):
            raise self._problem("the file ends in the middle of a line: it was cut short")
        try:
            value = parse_json(raw.decode("utf-8"))
        except (UnicodeDecodeError, ValueError, RecursionError) as exc:
            raise self._problem(f"not a line of JSON ({exc})") from None
        if not isinstance(value, dict) or value.get("type") not in fmt.LINE_TYPES:
            raise self._problem("not a bundle line (no known type)")
        if fmt.encode_line(value) != raw:
            raise self._problem("the line is not in canonical form: it was edited")
        if value["type"] != fmt.MANIFEST:
            self.digest.update(raw)
        self.lines[value["type"]] = self.lines.get(value["type"], 0) + 1
        return value

    def _problem(self, message: str) -> Problem:
        if self.number <= 1 and self.stage == fmt.HEADER:
            return Unreadable(self.number, message)
        return Problem(self.number, message)

    # -- the lines -------------------------------------------------------------------------

    def run(self) -> Result:
        try:
            self._header()
            line = self._next()
            while line is not None and line["type"] == fmt.KEY:
                self._key(line)
                line = self._next()
            if not self.keys:
                raise self._problem("the bundle has no public key")
            self.stage = "leaves"
            while line is not None and line["type"] in (fmt.RECORD, fmt.SUBTREE, fmt.HEAD):
                if line["type"] == fmt.RECORD:
                    self._record(line)
                elif line["type"] == fmt.SUBTREE:
                    self._subtree(line)
                else:
                    self._head(line)
                line = self._next()
            self._end_of_leaves()
            if line is not None and line["type"] == fmt.LATEST:
                self._latest(line)
                line = self._next()
            for name in fmt.VIEWS:
                if line is None or line["type"] != fmt.VIEW:
                    raise self._problem(f"expected the {name} view of the snapshot here")
                self._view(line, name)
                line = self._next()
            self._recount()
            if line is None or line["type"] != fmt.MANIFEST:
                raise self._problem("expected the manifest here (lines were added or removed)")
            self._manifest(line)
            if self.handle.readline(1):
                self.number += 1
                raise self._problem("there is more after the manifest")
        finally:
            if self.counter is not None:
                self.result.decisions = self.counter.decisions
                self.counter.close()
        self.result.ok = True
        return self.result

    def _header(self) -> None:
        line = self._next()
        if line is None:
            raise Unreadable(0, "the file is empty")
        if line.get("type") != fmt.HEADER or line.get("format") != fmt.FORMAT:
            raise Unreadable(1, f"not a bundle of format {fmt.FORMAT}")
        try:
            policy, month, zone = str(line["policy"]), str(line["month"]), str(line["time_zone"])
            self.counter = MonthCounter(policy, month, zone)
        except (KeyError, ValueError, TypeError) as exc:
            raise Unreadable(1, f"the header cannot be read ({exc})") from None
        except Exception as exc:  # an unknown time zone raises ZoneInfoNotFoundError
            raise Unreadable(1, f"the header names no usable time zone ({exc})") from None
        self.header = line
        self.result.policy, self.result.month = policy, month
        self.stage = fmt.KEY

    def _key(self, line: dict[str, Any]) -> None:
        try:
            raw = _hex(line.get("public_key"), 32, "the public key")
            public = public_key_from_bytes(raw)
        except ValueError as exc:
            raise self._problem(str(exc)) from None
        if key_id(public) != line.get("key_id"):
            raise self._problem(f"public key {line.get('key_id')!r} does not hash to its id")
        self.keys[str(line["key_id"])] = raw
        self.result.key_ids.append(str(line["key_id"]))

    def _record(self, line: dict[str, Any]) -> None:
        kind, data = line.get("kind"), line.get("data")
        try:
            index = _int(line.get("index"), "the leaf index")
            leaf = _hex(line.get("leaf"), 32, "the leaf hash")
        except ValueError as exc:
            raise self._problem(str(exc)) from None
        if not isinstance(kind, str) or not isinstance(data, str):
            raise self._problem("a record line names no kind or carries no record")
        name = f"{kind} record at leaf {index}"
        if index != self.tree.count:
            raise self._problem(
                f"{name}: the bundle's leaves reach leaf {self.tree.count} here: a line was "
                "added, removed or moved"
            )
        raw = data.encode("utf-8")
        try:
            record = parse_json(data)
        except (ValueError, RecursionError) as exc:
            raise self._problem(f"{name} is not JSON ({exc})") from None
        if isinstance(record, dict) and isinstance(record.get("recommendation_id"), str):
            name += f" ({record['recommendation_id']})"
        if hashlib.sha256(b"\x00" + raw).digest() != leaf:
            raise self._problem(f"{name} does not give its leaf hash: the record was changed")
        if not isinstance(record, dict) or fmt.encode_line(record) != raw + b"\n":
            raise self._problem(f"{name} is not a record in canonical form")
        if record.get("kind") != kind:
            raise self._problem(f"{name} holds a record of kind {record.get('kind')!r}")
        self.result.records[kind] = self.result.records.get(kind, 0) + 1
        assert self.counter is not None
        try:
            self._meaning(kind, index, record)
        except RecountProblem as exc:
            raise self._problem(f"{name}: {exc}") from None
        except (KeyError, ValueError, TypeError) as exc:
            raise self._problem(f"{name} cannot be read ({exc!r})") from None
        self.tree.add_leaf_hash(leaf)

    def _meaning(self, kind: str, index: int, record: dict[str, Any]) -> None:
        assert self.counter is not None
        if kind == "decision":
            self.counter.add_decision(index, record)
        elif kind == "outcome":
            self.counter.add_outcome(record)
        elif kind == "final":
            self.counter.add_final(record)
        elif kind == "snapshot":
            for member in ("policy", "month", "time_zone"):
                if record[member] != self.header[member]:
                    raise RecountProblem(f"the snapshot is of another {member}")
            if self.snapshot is not None:
                raise RecountProblem("a second snapshot record")
            self.snapshot = record
            self.result.snapshot_digest = str(record["digest"])
        elif kind in ("policy_version", "policy_event"):
            if record["policy"] != self.header["policy"]:
                raise RecountProblem("a record of another policy")
            if kind == "policy_version":
                self._version(record)
        elif kind != "key_event":
            raise RecountProblem("a kind of record a bundle does not hold")

    def _version(self, record: dict[str, Any]) -> None:
        """A policy version: its content hash must be the SHA-256 of its document's canonical
        JSON (what the service computed when it was submitted)."""
        document = record["document"]
        if not isinstance(document, dict):
            raise RecountProblem("its document is not a JSON object")
        computed = hashlib.sha256(fmt.encode_line(document)[:-1]).hexdigest()
        if record["content_hash"] != computed:
            raise RecountProblem("its content hash is not the hash of its document")
        version = record["version"]
        if isinstance(version, bool) or not isinstance(version, int) or version in self.versions:
            raise RecountProblem(f"version {version!r} is not a new version number")
        self.versions[version] = computed

    def _subtree(self, line: dict[str, Any]) -> None:
        try:
            start = _int(line.get("start"), "the subtree's start")
            size = _int(line.get("size"), "the subtree's size")
            node = _hex(line.get("hash"), 32, "the subtree's hash")
            if start != self.tree.count:
                raise ValueError(
                    f"a subtree from leaf {start} where the leaves reach {self.tree.count}: a "
                    "line was added, removed or moved"
                )
            self.tree.add_subtree(size, node)
        except ValueError as exc:
            raise self._problem(str(exc)) from None

    def _signed(self, line: dict[str, Any]) -> TreeHead:
        try:
            head = TreeHead.from_payload(line["head"])
            signature = _hex(line.get("signature"), 64, "the signature")
        except (KeyError, ValueError, TypeError, AttributeError) as exc:
            raise self._problem(f"a signed head that cannot be read ({exc!r})") from None
        problem = verify_head(head, signature, self.keys)
        if problem is not None:
            raise self._problem(problem)
        if self.trusted is not None and self.trusted.get(head.key_id) != self.keys[head.key_id]:
            raise self._problem(
                f"the head of seal {head.seal_id} is signed by key {head.key_id}, which is not "
                "one of the keys you trust"
            )
        self.result.heads_checked += 1
        return head

    def _head(self, line: dict[str, Any]) -> None:
        head = self._signed(line)
        if self.last_head is not None and head.seal_id <= self.last_head.seal_id:
            raise self._problem(f"the head of seal {head.seal_id} is out of order")
        if head.tree_size != self.tree.count:
            raise self._problem(
                f"the head of seal {head.seal_id} is over {head.tree_size} leaves where the "
                f"bundle's leaves reach {self.tree.count}: lines were added or removed"
            )
        if head.root != self.tree.root():
            raise self._problem(
                f"the leaves after line {self.last_head_line} do not give the signed root of "
                f"seal {head.seal_id}: a record or subtree between lines {self.last_head_line} "
                f"and {self.number} was changed, added or removed"
            )
        self.last_head, self.last_head_line = head, self.number

    def _end_of_leaves(self) -> None:
        if self.last_head is None or self.last_head.tree_size != self.tree.count:
            raise self._problem("the leaves do not end with a signed head: the bundle was cut")
        if self.last_head.seal_id != self.header.get(
            "seal_id"
        ) or self.last_head.tree_size != self.header.get("tree_size"):
            raise self._problem("the last head is not the seal the header names")
        if self.snapshot is None:
            raise self._problem("the bundle holds no snapshot record of its policy and month")
        assert self.counter is not None
        missing = sorted(self.counter.versions_used - set(self.versions))
        if missing:
            raise self._problem(
                f"decisions name version(s) {missing} of the policy, which the bundle holds no "
                "policy_version record of"
            )
        self.result.tree_size = self.tree.count

    def _latest(self, line: dict[str, Any]) -> None:
        assert self.last_head is not None
        head = self._signed(line)
        try:
            path = [_hex(h, 32, "a proof hash") for h in line["path"]]
        except (KeyError, TypeError, ValueError) as exc:
            raise self._problem(f"the consistency proof cannot be read ({exc!r})") from None
        first = self.last_head
        if not verify_consistency(first.tree_size, head.tree_size, path, first.root, head.root):
            raise self._problem(
                f"the head of seal {head.seal_id} does not extend the head of seal "
                f"{first.seal_id}: the consistency proof fails"
            )

    def _view(self, line: dict[str, Any], name: str) -> None:
        content = line.get("content")
        if line.get("view") != name or not isinstance(content, dict):
            raise self._problem(f"expected the {name} view of the snapshot here")
        stated = content.get("digest")
        body = {k: v for k, v in content.items() if k != "digest"}
        computed = hashlib.sha256(fmt.encode_line(body)[:-1]).hexdigest()
        if stated != computed:
            raise self._problem(f"the {name} view was changed: it does not give its digest")
        assert self.snapshot is not None
        sealed = self.snapshot["digest" if name == "published" else "internal_digest"]
        if stated != sealed:
            raise self._problem(
                f"the {name} view's digest is not the one the sealed snapshot record holds"
            )
        if content.get("view") != name:
            raise self._problem(f"the {name} view says it is the {content.get('view')!r} view")
        self.views[name] = content

    def _recount(self) -> None:
        assert self.counter is not None
        try:
            recount = Recount(self.counter.tallies())
        except (ValueError, TypeError) as exc:
            raise self._problem(f"the records cannot be tallied ({exc})") from None
        for name in fmt.VIEWS:
            try:
                problem = compare(self.views[name], recount, self.versions)
            except (KeyError, TypeError, ValueError, AttributeError) as exc:
                problem = f"the {name} view cannot be read ({exc!r})"
            if problem is not None:
                raise Problem(
                    self.number - (1 if name == "published" else 0),
                    f"recount: {problem}",
                )

    def _manifest(self, line: dict[str, Any]) -> None:
        if line.get("sha256") != self.digest.hexdigest():
            raise self._problem("the manifest's SHA-256 does not match the lines before it")
        if line.get("lines") != self.lines:
            raise self._problem("the manifest's line counts do not match the lines")
        if line.get("records") != self.result.records:
            raise self._problem("the manifest's record counts do not match the records")
