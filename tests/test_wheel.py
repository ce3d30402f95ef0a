"""The built wheel works on its own: installed into a fresh virtual environment, run from a
folder outside the checkout, ``evenhand migrate`` brings a new SQLite file (and a new
PostgreSQL database) to the latest revision and one case is scored through ``evenhand serve``;
``evenhand demo`` runs from the wheel as well.

No download: the wheel is built without build isolation (setuptools and wheel come from the
test extras), installed with ``--no-deps``, and the fresh environment sees the dependencies
through a ``.pth`` line naming this environment's site-packages (a ``.pth`` file in a folder
named by a ``.pth`` line is not run, so this checkout's editable install stays invisible;
the test asserts the package is imported from the wheel).
"""

from __future__ import annotations

import os
import shutil
import site
import subprocess
import sys
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, inspect, make_url, text

from service.store.migrate import head_revisions

ROOT = Path(__file__).resolve().parents[1]
pytestmark = pytest.mark.slow
PIP_WHEEL = [sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--no-build-isolation"]

# Run inside the fresh environment: the demo's own stages on the given database (keys, a
# server child, the policy published with four eyes), then one recommendation over HTTP.
SCORE_ONE = """
import sys
from pathlib import Path
from service.demo import story
from service.demo.context import DemoContext

ctx = DemoContext(output_dir=Path(sys.argv[1]), cases=10)
story.prepare_output(ctx)
if len(sys.argv) > 2:
    ctx.database_url = sys.argv[2]
try:
    for stage in (story.create_keys, story.start_server, story.publish_policy):
        stage(ctx)
    with ctx.client() as api:
        answer = api.recommend(ctx.tokens["scoring"], {
            "request_id": "wheel-1", "case_id": "W-1", "policy": ctx.policy_name,
            "score": 0.42, "attributes": {"community": "millbrook", "language": "en"},
        })
    print(answer["action"], answer["version"])
finally:
    story.stop_server(ctx)
"""


@pytest.fixture(scope="module")
def fresh_env(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A virtual environment holding only the wheel (its dependencies seen via a .pth)."""
    base = tmp_path_factory.mktemp("wheel")
    # Build from a copy of what the wheel is made of: setuptools' build/ folder in the
    # checkout could otherwise carry files that no longer exist.
    source = base / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        shutil.copy2(ROOT / name, source / name)
    shutil.copytree(
        ROOT / "service", source / "service", ignore=shutil.ignore_patterns("__pycache__")
    )
    dist = base / "dist"
    subprocess.run(
        [*PIP_WHEEL, "--wheel-dir", str(dist), str(source)],
        check=True,
        capture_output=True,
        cwd=base,
    )
    (wheel,) = dist.glob("evenhand-*.whl")
    venv = base / "venv"
    subprocess.run(
        [getattr(sys, "_base_executable", sys.executable), "-m", "venv", "--without-pip", venv],
        check=True,
    )
    python = venv / "bin" / "python"
    fresh_site = subprocess.run(
        [python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.strip()
    (Path(fresh_site) / "_evenhand_test_deps.pth").write_text(
        "\n".join(site.getsitepackages()) + "\n"
    )
    subprocess.run(
        [python, "-m", "pip", "install", "--quiet", "--no-deps", "--no-index", str(wheel)],
        check=True,
        capture_output=True,
        cwd=base,
    )
    yield venv


def _run(venv: Path, args: list[str], cwd: Path, **env: str) -> subprocess.CompletedProcess[str]:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("EVENHAND_")}
    clean.pop("PYTHONPATH", None)
    clean["PATH"] = f"{venv / 'bin'}{os.pathsep}{clean.get('PATH', '')}"
    done = subprocess.run(
        args, cwd=cwd, env={**clean, **env}, capture_output=True, text=True, timeout=180
    )
    assert done.returncode == 0, done.stdout + done.stderr
    return done


def test_package_is_imported_from_the_wheel(fresh_env: Path, tmp_path: Path) -> None:
    python = str(fresh_env / "bin" / "python")
    code = (
        "import service, service.resources as r; print(service.__file__); "
        "print(r.migrations_dir()); print(r.policies_dir())"
    )
    lines = _run(fresh_env, [python, "-c", code], tmp_path).stdout.split()
    assert all(line.startswith(str(fresh_env)) for line in lines), lines
    assert not any(line.startswith(str(ROOT)) for line in lines)
    policies = fresh_env / Path(lines[2]).relative_to(fresh_env)
    assert (policies / "schema.json").is_file()
    assert (policies / "fernhollow-follow-up.json").is_file()


def _migrate_and_score(fresh_env: Path, workdir: Path, url: str) -> None:
    migrated = _run(fresh_env, ["evenhand", "migrate"], workdir, EVENHAND_DATABASE_URL=url)
    assert "database is up to date" in migrated.stderr
    engine = create_engine(url)
    try:
        tables = set(inspect(engine).get_table_names())
        with engine.connect() as conn:
            revision = conn.execute(text("SELECT version_num FROM alembic_version")).scalar()
    finally:
        engine.dispose()
    assert {"policy_versions", "recommendations", "alembic_version"} <= tables
    assert {revision} == head_revisions(url)  # the checkout's head: the wheel ships them all
    python = str(fresh_env / "bin" / "python")
    scored = _run(fresh_env, [python, "-c", SCORE_ONE, str(workdir / "out"), url], workdir)
    action, version = scored.stdout.split()
    assert action in {"True", "False"} and version == "1", scored.stdout


def test_wheel_migrates_sqlite_and_scores(fresh_env: Path, tmp_path: Path) -> None:
    _migrate_and_score(fresh_env, tmp_path, f"sqlite:///{tmp_path / 'fresh.db'}")


@pytest.mark.postgres
def test_wheel_migrates_new_postgres_database_and_scores(fresh_env: Path, tmp_path: Path) -> None:
    base_url = os.environ.get("EVENHAND_TEST_POSTGRES_URL")
    if not base_url:
        pytest.skip("EVENHAND_TEST_POSTGRES_URL is not set")
    name = f"evenhand_wheel_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        url = make_url(base_url).set(database=name).render_as_string(hide_password=False)
        _migrate_and_score(fresh_env, tmp_path, url)
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def test_demo_runs_from_the_wheel(fresh_env: Path, tmp_path: Path) -> None:
    done = _run(fresh_env, ["evenhand", "demo", "--cases", "60", "--output", "out"], tmp_path)
    assert (tmp_path / "out" / "evenhand.db").is_file()
    assert "v1 is active" in done.stderr
