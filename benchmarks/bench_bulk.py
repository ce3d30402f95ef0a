"""Streaming bulk scoring against the floor: the same rows inserted the fastest plain way.

For each database (a SQLite file; PostgreSQL on 127.0.0.1 when reachable) and each size, in
one run, each on a fresh migrated database holding the Fernhollow demo policy:

1. **route**: ``evenhand serve`` (one worker) and one client streaming an NDJSON file to
   ``POST /v1/recommendations/stream`` while it reads the answers (a socket, a sending thread,
   the answers counted as they arrive), timed from the first byte sent to the last answer;
   the server's peak RSS (``VmHWM``) and CPU time;
2. **cli**: ``evenhand score --in cases.csv --out decisions.csv``, a child process, timed
   from start to exit (start-up included); its peak RSS and CPU time (``wait4``);
3. **floor**: the rows the route wrote, read back (untimed), inserted into a fresh migrated
   database (the same table, the same indexes) in one transaction by the fastest plain path:
   ``sqlite3`` ``executemany`` with the service's pragmas, PostgreSQL ``COPY FROM STDIN``;
   timed inserts plus the commit.

Every commit is durable (SQLite ``synchronous=FULL``, PostgreSQL ``synchronous_commit=on``).
The ratios printed are floor time / path time (1.0: as fast as the floor; target >= 0.9).
Not a test. Run, on a quiet machine if possible:

    nice -n 10 .venv/bin/python benchmarks/bench_bulk.py --rows 100000,1000000 --json out.json
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import platform
import resource
import secrets
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_scoring import drop_database, make_database, prepare, server_cpu_seconds

from service.demo.api_client import EvenhandClient
from service.demo.fernhollow import generate
from service.demo.policy import demo_policy
from service.demo.server import LOOPBACK, ServerProcess
from service.store.recommendations import INSERT_COLUMNS

PIECE = 256 * 1024


def write_inputs(n: int, workdir: Path, policy: str) -> tuple[Path, Path]:
    """The same cases as NDJSON (route) and CSV (cli), with their own request_ids."""
    ndjson, table = workdir / f"cases-{n}.ndjson", workdir / f"cases-{n}.csv"
    step = 200_000
    with ndjson.open("w", encoding="utf-8") as nd, table.open("w", newline="") as tb:
        writer = csv.writer(tb)
        writer.writerow(["request_id", "case_id", "policy", "score", "community", "language"])
        for start in range(0, n, step):
            cases = generate(min(step, n - start), seed=start + 1, id_prefix=f"B{start}-")
            for i in range(len(cases.case_id)):
                case_id, score = cases.case_id[i], float(cases.score[i])
                community, language = cases.community[i], cases.language[i]
                body = {
                    "request_id": f"route-{start + i}",
                    "case_id": case_id,
                    "policy": policy,
                    "score": score,
                    "attributes": {"community": community, "language": language},
                }
                nd.write(json.dumps(body, separators=(",", ":")) + "\n")
                writer.writerow(
                    [f"cli-{start + i}", case_id, policy, repr(score), community, language]
                )
    return ndjson, table


def peak_rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


class RssTrace:
    """Samples a process's resident set (``VmRSS``) twice a second while it runs; ``quarters``
    is the largest sample in each quarter of the run (flat memory: four equal figures)."""

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.samples: list[float] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        status = Path(f"/proc/{self.pid}/status")
        while not self._stop.wait(0.5):
            try:
                text = status.read_text()
            except OSError:
                return
            for line in text.splitlines():
                if line.startswith("VmRSS:"):
                    self.samples.append(int(line.split()[1]) / 1024)

    def __enter__(self) -> RssTrace:
        self._thread.start()
        return self

    def __exit__(self, *_: object) -> None:
        self._stop.set()
        self._thread.join()

    def quarters(self) -> list[float]:
        n = len(self.samples)
        if n < 4:
            return []
        return [round(max(self.samples[q * n // 4 : (q + 1) * n // 4]), 1) for q in range(4)]


def stream_file(port: int, token: str, path: Path) -> tuple[float, int]:
    """(seconds, answer lines): send ``path`` while reading the chunked answer."""
    size = path.stat().st_size
    sock = socket.create_connection((LOOPBACK, port))
    head = (
        f"POST /v1/recommendations/stream HTTP/1.1\r\nHost: {LOOPBACK}\r\n"
        f"Authorization: Bearer {token}\r\nContent-Type: application/x-ndjson\r\n"
        f"Content-Length: {size}\r\nConnection: close\r\n\r\n"
    ).encode()

    def send() -> None:
        with path.open("rb") as body:
            sock.sendall(head)
            while piece := body.read(PIECE):
                sock.sendall(piece)

    start = time.perf_counter()
    sender = threading.Thread(target=send)
    sender.start()
    answers = sock.makefile("rb")
    status = answers.readline()
    if b" 200 " not in status:
        raise SystemExit(f"stream refused: {status!r} {answers.read(2000)!r}")
    while answers.readline() not in (b"\r\n", b""):
        pass
    lines = 0
    last = b""
    while True:  # chunked transfer encoding
        size_line = answers.readline()
        length = int(size_line.split(b";")[0], 16)
        if length == 0:
            break
        data = answers.read(length)
        answers.readline()
        lines += data.count(b"\n")
        last = data[-300:]
    seconds = time.perf_counter() - start
    sender.join()
    sock.close()
    if b'"error"' in last:
        raise SystemExit(f"stream ended with an error: {last!r}")
    return seconds, lines


def publish(server: ServerProcess, tokens: dict[str, str]) -> str:
    document = demo_policy()
    with EvenhandClient(server.base_url) as api:
        api.publish(tokens["author"], tokens["reviewer"], document, "bench", expected_current=None)
    return str(document["name"])


def run_route(url: str, env: dict[str, str], n: int, workdir: Path, ndjson: Path) -> dict[str, Any]:
    tokens = prepare(url)
    with ServerProcess({**env, "EVENHAND_DATABASE_URL": url}, workdir / "route.log") as server:
        publish(server, tokens)
        assert server.pid is not None
        cpu_before = server_cpu_seconds(server.pid) or 0.0
        with RssTrace(server.pid) as trace:
            seconds, lines = stream_file(server.port, tokens["scoring"], ndjson)
        cpu = (server_cpu_seconds(server.pid) or 0.0) - cpu_before
        rss = peak_rss_mib(server.pid)
    if lines != n:
        raise SystemExit(f"route answered {lines} lines for {n}")
    return {
        "seconds": seconds,
        "rows_per_s": n / seconds,
        "cpu_s": cpu,
        "peak_rss_mib": rss,
        "rss_by_quarter_mib": trace.quarters(),
    }


def run_cli(url: str, env: dict[str, str], n: int, workdir: Path, table: Path) -> dict[str, Any]:
    tokens = prepare(url)
    with ServerProcess({**env, "EVENHAND_DATABASE_URL": url}, workdir / "cli.log") as server:
        publish(server, tokens)
    out = workdir / "decisions.csv"
    command = [sys.executable, "-m", "service.cli.main", "score", "--in", str(table)]
    start = time.perf_counter()
    child = subprocess.Popen(
        [*command, "--out", str(out)],
        env={**os.environ, **env, "EVENHAND_DATABASE_URL": url, "EVENHAND_PROGRESS": "0"},
    )
    with RssTrace(child.pid) as trace:
        _, status, usage = os.wait4(child.pid, 0)
    seconds = time.perf_counter() - start
    if status != 0:
        raise SystemExit(f"evenhand score failed ({status})")
    with out.open() as decisions:
        written = sum(1 for _ in decisions) - 1
    out.unlink()
    if written != n:
        raise SystemExit(f"cli wrote {written} decisions for {n}")
    return {
        "seconds": seconds,
        "rows_per_s": n / seconds,
        "cpu_s": usage.ru_utime + usage.ru_stime,
        "peak_rss_mib": usage.ru_maxrss / 1024,
        "rss_by_quarter_mib": trace.quarters(),
    }


def run_floor(
    source_url: str, url: str, env: dict[str, str], n: int, workdir: Path
) -> dict[str, Any]:
    """The rows ``source_url`` holds, inserted into the fresh database ``url`` (migrated and
    holding the policy the rows name: the foreign key is checked as for the service)."""
    tokens = prepare(url)
    with ServerProcess({**env, "EVENHAND_DATABASE_URL": url}, workdir / "floor.log") as server:
        publish(server, tokens)
    columns = ", ".join(f'"{c}"' for c in INSERT_COLUMNS)
    timed = 0.0
    cpu_before = time.process_time()  # on SQLite the inserts' work; on PostgreSQL the client's
    step = 50_000
    if url.startswith("sqlite"):
        source = sqlite3.connect(source_url.removeprefix("sqlite:///"))
        target = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None)
        pragmas = ("journal_mode=WAL", "foreign_keys=ON", "synchronous=FULL", "cache_size=-65536")
        for pragma in pragmas:
            target.execute(f"PRAGMA {pragma}")
        marks = ", ".join("?" * len(INSERT_COLUMNS))
        insert = f"INSERT INTO recommendations ({columns}) VALUES ({marks})"
        rows = source.execute(f"SELECT {columns} FROM recommendations ORDER BY id")
        target.execute("BEGIN")
        while batch := rows.fetchmany(step):
            start = time.perf_counter()
            target.executemany(insert, batch)
            timed += time.perf_counter() - start
        start = time.perf_counter()
        target.execute("COMMIT")
        timed += time.perf_counter() - start
        count = target.execute("SELECT COUNT(*) FROM recommendations").fetchone()[0]
        source.close()
        target.close()
    else:
        import psycopg

        plain = lambda u: u.replace("postgresql+psycopg://", "postgresql://")  # noqa: E731
        cast = ", ".join(f'"{c}"::text' if c == "attributes" else f'"{c}"' for c in INSERT_COLUMNS)
        with psycopg.connect(plain(source_url)) as source, psycopg.connect(plain(url)) as target:
            cursor = source.cursor(name="rows")
            cursor.execute(f"SELECT {cast} FROM recommendations ORDER BY id")
            with target.cursor() as out:
                while batch := cursor.fetchmany(step):
                    start = time.perf_counter()
                    with out.copy(f"COPY recommendations ({columns}) FROM STDIN") as copy:
                        for row in batch:
                            copy.write_row(row)
                    timed += time.perf_counter() - start
            start = time.perf_counter()
            target.commit()
            timed += time.perf_counter() - start
            count = target.execute("SELECT COUNT(*) FROM recommendations").fetchone()[0]  # type: ignore[index]
    if count != n:
        raise SystemExit(f"floor inserted {count} rows for {n}")
    # Reading the source rows is in the CPU figure too (small next to the inserts on SQLite).
    return {"seconds": timed, "rows_per_s": n / timed, "cpu_s": time.process_time() - cpu_before}


def run_size(
    backend: str, n: int, workdir: Path, key: Path, seal_interval: float
) -> dict[str, Any] | None:
    env = {
        "EVENHAND_DRAW_SECRET": secrets.token_hex(32),
        "EVENHAND_SIGNING_KEY_FILE": str(key),
        # The server's periodic sealer hashes what the stream writes, in the same process;
        # the CLI leaves sealing to the server or job runner. Default: out of the run.
        "EVENHAND_SEAL_INTERVAL_SECONDS": str(seal_interval),
    }
    ndjson, table = write_inputs(n, workdir, str(demo_policy()["name"]))
    dbs = []
    try:
        for label in ("route", "cli", "floor"):
            db = make_database(backend, workdir / label)
            if db is None:
                return None
            dbs.append(db)
        load = os.getloadavg()[0]
        route = run_route(dbs[0].url, env, n, workdir, ndjson)
        cli = run_cli(dbs[1].url, env, n, workdir, table)
        floor = run_floor(dbs[0].url, dbs[2].url, env, n, workdir)
    finally:
        for db in dbs:
            drop_database(db)
        ndjson.unlink(missing_ok=True)
        table.unlink(missing_ok=True)
    result = {
        "backend": backend,
        "rows": n,
        "seal_interval_seconds": seal_interval,
        "load_average_1m_at_start": round(load, 2),
        "load_average_1m_at_end": round(os.getloadavg()[0], 2),
        "route": route,
        "cli": cli,
        "floor": floor,
        "route_vs_floor": floor["seconds"] / route["seconds"],
        "cli_vs_floor": floor["seconds"] / cli["seconds"],
    }
    print(
        f"{backend} {n:>9,} rows (load {load:.1f}): floor {floor['rows_per_s']:>8,.0f}/s, "
        f"CPU {floor['cpu_s']:.1f} s | "
        f"route {route['rows_per_s']:>8,.0f}/s = {result['route_vs_floor']:.2f}x, server CPU "
        f"{route['cpu_s']:.1f} s, peak RSS {route['peak_rss_mib']:.0f} MiB | cli "
        f"{cli['rows_per_s']:>8,.0f}/s = {result['cli_vs_floor']:.2f}x, CPU {cli['cpu_s']:.1f} s, "
        f"peak RSS {cli['peak_rss_mib']:.0f} MiB; RSS by quarter of the run: route "
        f"{route['rss_by_quarter_mib']}, cli {cli['rss_by_quarter_mib']}",
        file=sys.stderr,
        flush=True,
    )
    return result


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backends", default="sqlite,postgresql")
    parser.add_argument("--rows", default="100000,1000000", help="comma-separated sizes")
    parser.add_argument(
        "--seal-interval",
        type=float,
        default=3600.0,
        help="the route server's EVENHAND_SEAL_INTERVAL_SECONDS (default 3600: no sealing during "
        "the run; the service's default is 5)",
    )
    parser.add_argument("--json", type=Path, help="also write the figures to this file")
    args = parser.parse_args()
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    print(f"machine: {machine}; load average {os.getloadavg()}", file=sys.stderr)
    results = []
    with tempfile.TemporaryDirectory(prefix="evenhand-bulk-") as tmp:
        key = Path(tmp) / "signing.key"
        keygen = [sys.executable, "-m", "service.cli.main", "log", "keygen", "--out", str(key)]
        subprocess.run(keygen, check=True, capture_output=True)
        for backend in args.backends.split(","):
            for n in (int(x) for x in args.rows.split(",")):
                workdir = Path(tmp) / f"{backend}-{n}"
                for label in ("route", "cli", "floor"):
                    (workdir / label).mkdir(parents=True)
                result = run_size(backend.strip(), n, workdir, key, args.seal_interval)
                if result is not None:
                    results.append(result)
    report = {
        "machine": machine,
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
        "bench_process_peak_rss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "results": results,
    }
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
