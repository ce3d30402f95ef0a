"""``evenhand log ...``: seal, verify, prove and purge the tamper-evident log (configured
database)."""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import asdict
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from service.audit.month import Month
from service.cli.common import CliError
from service.cli.progress import StepBar
from service.log.heads import new_signing_key
from service.log.key_errors import SigningKeyError
from service.settings import Settings, SigningKeyUnavailable
from service.store import log_proofs, log_verifications, retention
from service.store.audit_models import Seal
from service.store.db import begin_read_only, create_db_engine, create_session_factory
from service.store.log_sources import KIND_ORDER
from service.store.log_upkeep import keep_log
from service.store.log_verify import VerifyResult
from service.store.models import utcnow
from service.store.sealing import signed_head
from service.store.signing import signer_from_settings, trusted_public_keys


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "log", help="seal, verify and prove the tamper-evident log", description=__doc__
    )
    sub = parser.add_subparsers(dest="log_command", required=True, metavar="ACTION")

    seal = sub.add_parser(
        "seal",
        help="seal every record not sealed yet and tally what is sealed (signed tree heads)",
    )
    seal.add_argument(
        "--tally-now",
        action="store_true",
        help="tally every sealed record now instead of when a batch is due",
    )
    seal.set_defaults(handler=_seal)

    verify = sub.add_parser(
        "verify",
        help="recompute every record, seal, signature, tree node and tally; exit 1 on a problem",
    )
    verify.add_argument(
        "--heads",
        metavar="FILE",
        help="signed heads kept outside the database (JSON lines, e.g. EVENHAND_HEAD_MIRROR): "
        "fail if the database no longer matches them",
    )
    verify.add_argument(
        "--trust-database-keys",
        action="store_true",
        help="also accept heads signed by public keys the database lists (weaker: whoever can "
        "write the database can add a key)",
    )
    verify.add_argument("--json", action="store_true", help="print the result as JSON")
    verify.set_defaults(handler=_verify)

    keygen = sub.add_parser("keygen", help="write a new Ed25519 signing key to a file")
    keygen.add_argument("--out", required=True, metavar="FILE", help="the key file to create")
    keygen.set_defaults(handler=_keygen)

    heads = sub.add_parser("heads", help="print signed tree heads as JSON lines")
    heads.add_argument("--since", type=int, default=0, metavar="SEAL", help="after this seal")
    heads.set_defaults(handler=_heads)

    proof = sub.add_parser("proof", help="print an RFC 9162 proof as JSON (as the API gives it)")
    kinds = proof.add_subparsers(dest="proof_kind", required=True, metavar="PROOF")
    inclusion = kinds.add_parser("inclusion", help="that one record is in a signed head")
    inclusion.add_argument(
        "--kind", default="decision", choices=KIND_ORDER, help="the record's kind"
    )
    named = inclusion.add_mutually_exclusive_group(required=True)
    named.add_argument("--id", type=_positive, metavar="N", help="the record's row id")
    named.add_argument("--recommendation-id", metavar="UUID", help="a decision by its id")
    inclusion.add_argument(
        "--seal", type=_positive, metavar="N", help="the head's seal (default: the latest)"
    )
    inclusion.set_defaults(handler=_inclusion)
    between = kinds.add_parser("consistency", help="that one signed head extends another")
    between.add_argument("first", type=_positive, metavar="FIRST", help="the earlier seal")
    between.add_argument("second", type=_positive, metavar="SECOND", help="the later seal")
    between.set_defaults(handler=_consistency)

    bundle = sub.add_parser(
        "bundle",
        help="write one policy-month as a self-describing file (.ehb) that "
        "evenhand-verify-bundle checks without the service",
        description="Write the month's decisions, outcomes and final decisions, the policy's "
        "versions and events, the key events, the report snapshot (both views), the signed "
        "heads, the public keys and what the verifier needs to recompute the heads, with a "
        "manifest. The month must be audited and its snapshot sealed. Format: docs/bundle.md.",
    )
    bundle.add_argument("--policy", required=True, metavar="NAME", help="the policy")
    bundle.add_argument(
        "--month", required=True, type=Month.parse, metavar="YYYY-MM", help="the audited month"
    )
    bundle.add_argument("--out", required=True, metavar="FILE", help="the file to create")
    bundle.set_defaults(handler=_bundle)

    purge = sub.add_parser(
        "purge",
        help="delete the decisions, outcomes and final decisions of the oldest sealed months "
        "(retention); everything else, and the months' reports, are kept",
        description="Delete the personal-data records (decisions, outcome records, final "
        "decisions) of every seal created before the end of month --through, which must lie at "
        "least EVENHAND_RETENTION_MONTHS whole months before the current month. Policy "
        "versions and events, key events, snapshots, tally batches, seals and tree nodes are "
        "kept, with each deleted record's leaf hash, so the log still verifies. The purge is "
        "itself a record of the log, sealed at once when a signing key is configured.",
    )
    purge.add_argument(
        "--through",
        required=True,
        type=Month.parse,
        metavar="YYYY-MM",
        help="the last month to purge",
    )
    purge.add_argument(
        "--dry-run", action="store_true", help="say what would be purged, delete nothing"
    )
    purge.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    purge.set_defaults(handler=_purge)


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if not 1 <= value <= 2**62:
        raise argparse.ArgumentTypeError(f"{value} is not between 1 and 2^62")
    return value


