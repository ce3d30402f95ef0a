"""The CLI starts light: ``evenhand --help`` loads none of the heavy libraries, and the help
line of each command in the lazy table is the one its module registers."""

from __future__ import annotations

import argparse
import subprocess
import sys

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
