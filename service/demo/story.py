"""The Fernhollow demo as a list of stages sharing one small context.

Each stage is a function ``stage(ctx) -> None`` that reads and extends :class:`DemoContext`;
:func:`run_demo` runs them in order and always stops the server at the end. Later stages
(outcomes arriving, an audit run, a report) are appended with ``default_stages()`` plus more
before :func:`print_summary`; see ``docs/demo.md``.

Everything runs on this machine: a SQLite file in the output folder, ``evenhand serve`` as a
child process on a free loopback port, and real HTTP requests to it.
"""

from __future__ import annotations

import secrets
import shutil
import threading
from collections import Counter
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor

from service.demo.api_client import EvenhandClient
from service.demo.context import CLIENT_THREADS, MARKER, DemoContext, DemoError, SentCase, Stage
from service.demo.fernhollow import generate, write_csv
from service.demo.policy import demo_policy, group_blind_variant
from service.demo.server import ServerProcess
from service.log.heads import new_signing_key
from service.settings import Settings
from service.store import keys
from service.store.db import create_db_engine, create_session_factory
from service.store.log_upkeep import keep_log
from service.store.migrate import upgrade
from service.store.signing import signer_from_settings

# -- stages ------------------------------------------------------------------------------


def prepare_output(ctx: DemoContext) -> None:
    """A fresh output folder (an earlier demo's is replaced), a draw secret, the data."""
    out = ctx.output_dir
    if out.exists():
        if not (out / MARKER).exists() and any(out.iterdir()):
            raise DemoError(
                f"{out} exists and was not made by the demo; choose another --output folder"
            )
        shutil.rmtree(out)
    out.mkdir(parents=True)
    (out / MARKER).write_text("made by `evenhand demo`; replaced on the next run\n")
    ctx.database_url = f"sqlite:///{(out / 'evenhand.db').resolve()}"
    # The demo makes its own secret; a real deployment sets EVENHAND_DRAW_SECRET and keeps it.
    ctx.draw_secret = secrets.token_hex(32)
    secret_file = out / "draw-secret.txt"
    secret_file.write_text(ctx.draw_secret + "\n")
    secret_file.chmod(0o600)
    # Likewise its own log signing key; a real deployment keeps its key outside the database.
    _key, seed_hex = new_signing_key()
    ctx.signing_key_file = out / "signing-key.txt"
    ctx.signing_key_file.write_text(seed_hex + "\n")
    ctx.signing_key_file.chmod(0o600)
    ctx.discharges = generate(ctx.cases, seed=ctx.seed)
    write_csv(ctx.discharges, out / "discharges.csv")
    ctx.say(f"[1] output in {out}/: {ctx.cases} synthetic Fernhollow discharges (seed {ctx.seed})")


def migrate_database(ctx: DemoContext) -> None:
    upgrade(ctx.database_url)
    ctx.say(f"[2] database migrated: {ctx.database_url}")


def create_keys(ctx: DemoContext) -> None:
    """Two admins (four-eyes), the discharge system (scoring) and an auditor."""
    engine = create_db_engine(Settings(database_url=ctx.database_url))
    try:
        with create_session_factory(engine)() as session:
            for who, name, role in [
                ("author", "admin-rivera", "admin"),
                ("reviewer", "admin-okafor", "admin"),
                ("scoring", "discharge-system", "scoring"),
                ("audit", "auditor-lindqvist", "audit"),
            ]:
                ctx.tokens[who] = keys.create_key(session, name, role)[1]
            session.commit()
    finally:
        engine.dispose()
    ctx.say(
        "[3] API keys: admin-rivera, admin-okafor (admin), discharge-system (scoring), "
        "auditor-lindqvist (audit)"
    )


def start_server(ctx: DemoContext) -> None:
    env = {
        "EVENHAND_DATABASE_URL": ctx.database_url,
        "EVENHAND_DRAW_SECRET": ctx.draw_secret,
        # The demo's server says it is one (and would accept a short secret, with a warning).
        "EVENHAND_DEMO_MODE": "true",
        "EVENHAND_SEAL_INTERVAL_SECONDS": "2",
        "EVENHAND_SIGNING_KEY_FILE": str(ctx.signing_key_file),
        "EVENHAND_HEAD_MIRROR": str(ctx.output_dir / "heads.jsonl"),
    }
    ctx.server = ServerProcess(env, ctx.output_dir / "server.log")
    ctx.server.start()
    ctx.base_url = ctx.server.base_url
    ctx.say(
        f"[4] evenhand serve running at {ctx.base_url} (pid {ctx.server.pid}, "
        f"log {ctx.output_dir / 'server.log'})"
    )