def _factory(settings: Settings) -> sessionmaker[Session]:
    return create_session_factory(create_db_engine(settings))


def _progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def _seal(args: argparse.Namespace) -> int:
    settings = Settings()
    try:
        signer = signer_from_settings(settings)
    except SigningKeyError as exc:
        raise CliError(str(exc)) from None
    with StepBar("sealing") as bar:
        done = keep_log(
            _factory(settings),
            signer,
            settings.timezone,
            tally_now=args.tally_now,
            mirror=settings.head_mirror,
            progress=bar,
        )
    if not done.seals:
        print("nothing to seal: every record is already sealed")
    for seal in done.seals:
        kinds = ", ".join(f"{k} {r[2]}" for k, r in seal.ranges.items() if r[2])
        print(f"seal {seal.id}: {seal.leaf_count} records ({kinds}); tree size {seal.tree_size}")
    if done.seals:
        last = done.seals[-1]
        print(f"head: seal {last.id}, size {last.tree_size}, root {last.root.hex()}")
    return 0


def _read_heads(path: str) -> list[dict[str, Any]]:
    try:
        lines = Path(path).read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise CliError(f"--heads {path}: {exc.strerror or exc}") from None
    heads = []
    for number, line in enumerate(lines, 1):
        if not line.strip():
            continue
        try:
            item = json.loads(line)
        except json.JSONDecodeError:
            raise CliError(f"--heads {path}, line {number}: not JSON") from None
        if not isinstance(item, dict):
            raise CliError(f"--heads {path}, line {number}: not a signed head")
        heads.append(item)
    return heads


def _verify(args: argparse.Namespace) -> int:
    settings = Settings()
    heads = _read_heads(args.heads) if args.heads else []
    try:
        trusted = trusted_public_keys(settings)
    except SigningKeyError as exc:
        raise CliError(str(exc)) from None
    if not trusted and not args.trust_database_keys:
        raise CliError(
            "no trusted public key: set EVENHAND_SIGNING_KEY_FILE (the service's key) or "
            "EVENHAND_TRUSTED_PUBLIC_KEYS, or pass --trust-database-keys"
        )
    factory = _factory(settings)
    # Kept in log_verifications, so the console shows this run as the last result.
    with factory() as session:
        run_id = log_verifications.start(session, "evenhand log verify", utcnow())
        session.commit()
    with StepBar("verifying") as bar:
        result = log_verifications.run_and_keep(
            factory,
            run_id,
            trusted,
            trust_database_keys=args.trust_database_keys,
            heads=heads,
            progress=bar,
        )
    if args.json:
        print(json.dumps(result_json(result), indent=2))
    else:
        _print_result(result)
    return 0 if result.ok else 1


def result_json(result: VerifyResult) -> dict[str, Any]:
    data = asdict(result)
    data["ok"] = result.ok
    data["unsealed_records"] = result.unsealed_records
    return data


def _print_result(result: VerifyResult) -> None:
    print(
        f"checked {result.seals_checked} seals, {result.records_checked:,} records and "
        f"{result.tally_batches_checked} tally batches ({result.unsealed_records:,} records not "
        "sealed yet)"
    )
    if result.head is not None:
        head = result.head["head"]
        print(f"head: seal {head['seal_id']}, size {head['tree_size']}, root {head['root']}")
    if result.problem is None:
        print("ok: every record, seal, signature, tree node and tally matches")
    else:
        p = result.problem
        where = f"{p.kind} #{p.id}" if p.id else p.kind
        print(f"PROBLEM at {where}: {p.reason}")


