"""API replicas on one PostgreSQL: ``evenhand serve --workers N`` for N in 1, 2, 4.

One fresh PostgreSQL database (migrated, keys created, the Fernhollow demo policy activated
over HTTP), then for each worker count a fresh ``evenhand serve`` (uvicorn, N worker
processes, each with its own group committer, key cache and periodic sealer, all on the same
database), driven from this separate process:

- single recommendations: ``benchmarks/loadgen.py``'s closed loop (``--concurrency``
  keep-alive connections; the kernel spreads the connections over the workers), after a
  warm-up; throughput, p50, p99;
- batches of ``--batch-size`` to ``POST /v1/recommendations/batch`` from ``--batch-clients``
  concurrent clients (default: as many as workers), timed end to end at the client.

Beside each figure: the API processes' CPU per request (user + system of the server and its
worker processes, from ``/proc``), the PostgreSQL backends' CPU per request (the backends
connected to the benchmark's database, from ``pg_stat_activity`` and ``/proc``), the machine's
whole CPU use over the run (``/proc/stat``: busy share of all cores, other people's work
included) and the load average. Every write is durable (``synchronous_commit=on``). Not a
test. Run::

    nice -n 10 .venv/bin/python benchmarks/bench_replicas.py --workers 1,2,4 --json out.json
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
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import create_engine, text

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_scoring import bodies, drop_database, make_database, prepare, server_cpu_seconds
from loadgen import run_load

from service.demo.api_client import EvenhandClient
from service.demo.policy import demo_policy
from service.demo.server import ServerProcess
from service.log.heads import new_signing_key


def machine_busy() -> tuple[float, float]:
    """(busy, total) jiffies of all cores from /proc/stat."""
    fields = [int(v) for v in Path("/proc/stat").read_text().splitlines()[0].split()[1:]]
    idle = fields[3] + fields[4]  # idle + iowait
    return float(sum(fields) - idle), float(sum(fields))


class BackendCpu:
    """CPU seconds of the PostgreSQL backends connected to one database (read from /proc)."""

    def __init__(self, url: str, database: str) -> None:
        self._engine = create_engine(url, isolation_level="AUTOCOMMIT")
        self._database = database
        self._tick = os.sysconf("SC_CLK_TCK")

    def _pids(self) -> list[int]:
        with self._engine.connect() as conn:
            mine = conn.execute(text("SELECT pg_backend_pid()")).scalar_one()
            rows = conn.execute(
                text("SELECT pid FROM pg_stat_activity WHERE datname = :d"), {"d": self._database}
            ).scalars()
            return [int(p) for p in rows if p != mine]

    def snapshot(self) -> dict[int, float]:
        out = {}
        for pid in self._pids():
            try:
                fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            out[pid] = (int(fields[11]) + int(fields[12])) / self._tick
        return out

    @staticmethod
    def spent(before: dict[int, float], after: dict[int, float]) -> float:
        """CPU of the backends alive at the end since ``before`` (new ones from zero)."""
        return sum(cpu - before.get(pid, 0.0) for pid, cpu in after.items())

    def close(self) -> None:
        self._engine.dispose()


class Meter:
    """API CPU, backend CPU, machine busy share and load around one measured stretch."""

    def __init__(self, server: ServerProcess, backends: BackendCpu) -> None:
        self.server, self.backends = server, backends

    def __enter__(self) -> Meter:
        self.load = os.getloadavg()[0]
        self.api0 = server_cpu_seconds(self.server.pid) or 0.0
        self.pg0 = self.backends.snapshot()
        self.busy0 = machine_busy()
        self.t0 = time.perf_counter()
        return self

    def __exit__(self, *exc: object) -> None:
        self.seconds = time.perf_counter() - self.t0
        self.api = (server_cpu_seconds(self.server.pid) or 0.0) - self.api0
        self.pg = BackendCpu.spent(self.pg0, self.backends.snapshot())
        busy1 = machine_busy()
        self.machine_busy = (busy1[0] - self.busy0[0]) / max(1.0, busy1[1] - self.busy0[1])

    def row(self, count: int) -> dict[str, Any]:
        return {
            "api_cpu_us_per_item": round(self.api / count * 1e6, 1),
            "postgres_cpu_us_per_item": round(self.pg / count * 1e6, 1),
            "machine_busy_share": round(self.machine_busy, 2),
            "load_avg_at_start": round(self.load, 2),
        }


def single(service: ServerProcess, token: str, name: str, args: argparse.Namespace) -> Any:
    run_load(service.port, "/v1/recommendations", token, bodies(400, "warm", name), 16)
    items = bodies(args.requests, f"s{service.port}", name)
    with Meter(service, args.backend_cpu) as meter:
        result = run_load(service.port, "/v1/recommendations", token, items, args.concurrency)
    ok = sum(v for k, v in result.statuses.items() if 200 <= k < 300)
    if ok != result.requests:
        raise SystemExit(f"not every request succeeded: {result.statuses}")
    return {
        "requests": result.requests,
        "throughput_rps": round(result.throughput, 1),
        "p50_ms": round(result.percentile(0.5) * 1000, 2),
        "p99_ms": round(result.percentile(0.99) * 1000, 2),
        **meter.row(result.requests),
    }


def batches(service: ServerProcess, token: str, name: str, args: argparse.Namespace) -> Any:
    clients = args.batch_clients or service.workers
    work = [
        [bodies(args.batch_size, f"b{service.port}-{c}-{k}", name) for k in range(args.batches)]
        for c in range(clients)
    ]
    headers = {"Content-Type": "application/json", "Authorization": f"Bearer {token}"}

    def one_client(batches: list[list[dict[str, Any]]]) -> None:
        with httpx.Client(base_url=service.base_url, timeout=600) as client:
            for items in batches:
                r = client.post(
                    "/v1/recommendations/batch",
                    content=json.dumps({"items": items}),
                    headers=headers,
                )
                if r.status_code != 201 or len(r.json()["items"]) != len(items):
                    raise SystemExit(f"batch failed: {r.status_code} {r.text[:300]}")

    one_client([bodies(args.batch_size, f"bw{service.port}", name)])
    with Meter(service, args.backend_cpu) as meter, ThreadPoolExecutor(clients) as pool:
        list(pool.map(one_client, work))
    decisions = clients * args.batches * args.batch_size
    return {
        "clients": clients,
        "decisions": decisions,
        "decisions_per_s": round(decisions / meter.seconds),
        **meter.row(decisions),
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", default="1,2,4")
    parser.add_argument("--requests", type=int, default=4000)
    parser.add_argument("--concurrency", type=int, default=32)
    parser.add_argument("--batches", type=int, default=4)
    parser.add_argument("--batch-size", type=int, default=5000)
    parser.add_argument("--batch-clients", type=int, default=0, help="0: one per worker")
    parser.add_argument("--start-timeout", type=float, default=180.0)
    parser.add_argument("--json", type=Path)
    args = parser.parse_args()
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    print(f"machine: {machine}; load average {os.getloadavg()}", file=sys.stderr)
    results: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory(prefix="evenhand-replicas-") as tmp:
        db = make_database("postgresql", Path(tmp))
        if db is None:
            return 1
        try:
            tokens = prepare(db.url)
            assert db.drop is not None
            args.backend_cpu = BackendCpu(db.url, db.drop)
            env = {
                "EVENHAND_DATABASE_URL": db.url,
                "EVENHAND_DRAW_SECRET": secrets.token_hex(32),
                "EVENHAND_SIGNING_KEY": new_signing_key()[1],  # the sealers sign heads
            }
            document = demo_policy()
            name = document["name"]
            published = False
            for workers in [int(w) for w in args.workers.split(",")]:
                log = Path(tmp) / f"serve-{workers}.log"
                service = ServerProcess(env, log, workers=workers)
                # N workers start slowly on a busy machine: a longer wait than the default.
                service.start(timeout=args.start_timeout)
                try:
                    if not published:
                        with EvenhandClient(service.base_url) as api:
                            api.publish(
                                tokens["author"],
                                tokens["reviewer"],
                                document,
                                "benchmark",
                                expected_current=None,
                            )
                        published = True
                    row = {
                        "workers": workers,
                        "single": single(service, tokens["scoring"], name, args),
                        "batches": batches(service, tokens["scoring"], name, args),
                    }
                finally:
                    service.stop()
                results.append(row)
                s, b = row["single"], row["batches"]
                print(
                    f"workers {workers}: single {s['throughput_rps']:,.0f} req/s p50 "
                    f"{s['p50_ms']} ms p99 {s['p99_ms']} ms, API CPU {s['api_cpu_us_per_item']}"
                    f" us/req, PostgreSQL {s['postgres_cpu_us_per_item']} us/req, machine busy "
                    f"{s['machine_busy_share']:.0%} (load {s['load_avg_at_start']}); batches "
                    f"({b['clients']} clients) {b['decisions_per_s']:,}/s, API CPU "
                    f"{b['api_cpu_us_per_item']} us, PostgreSQL {b['postgres_cpu_us_per_item']} "
                    f"us per decision, machine busy {b['machine_busy_share']:.0%} (load "
                    f"{b['load_avg_at_start']})",
                    file=sys.stderr,
                )
            args.backend_cpu.close()
        finally:
            drop_database(db)
    report = {
        "machine": machine,
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
        "load_average_at_end": os.getloadavg(),
        "results": results,
    }
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
