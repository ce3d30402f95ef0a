"""``evenhand log seal|verify``: the decision log, directly on the configured database."""

from __future__ import annotations

import argparse
import json
import re
import sys
from dataclasses import asdict

from sqlalchemy.orm import Session, sessionmaker

from service.audit.seal import seal_all_pending, verify_log
from service.cli.common import CliError
from service.settings import Settings
from service.store.db import create_db_engine, create_session_factory


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "log", help="seal and verify the tamper-evident decision log", description=__doc__
    )
    sub = parser.add_subparsers(dest="log_command", required=True, metavar="ACTION")

    seal = sub.add_parser("seal", help="seal every record not sealed yet (Merkle root, chained)")
    seal.set_defaults(handler=_seal)

    verify = sub.add_parser(
        "verify",
        help="recompute every record hash, seal root and the chain; exit 1 on a mismatch",
    )
    verify.add_argument(
        "--expect",
        metavar="SEAL_HASH",
        help="a seal hash kept outside the database: fail if the chain no longer holds it",
    )
    verify.add_argument("--json", action="store_true", help="print the result as JSON")
    verify.set_defaults(handler=_verify)


def _session_factory() -> sessionmaker[Session]:
    return create_session_factory(create_db_engine(Settings()))


def _seal(args: argparse.Namespace) -> int:
    factory = _session_factory()
    with factory() as session:
        seals = seal_all_pending(session)
    if not seals:
        print("nothing to seal: every record is already sealed")
        return 0
    for seal in seals:
        print(
            f"seal {seal.id}: {seal.record_count} records "
            f"(ids {seal.first_record_id}..{seal.last_record_id}), root {seal.root_hash}"
        )
    print(f"head seal hash: {seals[-1].seal_hash}")
    return 0


def _verify(args: argparse.Namespace) -> int:
    expected = args.expect
    if expected is not None and not re.fullmatch(r"[0-9a-f]{64}", expected):
        raise CliError("--expect takes a seal hash: 64 lowercase hex digits")

    def progress(done: int) -> None:
        print(f"verified {done} records...", file=sys.stderr)

    factory = _session_factory()
    with factory() as session:
        result = verify_log(session, expected, progress=progress)
    if args.json:
        data = asdict(result)
        data["ok"] = result.ok
        print(json.dumps(data, indent=2))
    else:
        print(
            f"checked {result.seals_checked} seals and {result.records_checked} records "
            f"({result.unsealed_records} not sealed yet)"
        )
        if result.head_seal_hash is not None:
            print(f"head seal {result.head_seal_id}: {result.head_seal_hash}")
        if result.problem is None:
            print("ok: every record hash, seal root and chain link matches")
        else:
            p = result.problem
            print(f"MISMATCH at {p.kind} {p.id}: {p.reason}")
    return 0 if result.ok else 1
