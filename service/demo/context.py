"""The demo's shared state: the context every stage reads and extends, and its error."""

from __future__ import annotations

import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.demo.api_client import EvenhandClient
from service.demo.fernhollow import DEFAULT_SEED, Discharges
from service.demo.server import ServerProcess

MARKER = ".evenhand-demo"
CLIENT_THREADS = 4


class DemoError(RuntimeError):
    """The demo cannot go on; the message says why."""


@dataclass
class SentCase:
    """One discharge sent for a recommendation, with what came back."""

    index: int  # row in ``ctx.discharges``
    case_id: str
    recommendation_id: str
    version: int
    action: bool
    phase: str


@dataclass
class DemoContext:
    output_dir: Path
    cases: int = 2000
    seed: int = DEFAULT_SEED
    database_url: str = ""
    draw_secret: str = ""
    signing_key_file: Path | None = None
    tokens: dict[str, str] = field(default_factory=dict)  # author, reviewer, scoring, audit
    server: ServerProcess | None = None
    base_url: str = ""
    policy_name: str = ""
    versions: dict[str, int] = field(default_factory=dict)  # "reviewed", "group-blind"
    discharges: Discharges | None = None
    sent: list[SentCase] = field(default_factory=list)
    verify: dict[str, Any] = field(default_factory=dict)
    summary: list[str] = field(default_factory=list)  # lines for the closing summary

    def say(self, message: str) -> None:
        print(message, file=sys.stderr, flush=True)

    def client(self) -> EvenhandClient:
        return EvenhandClient(self.base_url)


Stage = Callable[[DemoContext], None]
