"""The container files without a container engine (none runs on the machines this is tested
on): the entrypoint script is run with ``sh`` (with a stub ``evenhand`` that records its
calls, and once with the real one against a temporary SQLite file), the compose file and the
Dockerfile are parsed and their cross-references checked. Building the image and running
compose are not tested here (docs/operations.md, "Containers")."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx
import pytest
import yaml
from sqlalchemy import create_engine, text

from service.store.migrate import head_revisions
from tests.helpers import TEST_SECRET, TEST_SIGNING_KEY

ROOT = Path(__file__).resolve().parents[1]
DOCKER = ROOT / "docker"
ENTRYPOINT = DOCKER / "entrypoint.sh"

STUB = """#!/bin/sh
echo "$*" >> "$STUB_CALLS"
if [ "$1" = migrate ] && [ -n "${STUB_MIGRATE_FAILS:-}" ]; then exit 3; fi
exit 0
"""


def _stub_env(tmp_path: Path, **extra: str) -> dict[str, str]:
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir(exist_ok=True)
    stub = bin_dir / "evenhand"
    stub.write_text(STUB)
    stub.chmod(0o755)
    env = {k: v for k, v in os.environ.items() if not k.startswith("EVENHAND_")}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    env.update(PATH=f"{bin_dir}{os.pathsep}{env['PATH']}", STUB_CALLS=str(tmp_path / "calls"))
    env.update(extra)
    return env


def _entrypoint(env: dict[str, str], *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["sh", str(ENTRYPOINT), *args], env=env, capture_output=True, text=True, timeout=60
    )


def _calls(tmp_path: Path) -> list[str]:
    path = tmp_path / "calls"
    return path.read_text().splitlines() if path.exists() else []


def test_serve_migrates_first_then_starts_the_api(tmp_path: Path) -> None:
    metrics = tmp_path / "metrics"
    metrics.mkdir()
    (metrics / "histogram_123.db").write_bytes(b"old")
    (metrics / "keep.txt").write_text("not ours")
    env = _stub_env(tmp_path, PROMETHEUS_MULTIPROC_DIR=str(metrics))
    done = _entrypoint(env, "serve", "--workers", "4")
    assert done.returncode == 0, done.stderr
    assert _calls(tmp_path) == ["migrate", "serve --workers 4"]
    assert not (metrics / "histogram_123.db").exists()  # last run's worker files are gone
    assert (metrics / "keep.txt").exists()


def test_no_arguments_means_serve(tmp_path: Path) -> None:
    assert _entrypoint(_stub_env(tmp_path)).returncode == 0
    assert _calls(tmp_path) == ["migrate", "serve"]


def test_failed_migration_stops_before_serving(tmp_path: Path) -> None:
    done = _entrypoint(_stub_env(tmp_path, STUB_MIGRATE_FAILS="1"), "serve")
    assert done.returncode == 3
    assert _calls(tmp_path) == ["migrate"]


def test_migration_can_be_turned_off(tmp_path: Path) -> None:
    done = _entrypoint(_stub_env(tmp_path, EVENHAND_MIGRATE_ON_START="false"), "serve")
    assert done.returncode == 0
    assert _calls(tmp_path) == ["serve"]


def test_other_commands_pass_through_without_start_steps(tmp_path: Path) -> None:
    env = _stub_env(tmp_path)
    assert _entrypoint(env, "jobs", "run", "--seal-every", "60").returncode == 0
    assert _entrypoint(env, "log", "seal").returncode == 0
    assert _calls(tmp_path) == ["jobs run --seal-every 60", "log seal"]
    done = _entrypoint(env, "sh", "-c", "echo plain; exit 7")
    assert done.returncode == 7 and done.stdout == "plain\n"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


@pytest.mark.slow
def test_entrypoint_with_the_real_command_migrates_and_serves(tmp_path: Path) -> None:
    evenhand = shutil.which("evenhand", path=str(Path(sys.executable).parent))
    assert evenhand is not None
    url = f"sqlite:///{tmp_path / 'fresh.db'}"
    port = _free_port()
    key = tmp_path / "signing.key"
    key.write_text(TEST_SIGNING_KEY + "\n")
    env = {k: v for k, v in os.environ.items() if not k.startswith("EVENHAND_")}
    env.update(
        PATH=f"{Path(evenhand).parent}{os.pathsep}{env['PATH']}",
        EVENHAND_DATABASE_URL=url,
        EVENHAND_DRAW_SECRET=TEST_SECRET,
        EVENHAND_SIGNING_KEY_FILE=str(key),
        EVENHAND_HOST="127.0.0.1",
        EVENHAND_PORT=str(port),
        PROMETHEUS_MULTIPROC_DIR=str(tmp_path / "metrics"),
        EVENHAND_METRICS_ACCESS="open",
    )
    proc = subprocess.Popen(
        ["sh", str(ENTRYPOINT), "serve", "--workers", "2"],
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    try:
        deadline = time.monotonic() + 60
        ready = None
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                ready = httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=2)
                if ready.status_code == 200:
                    break
            except httpx.TransportError:
                pass
            time.sleep(0.3)
        assert ready is not None and ready.status_code == 200, proc.poll()
        assert ready.headers["x-request-id"]
        engine = create_engine(url)
        with engine.connect() as conn:
            revision = conn.execute(text("SELECT version_num FROM alembic_version")).scalar()
        engine.dispose()
        assert {revision} == head_revisions(url)
        # Two workers write the metric files of the multi-process mode; a scrape sums them.
        assert any((tmp_path / "metrics").glob("*.db"))
        scraped = httpx.get(f"http://127.0.0.1:{port}/metrics", timeout=10)
        assert scraped.status_code == 200
        assert 'evenhand_http_request_duration_seconds_count{method="GET",' in scraped.text
        assert "evenhand_db_pool_size" in scraped.text
        healthcheck = subprocess.run(
            [sys.executable, str(DOCKER / "healthcheck.py")], env=env, timeout=30
        )
        assert healthcheck.returncode == 0
    finally:
        os.killpg(proc.pid, signal.SIGTERM)
        output = proc.communicate(timeout=30)[0].decode()
    assert "evenhand-entrypoint: migrating the database" in output
    assert "database is up to date" in output
    assert proc.returncode == 0, output


def test_healthcheck_fails_when_nothing_listens() -> None:
    env = {**os.environ, "EVENHAND_PORT": str(_free_port())}
    done = subprocess.run([sys.executable, str(DOCKER / "healthcheck.py")], env=env, timeout=30)
    assert done.returncode == 1


def _compose() -> dict[str, Any]:
    data = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    assert isinstance(data, dict)
    return data


def test_compose_services_and_references() -> None:
    compose = _compose()
    services: dict[str, Any] = compose["services"]
    assert set(services) == {"db", "api", "jobs"}
    for name, service in services.items():
        for needed, condition in (service.get("depends_on") or {}).items():
            assert needed in services, f"{name} depends on unknown {needed}"
            assert condition["condition"] in {"service_healthy", "service_started"}
            if condition["condition"] == "service_healthy":
                check = services[needed].get("healthcheck", {})
                assert check.get("test") and not check.get("disable"), needed
        for secret in service.get("secrets", []):
            assert secret in compose["secrets"]
        for volume in service.get("volumes", []):
            assert volume.split(":")[0] in compose["volumes"]
    api, jobs = services["api"], services["jobs"]
    # The API: built from this repository's Dockerfile, several workers, migrations at start.
    assert (ROOT / "docker" / api["build"]["context"] / api["build"]["dockerfile"]).resolve() == (
        DOCKER / "Dockerfile"
    )
    assert api["command"][0] == "serve"
    workers = int(api["command"][api["command"].index("--workers") + 1])
    assert workers >= 2
    assert "EVENHAND_MIGRATE_ON_START" not in api["environment"]
    # The job runner: same image, seals and audits, waits for a healthy API (migrated).
    assert jobs["image"] == api["image"]
    assert jobs["command"][:2] == ["jobs", "run"]
    assert jobs["depends_on"]["api"]["condition"] == "service_healthy"
    assert jobs["environment"] == api["environment"]  # the YAML anchor: one set of settings
    url = api["environment"]["EVENHAND_DATABASE_URL"]
    assert url.startswith("postgresql+psycopg://") and "@db:5432/" in url
    assert services["db"]["image"].startswith("postgres:")
    # The job runner's command is one the CLI accepts.
    from service.cli.main import build_parser

    args = build_parser(jobs["command"]).parse_args(jobs["command"])
    assert args.seal_every > 0 and args.audit_every > 0
    args = build_parser(api["command"]).parse_args(api["command"])
    assert args.workers == workers


def test_dockerfile_stages_user_healthcheck_and_entrypoint() -> None:
    lines = [
        line.strip()
        for line in (DOCKER / "Dockerfile").read_text().splitlines()
        if line.strip() and not line.lstrip().startswith("#")
    ]
    stages = [line.split()[-1] for line in lines if line.startswith("FROM ")]
    assert stages == ["build", "install", "runtime"]
    runtime = lines[max(i for i, line in enumerate(lines) if line.startswith("FROM ")) :]
    users = [line.split()[1] for line in runtime if line.startswith("USER ")]
    assert users and not users[-1].startswith(("root", "0"))
    assert any(line.startswith("HEALTHCHECK ") for line in runtime)
    assert any("evenhand-entrypoint" in line for line in runtime if line.startswith("ENTRYPOINT"))
    assert 'CMD ["serve"]' in runtime
    # The wheel, not the source tree, reaches the runtime; every COPY source exists.
    for line in lines:
        if line.startswith("COPY ") and "--from=" not in line:
            for source in line.split()[1:-1]:
                assert (ROOT / source).exists(), source
    assert not any(line.startswith("COPY service") for line in runtime)
    assert any("pip wheel" in line for line in lines)
