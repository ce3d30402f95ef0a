"""Start-up of the CLI: import time of the audit command and wall time of a few invocations.

Each figure is the minimum over ``--repeats`` fresh processes, with the 1-minute load average
read before each run beside it:

- the imports of an audit run (the command's module, the job, the settings, the database
  module), timed inside a fresh process, and the wall time of ``python -c "import
  service.cli.audit"``;
- ``evenhand --help`` and ``evenhand audit run --help``;
- ``evenhand audit run`` of a month in ``--database`` (as ``benchmarks/bench_audit.py`` runs
  it: ``python -m service.cli.main`` in a fresh process), with the job's own time (``done
  in``); each run stores a new snapshot.

``--root`` runs another checkout of the tree (its directory comes first on ``PYTHONPATH``), to
measure before and after a change with the same interpreter and libraries:

    nice -n 10 .venv/bin/python benchmarks/log_load.py sqlite:////tmp/month.db --decisions 20000
    .venv/bin/python benchmarks/bench_startup.py --database sqlite:////tmp/month.db
    git archive BASE | tar -x -C /tmp/base
    .venv/bin/python benchmarks/bench_startup.py --database sqlite:////tmp/month.db --root /tmp/base
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

import log_load  # noqa: E402


def _env(root: Path, database: str | None) -> dict[str, str]:
    env = {**os.environ, "PYTHONPATH": str(root), "EVENHAND_TIMEZONE": "UTC"}
    env.pop("EVENHAND_PROGRESS", None)
    if database:
        env["EVENHAND_DATABASE_URL"] = database
    return env


def _timed(argv: list[str], root: Path, database: str | None) -> tuple[float, float, str]:
    """Wall seconds, load average before, and stderr of one run (its CPU seconds appended
    as the last line ``cpu S``)."""
    load = os.getloadavg()[0]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    out = subprocess.run(
        argv, capture_output=True, text=True, cwd=root, env=_env(root, database), check=True
    )
    wall = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, load, f"{out.stderr}\ncpu {cpu}"


def _cpu(text: str) -> float:
    return float(text.splitlines()[-1].removeprefix("cpu ")) if text else 0.0


def _best(runs: list[tuple[float, float, str]]) -> dict[str, Any]:
    best = min(runs, key=lambda r: r[0])
    return {
        "best_s": round(best[0], 3),
        "cpu_best_s": round(min(_cpu(r[2]) for r in runs), 3),
        "runs_s": [round(r[0], 3) for r in runs],
        "load": [round(r[1], 2) for r in runs],
    }


RUN_IMPORTS = (
    "service.cli.audit",
    "service.audit.job",
    "service.settings",
    "service.store.db",
)
"""What ``evenhand audit run`` imports before it counts (the command defers the last three)."""

_TIME_IMPORTS = (
    "import importlib, sys, time\n"
    "started, cpu = time.perf_counter(), time.process_time()\n"
    "for name in sys.argv[1:]:\n"
    "    importlib.import_module(name)\n"
    "print(time.perf_counter() - started, time.process_time() - cpu)\n"
)


def run_imports(root: Path) -> tuple[float, float, str]:
    """Seconds to import what an audit run imports, timed inside a fresh process."""
    load = os.getloadavg()[0]
    out = subprocess.run(
        [sys.executable, "-c", _TIME_IMPORTS, *RUN_IMPORTS],
        capture_output=True,
        text=True,
        cwd=root,
        env=_env(root, None),
        check=True,
    )
    wall, cpu = (float(x) for x in out.stdout.split())
    return wall, load, str(cpu)


def cryptography_loaded(root: Path) -> bool:
    code = "import sys, service.audit.job; print('cryptography' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        cwd=root,
        env=_env(root, None),
        check=True,
    )
    return out.stdout.strip() == "True"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--database", help="URL of a month loaded by log_load.py")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--root", type=Path, default=ROOT, help="the tree to measure")
    args = parser.parse_args()
    root: Path = args.root.resolve()
    py = sys.executable
    results: dict[str, Any] = {"root": str(root)}

    results["imports of an audit run (in process)"] = _best(
        [run_imports(root) for _ in range(args.repeats)]
    )
    results["cryptography loaded by the audit job"] = cryptography_loaded(root)
    commands = {
        "import service.cli.audit": [py, "-c", "import service.cli.audit"],
        "evenhand --help": [py, "-m", "service.cli.main", "--help"],
        "evenhand audit run --help": [py, "-m", "service.cli.main", "audit", "run", "--help"],
    }
    for name, argv in commands.items():
        results[name] = _best([_timed(argv, root, None) for _ in range(args.repeats)])
    if args.database:
        argv = [py, "-m", "service.cli.main", "audit", "run"]
        argv += ["--policy", log_load.POLICY, "--month", log_load.MONTH]
        runs = [_timed(argv, root, args.database) for _ in range(args.repeats)]
        entry = _best(runs)
        jobs = [re.search(r"done in ([0-9.]+) s", err) for _, _, err in runs]
        entry["job_s"] = [float(j.group(1)) if j else None for j in jobs]
        results["evenhand audit run"] = entry
    print(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
