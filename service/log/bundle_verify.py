"""``evenhand-verify-bundle FILE``: check a month bundle without the service.

Needs neither the service's settings nor its database: the standard library and
``cryptography`` only (``tests/test_month_bundle.py`` runs it in a bare interpreter and checks
what it imports). It reads the file one line at a time and keeps O(log n) hashes, plus the
month's decisions in a temporary SQLite file, so its memory does not grow with the month.

It checks, stopping at the first problem, which it names by line number and, for a record,
by kind, leaf index and ``recommendation_id``:

1. every line is canonical JSON of a known type, in the order of the format;
2. every public key hashes to its id; every head's Ed25519 signature verifies;
3. every record's canonical bytes give its leaf hash, and the records and subtrees, in
   order from leaf 0, give the root of every signed head where the bundle places one;
4. the newest head, when given, extends the snapshot's head (RFC 9162 consistency proof);
5. the records are the month's: decisions of the policy issued in the month; outcomes and
   final decisions of those decisions; one snapshot record of the policy and month;
6. each view of the snapshot gives its digest, and the digest is the one the sealed snapshot
   record holds;
7. every figure of the views that is pure counting equals the recount from the records;
8. the manifest's counts and its SHA-256 over every byte before it.

Exit status: 0 the bundle verifies; 1 it does not (tampered or damaged: the problem is
printed); 2 the file cannot be read as a bundle at all.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from typing import IO

from service.log.bundle_checker import BundleChecker
from service.log.bundle_result import Problem, Result, Unreadable
from service.log.heads import key_id, public_key_from_bytes

OK, TAMPERED, UNREADABLE = 0, 1, 2


def verify_bundle(handle: IO[bytes], trusted: dict[str, bytes] | None = None) -> Result:
    """Verify the bundle read from ``handle``; never raises for any content."""
    verifier = BundleChecker(handle, trusted)
    try:
        return verifier.run()
    except Problem as exc:
        result = verifier.result
        result.ok, result.problem, result.line = False, exc.message, exc.line
        if isinstance(exc, Unreadable):
            result.problem = f"unreadable: {exc.message}"
        return result
    except Exception as exc:
        result = verifier.result
        result.ok, result.line = False, verifier.number
        result.problem = f"the bundle cannot be checked here ({type(exc).__name__}: {exc})"
        return result


def _trusted(values: Sequence[str]) -> dict[str, bytes] | None:
    if not values:
        return None
    keys: dict[str, bytes] = {}
    for text in values:
        raw = bytes.fromhex(text.strip())
        keys[key_id(public_key_from_bytes(raw))] = raw
    return keys


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="evenhand-verify-bundle",
        description="Check an Evenhand month bundle: signatures, proofs, and the report's "
        "counts and digests. Exit 0 verified, 1 tampered or damaged, 2 unreadable.",
    )
    parser.add_argument("bundle", metavar="FILE", help="the .ehb file")
    parser.add_argument(
        "--trust-key",
        action="append",
        default=[],
        metavar="HEX",
        help="a public key (32 bytes in hex) that must have signed every head; repeat for "
        "several (keys rotated over the month). Without it the "
        "bundle's own keys are used and their ids are printed: compare them with the keys the "
        "service publishes (GET /v1/log/keys)",
    )
    parser.add_argument("--json", action="store_true", help="print the result as JSON")
    args = parser.parse_args(argv)
    try:
        trusted = _trusted(args.trust_key)
    except ValueError as exc:
        print(f"evenhand-verify-bundle: error: --trust-key: {exc}", file=sys.stderr)
        return UNREADABLE
    try:
        handle = open(args.bundle, "rb")  # noqa: SIM115 - closed below
    except OSError as exc:
        print(f"evenhand-verify-bundle: error: cannot open {args.bundle}: {exc}", file=sys.stderr)
        return UNREADABLE
    with handle:
        result = verify_bundle(handle, trusted)
    result.untrusted_keys = trusted is None
    status = OK if result.ok else (UNREADABLE if _unreadable(result) else TAMPERED)
    if args.json:
        print(json.dumps({**result.as_json(), "exit": status}, sort_keys=True))
    elif result.ok:
        records = ", ".join(f"{n:,} {k}" for k, n in sorted(result.records.items()))
        print(
            f"OK: {result.policy} {result.month}: {records}; {result.heads_checked} signed "
            f"head(s) over {result.tree_size:,} leaves; report snapshot "
            f"{result.snapshot_digest} recounted"
        )
        if trusted is None:
            print(
                "keys used (from the bundle itself; compare them with the service's published "
                "keys): " + ", ".join(result.key_ids)
            )
    else:
        print(f"PROBLEM at line {result.line}: {result.problem}")
    return status


def _unreadable(result: Result) -> bool:
    return result.problem is not None and result.problem.startswith("unreadable:")


if __name__ == "__main__":
    sys.exit(main())
