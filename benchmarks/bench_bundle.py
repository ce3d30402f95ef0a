"""Month bundle: export and standalone verification time for a month of N decisions.

Fills a fresh SQLite file through the service's own write path (the HTTP routes in process:
the policy put live with a shadow version, the decisions in batches, an outcome for every
other decision, a final decision for one in ten), seals and tallies, audits the month through
the route, seals again; then times ``export_month`` writing the bundle, and runs the
standalone verifier in a separate interpreter (``python -I``), reporting its time and its peak
resident memory (``VmHWM`` of that process). Not a test, no asserts.

Run: ``nice -n 10 .venv/bin/python benchmarks/bench_bundle.py -n 10000 -n 100000``
(``--quick``: 2,000 decisions).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from fastapi.testclient import TestClient  # noqa: E402
from pydantic import SecretStr  # noqa: E402

from service.app import create_app  # noqa: E402
from service.audit.month import Month  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store.bundle_export import export_month  # noqa: E402
from service.store.db import begin_read_only, create_db_engine, create_session_factory  # noqa: E402
from service.store.log_upkeep import keep_log  # noqa: E402
from service.store.migrate import upgrade  # noqa: E402
from tests.audit_helpers import POLICY, audit_policy, put_live  # noqa: E402
from tests.helpers import TEST_SECRET, TEST_SIGNING_KEY, bearer, create_key  # noqa: E402
from tests.insert_only import changes_allowed  # noqa: E402
from tests.log_helpers import SIGNER  # noqa: E402

BATCH = 5_000
REGIONS = ("north", "south", "east")

_VERIFY = (
    "import resource, sys, time; sys.path.insert(0, sys.argv.pop(1)); "
    "from service.log.bundle_verify import main; t = time.perf_counter(); "
    "code = main(sys.argv[1:]); elapsed = time.perf_counter() - t; "
    "use = resource.getrusage(resource.RUSAGE_SELF); "
    "hwm = [l.split()[1] for l in open('/proc/self/status') if l.startswith('VmHWM')][0]; "
    "sys.stderr.write(f'{elapsed:.3f} {use.ru_utime + use.ru_stime:.3f} {hwm}\\n'); "
    "sys.exit(code)"
)
"""The verifier in a bare interpreter; prints its time and its peak resident set (VmHWM of
its own process in KiB: ``ru_maxrss`` would include the forking parent's)."""


def _fill(client: TestClient, factory: object, n: int) -> None:
    def key(role: str, name: str | None = None) -> str:
        return create_key(factory, role, name)  # type: ignore[arg-type]

    put_live(client, key, shadow=audit_policy())
    scoring = bearer(key("scoring"))
    for start in range(0, n, BATCH):
        if start and start % (20 * BATCH) == 0:  # the server's periodic sealer keeps up
            keep_log(factory, SIGNER, "UTC")  # type: ignore[arg-type]
        items = [
            {
                "request_id": f"r-{i}",
                "case_id": f"c-{i}",
                "policy": POLICY,
                "score": round((i * 7919 % 10_000) / 10_000, 4),
                "attributes": {"region": REGIONS[i % 3]},
            }
            for i in range(start, min(n, start + BATCH))
        ]
        r = client.post("/v1/recommendations/batch", json={"items": items}, headers=scoring)
        assert r.status_code == 201, r.text
        ids = [item["recommendation_id"] for item in r.json()["items"]]
        now = datetime.now(UTC).isoformat()  # after this batch's decisions were issued
        outcomes = [
            {
                "recommendation_id": rid,
                "outcome": (start + j) // 2 % 2,
                "observed_at": now,
                "source": "records",
            }
            for j, rid in enumerate(ids)
            if j % 2 == 0
        ]
        r = client.post("/v1/outcomes/batch", json={"items": outcomes}, headers=scoring)
        assert r.status_code == 201, r.text
        for j, rid in enumerate(ids):
            if j % 10 == 0:
                r = client.post(
                    f"/v1/recommendations/{rid}/final",
                    json={
                        "decision": "followed" if j % 20 else "overridden",
                        "decided_at": now,
                        **({} if j % 20 else {"reason_code": "declined"}),
                    },
                    headers=scoring,
                )
                assert r.status_code == 201, r.text
    keep_log(factory, SIGNER, "UTC", tally_now=True)  # type: ignore[arg-type]
    month = datetime.now(UTC).strftime("%Y-%m")
    r = client.post(
        "/v1/audits",
        json={"policy": POLICY, "month": month, "provisional": True},
        headers=bearer(key("audit")),
    )
    assert r.status_code == 201, r.text
    keep_log(factory, SIGNER, "UTC", tally_now=True)  # type: ignore[arg-type]


def bench(n: int, workdir: Path) -> dict[str, object]:
    url = f"sqlite:///{workdir / f'bundle-{n}.db'}"
    with changes_allowed():  # the suite's insert-only listener lets migrations rewrite
        upgrade(url)
    settings = Settings(
        database_url=url,
        draw_secret=TEST_SECRET,  # type: ignore[arg-type]
        signing_key=SecretStr(TEST_SIGNING_KEY),
        seal_interval_seconds=3600,
    )
    engine = create_db_engine(settings)
    factory = create_session_factory(engine)
    t = time.perf_counter()
    with TestClient(create_app(settings)) as client:
        _fill(client, factory, n)
    filled = time.perf_counter() - t
    target = workdir / f"bundle-{n}.ehb"
    t, cpu = time.perf_counter(), time.process_time()
    with factory() as session, target.open("wb") as out:
        begin_read_only(session)
        summary = export_month(
            session, POLICY, Month.parse(datetime.now(UTC).strftime("%Y-%m")), out
        )
        session.rollback()
    exported, export_cpu = time.perf_counter() - t, time.process_time() - cpu
    engine.dispose()
    run = subprocess.run(
        [sys.executable, "-I", "-c", _VERIFY, str(ROOT), str(target)],
        capture_output=True,
        text=True,
        env={"PATH": "/usr/bin:/bin"},
    )
    seconds, cpu_seconds, rss_kib = run.stderr.strip().splitlines()[-1].split()
    result = {
        "decisions": n,
        "fill_s": round(filled, 1),
        "records": summary.records,
        "bundle_mb": round(target.stat().st_size / 1e6, 1),
        "export_s": round(exported, 2),
        "export_cpu_s": round(export_cpu, 2),
        "verify_s": float(seconds),
        "verify_cpu_s": float(cpu_seconds),
        "verify_exit": run.returncode,
        "verify_peak_rss_mb": round(int(rss_kib) / 1024, 1),
    }
    print(json.dumps(result), f"load average {os.getloadavg()[0]:.1f}", flush=True)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-n", type=int, action="append", help="decisions (repeatable)")
    parser.add_argument("--quick", action="store_true", help="2,000 decisions only")
    args = parser.parse_args()
    sizes = [2_000] if args.quick else (args.n or [10_000, 100_000])
    print(
        f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}, "
        f"python {sys.version.split()[0]}",
        flush=True,
    )
    with tempfile.TemporaryDirectory(prefix="evenhand-bench-bundle-") as tmp:
        for n in sizes:
            bench(n, Path(tmp))


if __name__ == "__main__":
    main()