def _keygen(args: argparse.Namespace) -> int:
    path = Path(args.out)
    _key, seed_hex = new_signing_key()
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        raise CliError(f"{path} exists: a signing key is never overwritten") from None
    except OSError as exc:
        raise CliError(f"{path}: {exc.strerror or exc}") from None
    with os.fdopen(fd, "w", encoding="ascii") as handle:
        handle.write(seed_hex + "\n")
    print(f"wrote a new signing key to {path} (mode 600); set EVENHAND_SIGNING_KEY_FILE={path}")
    return 0


def _heads(args: argparse.Namespace) -> int:
    factory = _factory(Settings())
    with factory() as session:
        begin_read_only(session)
        for seal in session.scalars(select(Seal).where(Seal.id > args.since).order_by(Seal.id)):
            print(json.dumps(signed_head(seal), sort_keys=True))
        session.rollback()
    return 0


def _inclusion(args: argparse.Namespace) -> int:
    with _factory(Settings())() as session:
        begin_read_only(session)
        record_id = log_proofs.record_row_id(session, args.kind, args.id, args.recommendation_id)
        proof = log_proofs.inclusion(session, args.kind, record_id, args.seal)
        session.rollback()
    print(json.dumps(proof.as_json(), indent=2))
    return 0


def _consistency(args: argparse.Namespace) -> int:
    with _factory(Settings())() as session:
        begin_read_only(session)
        proof = log_proofs.consistency(session, args.first, args.second)
        session.rollback()
    print(json.dumps(proof.as_json(), indent=2))
    return 0


def _bundle(args: argparse.Namespace) -> int:
    from service.store.bundle_export import export_month

    month: Month = args.month
    target = Path(args.out)
    if target.exists():
        raise CliError(f"{target} exists: choose a new file")
    partial = target.with_name(target.name + ".partial")
    try:
        out = partial.open("xb")
    except OSError as exc:
        raise CliError(f"cannot create {partial}: {exc}") from None
    try:
        with _factory(Settings())() as session, out, StepBar("exporting") as bar:
            begin_read_only(session)
            summary = export_month(session, args.policy, month, out, progress=bar)
            session.rollback()
        partial.rename(target)
    except OSError as exc:
        raise CliError(f"cannot write {target}: {exc}") from None
    finally:
        partial.unlink(missing_ok=True)
    records = ", ".join(f"{n:,} {kind}" for kind, n in summary.records.items())
    print(
        f"{target}: {args.policy} {month}: {records}; head of seal {summary.seal_id} "
        f"({summary.tree_size:,} leaves); sha256 {summary.sha256}"
    )
    return 0


def _describe(plan: retention.PurgePlan) -> str:
    counts = ", ".join(f"{n:,} {kind}" for kind, n in plan.counts.items())
    return (
        f"seals {plan.floor + 1} to {plan.through_seal} (through {plan.through_month}): "
        f"{counts} records"
    )


def _purge(args: argparse.Namespace) -> int:
    settings = Settings()
    month: Month = args.through
    factory = _factory(settings)

    def run(dry_run: bool) -> retention.PurgeSummary:
        return retention.purge(
            factory,
            month,
            time_zone=settings.timezone,
            retention_months=settings.retention_months,
            by="cli",
            dry_run=dry_run,
            progress=_progress,
        )

    planned = run(dry_run=True)
    plan = planned.plan
    for note in plan.notes:
        print(f"note: {note}")
    if plan.empty:
        print(
            f"nothing to purge through {month}: every seal before its end is purged already "
            f"(through seal {plan.floor})"
        )
        return 0
    if args.dry_run:
        print(f"would purge {_describe(plan)}")
        return 0
    if not args.yes:
        if not sys.stdin.isatty():
            raise CliError("not a terminal: pass --yes to purge without a question")
        answer = input(f"purge {_describe(plan)}? This cannot be undone. Type 'purge': ")
        if answer.strip() != "purge":
            print("nothing purged")
            return 1
    done = run(dry_run=False)
    if done.purge_id is None:
        print("nothing to purge: another purge got there first")
        return 0
    print(f"purge {done.purge_id}: deleted {_describe(done.plan)}")
    print(
        "kept: policy versions and events, key events, snapshots, tally batches, seals, tree "
        "nodes, signing keys, and the leaf hash of every deleted record"
    )
    try:
        signer = signer_from_settings(settings)
    except (SigningKeyError, SigningKeyUnavailable):
        print(
            "the purge record is not sealed yet: run `evenhand log seal` (until then verify "
            "reports the purged records as deleted)"
        )
        return 0
    sealed = keep_log(
        factory, signer, settings.timezone, mirror=settings.head_mirror, progress=_progress
    )
    if sealed.seals:
        print(f"sealed the purge record: head seal {sealed.seals[-1].id}")
    return 0
