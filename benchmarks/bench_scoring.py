"""Scoring throughput: POST /v1/recommendations against a bare FastAPI endpoint, same run.

For each database (SQLite file, and PostgreSQL on 127.0.0.1 when reachable) the script
1. creates a fresh database, migrates it, creates keys and activates the Fernhollow demo policy;
2. serves the bare endpoint (benchmarks/bare_app.py; an async route, the reference, then a
   sync one for comparison), then Evenhand's own app with a committer that answers at once
   (its HTTP layer alone), with uvicorn, then Evenhand with ``evenhand serve``, with the SAME
   uvicorn settings (host 127.0.0.1, workers, no access log, log level) and drives all of
   them with the SAME closed-loop load generator (benchmarks/loadgen.py), the same request
   bodies and concurrency;
3. sends batches of 5,000 to POST /v1/recommendations/batch from one client, then from two
   concurrent clients, timed end to end (encoding, request, decision, durable write, answer,
   decoding); and, beside them, to the bare app's batch route (validation and a fixed answer
   per item: the framework's share).

Every write is durable: SQLite with synchronous=FULL (the default), PostgreSQL with its default
synchronous_commit=on. Only loopback traffic; every loop is bounded. Not a test: the targets
(>= 0.6 x the bare endpoint; >= 50,000 decisions/s in batches on SQLite) are printed beside
the figures. Run: ``.venv/bin/python benchmarks/bench_scoring.py [--backends sqlite,postgresql]``.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import secrets
import sys
import tempfile
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bare_app import ROUTE_KIND_VARIABLE
from loadgen import LoadResult, run_load

from service.demo.api_client import EvenhandClient
from service.demo.fernhollow import generate
from service.demo.policy import demo_policy
from service.demo.server import LOOPBACK, ServerProcess, free_port
from service.settings import Settings
from service.store import keys
from service.store.db import create_db_engine, create_session_factory
from service.store.migrate import upgrade

PG_SERVER = os.environ.get(
    "EVENHAND_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test"
)


def bare_command(port: int, workers: int) -> list[str]:
    """uvicorn with exactly what ``evenhand serve`` passes it (service/cli/serve.py): a factory,
    host, port, workers, no access log, log level info."""
    return [
        sys.executable,
        "-m",
        "uvicorn",
        "--factory",
        "bare_app:create_app",
        "--app-dir",
        str(Path(__file__).resolve().parent),
        "--host",
        LOOPBACK,
        "--port",
        str(port),
        "--workers",
        str(workers),
        "--no-access-log",
        "--log-level",
        "info",
    ]


def bodies(n: int, tag: str, policy: str) -> list[dict[str, Any]]:
    cases = generate(n, seed=7, id_prefix=tag)
    return [
        {
            "request_id": f"{tag}-{uuid.uuid4().hex}",
            "case_id": cases.case_id[i],
            "policy": policy,
            "score": float(cases.score[i]),
            "attributes": {"community": cases.community[i], "language": cases.language[i]},
        }
        for i in range(n)
    ]


def server_cpu_seconds(pid: int | None) -> float | None:
    """CPU time (user + system) of the server process and its live children (Linux /proc).

    Throughput on a shared machine depends on what else runs; CPU time per request does not
    much, so it is recorded beside the rates. The database server's own CPU is not included.
    """
    if pid is None or not Path("/proc/self/stat").exists():
        return None
    tick = os.sysconf("SC_CLK_TCK")
    total = 0.0
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        this, parent = int(stat.parent.name), int(fields[1])
        if this == pid or parent == pid:
            total += (int(fields[11]) + int(fields[12])) / tick
    return total


@dataclass
class Database:
    url: str
    drop: str | None = None  # PostgreSQL database to drop afterwards


def make_database(backend: str, workdir: Path) -> Database | None:
    if backend == "sqlite":
        return Database(f"sqlite:///{workdir / 'bench.db'}")
    name = f"evenhand_bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(PG_SERVER, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
    except Exception as exc:
        print(f"PostgreSQL not reachable, skipped: {str(exc).splitlines()[0]}", file=sys.stderr)
        return None
    finally:
        admin.dispose()
    url = make_url(PG_SERVER).set(database=name).render_as_string(hide_password=False)
    return Database(url, drop=name)


def drop_database(db: Database) -> None:
    if db.drop is None:
        return
    admin = create_engine(PG_SERVER, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{db.drop}" WITH (FORCE)'))
    admin.dispose()


def prepare(url: str) -> dict[str, str]:
    upgrade(url)
    engine = create_db_engine(Settings(database_url=url))
    factory = create_session_factory(engine)
    tokens = {}
    with factory() as session:
        for name, role in [
            ("author", "admin"),
            ("reviewer", "admin"),
            ("scoring", "scoring"),
            ("audit", "audit"),
        ]:
            tokens[name] = keys.create_key(session, name, role)[1]
        session.commit()
    engine.dispose()
    return tokens


def measured(
    server: ServerProcess,
    port: int,
    token: str | None,
    items: list[dict[str, Any]],
    concurrency: int,
) -> tuple[LoadResult, float | None]:
    before = server_cpu_seconds(server.pid)
    result = run_load(port, "/v1/recommendations", token, items, concurrency)
    after = server_cpu_seconds(server.pid)
    cpu = None if before is None or after is None else (after - before) / result.requests
    return result, cpu


def describe(label: str, r: LoadResult, cpu: float | None) -> dict[str, Any]:
    ok = sum(v for k, v in r.statuses.items() if 200 <= k < 300)
    row = {
        "label": label,
        "requests": r.requests,
        "ok": ok,
        "throughput_rps": round(r.throughput, 1),
        "p50_ms": round(r.percentile(0.5) * 1000, 2),
        "p99_ms": round(r.percentile(0.99) * 1000, 2),
        "server_cpu_ms_per_request": None if cpu is None else round(cpu * 1000, 3),
    }
    cpu_text = "" if cpu is None else f"   server CPU {cpu * 1000:.2f} ms/req"
    print(
        f"  {label:<28} {row['throughput_rps']:>9.1f} req/s   p50 {row['p50_ms']:>7.2f} ms   "
        f"p99 {row['p99_ms']:>7.2f} ms{cpu_text}   ({ok}/{r.requests} 2xx)",
        file=sys.stderr,
    )
    if ok != r.requests:
        raise SystemExit(f"{label}: not every request succeeded: {r.statuses}")
    return row


def run_batches(
    service: ServerProcess,
    token: str | None,
    policy: str,
    args: argparse.Namespace,
    clients: int,
    label: str = "batches",
) -> dict[str, Any]:
    """``args.batches`` batches per client, each client sending its next batch when the last
    was answered; timed from the first send to the last answer, encoding and decoding
    included."""
    per_client = [
        [bodies(args.batch_size, f"b{c}-{k}", policy) for k in range(args.batches)]
        for c in range(clients)
    ]
    headers = {"Content-Type": "application/json"}
    if token:
        headers["Authorization"] = f"Bearer {token}"

    def send(client: httpx.Client, items: list[dict[str, Any]]) -> None:
        r = client.post(
            "/v1/recommendations/batch", content=json.dumps({"items": items}), headers=headers
        )
        if r.status_code != 201:
            raise SystemExit(f"batch failed: {r.status_code} {r.text[:300]}")
        if len(r.json()["items"]) != len(items):
            raise SystemExit("batch answer is missing items")

    def one_client(batches: list[list[dict[str, Any]]]) -> None:
        with httpx.Client(base_url=service.base_url, timeout=300) as client:
            for items in batches:
                send(client, items)

    one_client([bodies(args.batch_size, f"warm{clients}", policy)])
    cpu_before = server_cpu_seconds(service.pid)
    start = time.perf_counter()
    with ThreadPoolExecutor(max_workers=clients) as pool:
        list(pool.map(one_client, per_client))
    seconds = time.perf_counter() - start
    cpu_after = server_cpu_seconds(service.pid)
    decisions = clients * args.batches * args.batch_size
    per_second = decisions / seconds
    cpu = None if cpu_before is None or cpu_after is None else (cpu_after - cpu_before)
    cpu_us = None if cpu is None else cpu / decisions * 1e6
    print(
        f"  {label} of {args.batch_size}, {clients} client(s): {per_second:,.0f} decisions/s "
        f"({decisions:,} decisions, {seconds:.2f} s; server CPU {cpu_us or 0:.1f} us per "
        f"decision{'; target on SQLite >= 50,000' if token else ''})",
        file=sys.stderr,
    )
    return {
        "clients": clients,
        "batch_size": args.batch_size,
        "batches_per_client": args.batches,
        "seconds": round(seconds, 3),
        "decisions_per_second": round(per_second),
        "server_cpu_us_per_decision": None if cpu_us is None else round(cpu_us, 1),
    }


def run_backend(backend: str, args: argparse.Namespace, workdir: Path) -> dict[str, Any] | None:
    db = make_database(backend, workdir)
    if db is None:
        return None
    try:
        tokens = prepare(db.url)
        env = {
            "EVENHAND_DATABASE_URL": db.url,
            "EVENHAND_DRAW_SECRET": secrets.token_hex(32),
            # The server seals the log as it runs, and refuses to start without a key.
            "EVENHAND_SIGNING_KEY": secrets.token_hex(32),
            "EVENHAND_SQLITE_SYNCHRONOUS": args.sqlite_synchronous,
        }
        document = demo_policy()
        name = document["name"]
        sync = f", synchronous={args.sqlite_synchronous}" if backend == "sqlite" else ""
        print(
            f"{backend}{sync}: {args.requests} single requests x {args.concurrency} "
            f"connections, {args.workers} worker(s)",
            file=sys.stderr,
        )

        # The bare endpoints first (async: the reference; sync: a thread hop per request),
        # then the service's HTTP layer alone (its committer answering at once), then the
        # service: same command line, same load.
        bare_results: dict[str, tuple[LoadResult, float | None]] = {}
        bare_batches: dict[str, Any] = {}
        for kind in ("async", "sync", "service-canned"):
            canned = kind == "service-canned"
            port = free_port()
            bare = ServerProcess(
                {**env, ROUTE_KIND_VARIABLE: kind},
                workdir / f"bare-{kind}-{backend}.log",
                port=port,
                command=bare_command(port, args.workers),
                ready_path="/readyz" if canned else "/openapi.json",
            )
            token = tokens["scoring"] if canned else None
            with bare:
                run_load(bare.port, "/v1/recommendations", token, bodies(200, "w", name))
                bare_results[kind] = measured(
                    bare, bare.port, token, bodies(args.requests, "bare", name), args.concurrency
                )
                if kind == "async":
                    bare_batches = run_batches(bare, None, name, args, 1, "bare batch route")
        service = ServerProcess(env, workdir / f"evenhand-{backend}.log", workers=args.workers)
        with service:
            with EvenhandClient(service.base_url) as api:
                api.publish(
                    tokens["author"],
                    tokens["reviewer"],
                    document,
                    "benchmark",
                    expected_current=None,
                )
            run_load(service.port, "/v1/recommendations", tokens["scoring"], bodies(200, "w", name))
            service_result, service_cpu = measured(
                service,
                service.port,
                tokens["scoring"],
                bodies(args.requests, "svc", name),
                args.concurrency,
            )
            rows = [
                describe("bare FastAPI endpoint (async)", *bare_results["async"]),
                describe("bare FastAPI endpoint (sync)", *bare_results["sync"]),
                describe("service HTTP layer alone", *bare_results["service-canned"]),
                describe("POST /v1/recommendations", service_result, service_cpu),
            ]
            reference = bare_results["async"][0].throughput
            ratio = service_result.throughput / reference
            ratio_sync = service_result.throughput / bare_results["sync"][0].throughput
            ceiling = bare_results["service-canned"][0].throughput / reference
            print(
                f"  ratio service / bare async route: {ratio:.2f} (target >= 0.6); "
                f"/ bare sync route: {ratio_sync:.2f}; HTTP layer alone / bare async: "
                f"{ceiling:.2f}",
                file=sys.stderr,
            )

            batch_runs = [
                run_batches(service, tokens["scoring"], name, args, clients)
                for clients in args.batch_clients
            ]
        return {
            "backend": backend,
            "sqlite_synchronous": args.sqlite_synchronous if backend == "sqlite" else None,
            "single": rows,
            "ratio": round(ratio, 2),
            "ratio_to_sync_bare": round(ratio_sync, 2),
            "http_layer_alone_ratio": round(ceiling, 2),
            "batches": batch_runs,
            "bare_batches": bare_batches,
        }
    finally:
        drop_database(db)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backends", default="sqlite,postgresql")
    parser.add_argument("--requests", type=int, default=4000)
    parser.add_argument("--concurrency", type=int, default=16)
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--batches", type=int, default=10)
    parser.add_argument("--batch-size", type=int, default=5000)
    parser.add_argument(
        "--batch-clients",
        type=lambda v: [int(x) for x in v.split(",")],
        default=[1, 2],
        help="comma-separated numbers of concurrent batch clients to measure (default 1,2)",
    )
    parser.add_argument(
        "--sqlite-synchronous",
        default="FULL",
        choices=["FULL", "NORMAL"],
        help="FULL (default): every commit survives power loss; NORMAL (WAL): survives a "
        "crash or kill -9 of the server, not of the machine",
    )
    parser.add_argument("--json", type=Path, help="also write the figures to this file")
    args = parser.parse_args()
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    print(f"machine: {machine}; load average {os.getloadavg()[0]:.2f}", file=sys.stderr)
    results = []
    with tempfile.TemporaryDirectory(prefix="evenhand-bench-") as tmp:
        for backend in args.backends.split(","):
            result = run_backend(backend.strip(), args, Path(tmp))
            if result is not None:
                results.append(result)
    report = {
        "machine": machine,
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
        # Other work on the machine skews every figure: the load is recorded beside them.
        "load_average_1m_at_end": round(os.getloadavg()[0], 2),
        "results": results,
    }
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
