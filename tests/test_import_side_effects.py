"""Importing any module of the service does no work: no matplotlib backend or pyplot state,
no logging configuration, no change to the environment (rule in DEVELOPERS.md)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# Imports every module of ``service`` (Alembic's env.py runs migrations by design: skipped),
# then reports what importing changed.
PROBE = """
import importlib, json, logging, os, pkgutil, sys
before_env = dict(os.environ)
before_handlers = list(logging.getLogger().handlers)
import service
names = [
    m.name
    for m in pkgutil.walk_packages(service.__path__, "service.")
    if not m.name.startswith("service.migrations")
]
for name in names:
    importlib.import_module(name)
print(json.dumps({
    "modules": len(names),
    "pyplot": "matplotlib.pyplot" in sys.modules,
    "root_handlers_added": len(logging.getLogger().handlers) - len(before_handlers),
    "root_level": logging.getLogger().level,
    "environ_changed": sorted(set(os.environ.items()) ^ set(before_env.items())),
}))
"""


def test_importing_the_service_does_no_work() -> None:
    out = subprocess.run(
        [sys.executable, "-c", PROBE],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
        timeout=300,
    )
    found = json.loads(out.stdout.strip().splitlines()[-1])
    assert found["modules"] > 100
    assert found["pyplot"] is False
    assert found["root_handlers_added"] == 0
    assert found["root_level"] == 30  # logging.WARNING, the standard library's default
    assert found["environ_changed"] == []