def publish_policy(ctx: DemoContext) -> None:
    document = demo_policy()
    ctx.policy_name = document["name"]
    with ctx.client() as api:
        version = api.submit(ctx.tokens["author"], document)
        ctx.say(f"[5] admin-rivera submitted {ctx.policy_name} v{version}")
        api.approve(ctx.tokens["reviewer"], ctx.policy_name, version)
        ctx.say(f"    admin-okafor approved v{version} (the author may not approve their own)")
        api.activate(
            ctx.tokens["author"],
            ctx.policy_name,
            version,
            "initial reviewed policy",
            expected_current=None,
        )
    ctx.versions["reviewed"] = version
    ctx.say(f"    v{version} is active")


def _send(ctx: DemoContext, rows: Sequence[int], phase: str) -> None:
    """Ask for a recommendation for each discharge row, over HTTP, a few requests at a time."""
    d = ctx.discharges
    assert d is not None
    done = 0
    lock = threading.Lock()
    step = max(1, len(rows) // 5)
    local = threading.local()
    clients: list[EvenhandClient] = []

    def api() -> EvenhandClient:
        # One keep-alive connection per client thread.
        if not hasattr(local, "client"):
            local.client = ctx.client()
            with lock:
                clients.append(local.client)
        client: EvenhandClient = local.client
        return client

    def one(i: int) -> SentCase:
        nonlocal done
        body = {
            "request_id": f"{d.case_id[i]}-discharge",
            "case_id": d.case_id[i],
            "policy": ctx.policy_name,
            "score": float(d.score[i]),
            "attributes": {"community": d.community[i], "language": d.language[i]},
        }
        answer = api().recommend(ctx.tokens["scoring"], body)
        with lock:
            done += 1
            if done % step == 0 or done == len(rows):
                ctx.say(f"    {phase}: {done}/{len(rows)} recommendations")
        return SentCase(
            i, d.case_id[i], answer["recommendation_id"], answer["version"], answer["action"], phase
        )

    try:
        with ThreadPoolExecutor(CLIENT_THREADS) as pool:
            ctx.sent.extend(pool.map(one, rows))
    finally:
        for client in clients:
            client.close()


def _phase_rows(ctx: DemoContext) -> tuple[range, range, range]:
    n = ctx.cases
    a, b = int(n * 0.6), int(n * 0.8)
    return range(0, a), range(a, b), range(b, n)


def replay_stream(ctx: DemoContext) -> None:
    rows, _, _ = _phase_rows(ctx)
    ctx.say(f"[6] the discharge system asks for {len(rows)} recommendations")
    _send(ctx, rows, "reviewed policy")


def switch_version(ctx: DemoContext) -> None:
    """A group-blind single cut goes live as v2, and some discharges are decided by it."""
    variant = group_blind_variant(demo_policy())
    with ctx.client() as api:
        version = api.submit(ctx.tokens["author"], variant)
        api.approve(ctx.tokens["reviewer"], ctx.policy_name, version)
        diff = api.get(
            f"/v1/policies/{ctx.policy_name}/diff",
            ctx.tokens["author"],
            **{"from": ctx.versions["reviewed"], "to": version},
        )
        api.activate(
            ctx.tokens["author"],
            ctx.policy_name,
            version,
            "trial of one cut for all",
            expected_current=ctx.versions["reviewed"],
        )
    ctx.versions["group-blind"] = version
    ctx.say(f"[7] v{version} submitted, approved by the second admin and activated; what changed:")
    for line in str(diff.get("summary", "")).splitlines()[:6]:
        ctx.say(f"      {line}")
    _, rows, _ = _phase_rows(ctx)
    _send(ctx, rows, "group-blind trial")


def _offer_rates(ctx: DemoContext, phase: str) -> dict[str, tuple[int, int]]:
    """(offered, sent) per community among the cases of ``phase``."""
    d = ctx.discharges
    assert d is not None
    out: dict[str, tuple[int, int]] = {}
    for s in ctx.sent:
        if s.phase == phase:
            offered, total = out.get(d.community[s.index], (0, 0))
            out[d.community[s.index]] = (offered + int(s.action), total + 1)
    return out


def _rollback_reason(ctx: DemoContext) -> str:
    """The reason states what the trial changed most, from the cases it decided."""
    before = _offer_rates(ctx, "reviewed policy")
    during = _offer_rates(ctx, "group-blind trial")
    shifts = [
        (abs(during[c][0] / during[c][1] - before[c][0] / before[c][1]), c)
        for c in during
        if c in before and during[c][1] and before[c][1]
    ]
    if not shifts:
        return "trial stopped: back to the reviewed per-group policy"
    _, c = max(shifts)
    a, b = before[c][0] / before[c][1], during[c][0] / during[c][1]
    return (
        f"trial stopped: with one cut for all, the share of {c} patients offered follow-up "
        f"moved from {a:.0%} to {b:.0%}; back to the reviewed per-group policy"
    )


def roll_back(ctx: DemoContext) -> None:
    reason = _rollback_reason(ctx)
    with ctx.client() as api:
        version = api.rollback(
            ctx.tokens["author"],
            ctx.policy_name,
            reason,
            expected_current=ctx.versions["group-blind"],
        )
    ctx.say(f"[8] rolled back to v{version}: {reason}")
    _, _, rows = _phase_rows(ctx)
    _send(ctx, rows, "after rollback")


def seal_and_verify(ctx: DemoContext) -> None:
    settings = Settings(
        database_url=ctx.database_url,
        signing_key_file=str(ctx.signing_key_file),
        head_mirror=str(ctx.output_dir / "heads.jsonl"),
    )
    engine = create_db_engine(settings)
    try:
        # The server seals too; seals take consecutive ids, so the two take turns.
        done = keep_log(
            create_session_factory(engine),
            signer_from_settings(settings),
            settings.timezone,
            tally_now=True,
            mirror=settings.head_mirror,
        )
    finally:
        engine.dispose()
    with ctx.client() as api:
        ctx.verify = api.verify(ctx.tokens["audit"])
    status = "ok" if ctx.verify.get("ok") else f"PROBLEM: {ctx.verify.get('problem')}"
    ctx.say(
        f"[9] sealed {done.sealed} remaining records; verify: {status} "
        f"({ctx.verify.get('seals_checked')} seals, {ctx.verify.get('records_checked')} records)"
    )
    if not ctx.verify.get("ok"):
        raise DemoError("the log did not verify")


def print_summary(ctx: DemoContext) -> None:
    d = ctx.discharges
    assert d is not None
    with ctx.client() as api:
        history = api.history(ctx.tokens["author"], ctx.policy_name)
    lines = ["", "Summary", "-------"]
    lines.append(f"policy {ctx.policy_name}: lifecycle")
    for e in history:
        versions = (
            f"v{e['from_version']} -> v{e['to_version']}"
            if e["from_version"]
            else (f"v{e['to_version']}" if e["to_version"] else "")
        )
        reason = f" ({e['reason']})" if e.get("reason") else ""
        lines.append(f"  {e['at'][:19]}  {e['action']:<9} {versions:<10} by {e['actor']}{reason}")
    lines.append(f"recommendations: {len(ctx.sent)} over real HTTP")
    by_version = Counter(s.version for s in ctx.sent)
    for version, count in sorted(by_version.items()):
        acted: Counter[str] = Counter()
        total: Counter[str] = Counter()
        for s in ctx.sent:
            if s.version == version:
                total[d.community[s.index]] += 1
                acted[d.community[s.index]] += int(s.action)
        rates = ", ".join(f"{c} {acted[c] / total[c]:.0%} of {total[c]}" for c in sorted(total))
        lines.append(f"  v{version}: {count} decided; follow-up offered: {rates}")
    verified = "ok" if ctx.verify.get("ok") else "NOT ok"
    head = (ctx.verify.get("head") or {}).get("head", {})
    lines.append(
        f"log: {ctx.verify.get('records_checked')} records in {ctx.verify.get('seals_checked')} "
        f"signed seals, verified {verified}; head: seal {head.get('seal_id')}, size "
        f"{head.get('tree_size')} (every signed head is also in heads.jsonl: keep it elsewhere)"
    )
    lines.extend(ctx.summary)
    lines.extend(
        [
            "",
            "Cautions: recommendations are advisory; a nurse or physician decides and can "
            "override. Rules that differ by community or language use group attributes, which "
            "is unlawful in some sectors and places: choose criteria with qualified counsel. "
            "Parity criteria conflict with each other and with calibration. All data here are "
            "invented (a fictional health system).",
        ]
    )
    print("\n".join(lines))


def stop_server(ctx: DemoContext) -> None:
    if ctx.server is not None:
        ctx.server.stop()
        ctx.server = None


def default_stages() -> list[Stage]:
    return [
        prepare_output,
        migrate_database,
        create_keys,
        start_server,
        publish_policy,
        replay_stream,
        switch_version,
        roll_back,
        seal_and_verify,
        print_summary,
    ]


def run_demo(ctx: DemoContext, stages: Sequence[Stage] | None = None) -> DemoContext:
    """Run ``stages`` (default: :func:`default_stages`) in order; the server always stops."""
    try:
        for stage in stages if stages is not None else default_stages():
            stage(ctx)
    finally:
        stop_server(ctx)
    return ctx
