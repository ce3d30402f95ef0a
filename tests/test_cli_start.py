"""The CLI starts light: ``evenhand --help`` loads none of the heavy libraries, the help line of
each command in the lazy table is the one its module registers, and the commands that neither
derive nor draw (keys, policy, log, migrate, schema, report list/show/history, jobs, the audit
command's help) never load scipy, matplotlib or numpy, neither for ``--help`` nor for a cheap
real run, and tqdm stays unloaded when stderr is not a terminal (docs/operations.md, "What
each command loads")."""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from service.cli.main import COMMANDS, build_parser

HEAVY = ("scipy", "numpy", "matplotlib", "sqlalchemy", "fastapi", "pydantic", "jinja2")


def _help_lines(parser: argparse.ArgumentParser) -> dict[str, str]:
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {choice.dest: str(choice.help) for choice in action._choices_actions}


def test_the_lazy_table_says_what_the_modules_register() -> None:
    assert _help_lines(build_parser()) == {name: h for name, (_m, h) in COMMANDS.items()}
    assert _help_lines(build_parser(["log", "seal"])) == _help_lines(build_parser())


def test_help_loads_no_heavy_library() -> None:
    code = (
        "import sys\n"
        "from service.cli.main import main\n"
        "try:\n"
        "    main(['--help'])\n"
        "except SystemExit:\n"
        "    pass\n"
        f"print(sorted(m for m in {HEAVY!r} if m in sys.modules))\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout
    assert out.strip().splitlines()[-1] == "[]"


STATS_AND_DRAWING = ("scipy", "matplotlib", "numpy", "tqdm")

_LOADED = (
    "import json, sys\n"
    "from service.cli.main import main\n"
    "try:\n"
    "    code = main(sys.argv[1:])\n"
    "except SystemExit as exc:\n"
    "    code = exc.code\n"
    "loaded = sorted({m.split('.')[0] for m in sys.modules} & set(sys.argv[0].split(',')))\n"
    "print('LOADED ' + json.dumps({'code': code, 'loaded': loaded}))\n"
)


def _loaded_by(argv: list[str], env: dict[str, str] | None = None) -> tuple[object, list[str]]:
    """Run ``evenhand ARGV`` in a fresh interpreter: its exit code and which of the statistics
    and drawing libraries it loaded."""
    out = subprocess.run(
        [
            sys.executable,
            "-c",
            _LOADED.replace("sys.argv[0]", repr(",".join(STATS_AND_DRAWING))),
            *argv,
        ],
        capture_output=True,
        text=True,
        env={**os.environ, **(env or {})},
        check=False,
    )
    line = next((x for x in out.stdout.splitlines() if x.startswith("LOADED ")), None)
    assert line is not None, out.stderr
    result = json.loads(line.removeprefix("LOADED "))
    return result["code"], result["loaded"]


LIGHT_HELP = [
    ["keys", "--help"],
    ["policy", "--help"],
    ["log", "--help"],
    ["log", "seal", "--help"],
    ["log", "verify", "--help"],
    ["log", "keygen", "--help"],
    ["log", "purge", "--help"],
    ["log", "bundle", "--help"],
    ["migrate", "--help"],
    ["schema", "--help"],
    ["report", "list", "--help"],
    ["report", "show", "--help"],
    ["jobs", "--help"],
    ["audit", "run", "--help"],
]


@pytest.mark.parametrize("argv", LIGHT_HELP, ids=" ".join)
def test_light_commands_help_loads_no_statistics(argv: list[str]) -> None:
    code, loaded = _loaded_by(argv)
    assert code == 0
    assert loaded == []


def test_light_commands_run_without_statistics(database_url: str, tmp_path: Path) -> None:
    """Cheap real runs on a migrated database (SQLite and PostgreSQL)."""
    env = {"EVENHAND_DATABASE_URL": database_url}
    runs = [
        ["keys", "list"],
        ["log", "verify"],
        ["log", "seal"],
        ["log", "keygen", "--out", str(tmp_path / "signing.key")],
        ["migrate"],
        ["schema"],
        ["report", "list", "--policy", "no-such-policy"],
    ]
    for argv in runs:
        code, loaded = _loaded_by(argv, env)
        assert code == 0, argv
        assert loaded == [], argv


def test_the_audit_commands_default_is_the_audits() -> None:
    from service.audit.verdicts import DEFAULT_MIN_COUNT
    from service.cli.audit import DEFAULT_MIN_COUNT as CLI_DEFAULT

    assert CLI_DEFAULT == DEFAULT_MIN_COUNT
