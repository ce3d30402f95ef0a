"""Progress of long CLI work as tqdm bars on stderr, shown only when stderr is a terminal.

Off a terminal (a cron job, a pipe, a CI log) the bars print nothing: the command's result
lines and warnings are all that is written. ``EVENHAND_PROGRESS=1`` forces the bars on,
``EVENHAND_PROGRESS=0`` off. tqdm is imported only when a bar is drawn, so it is never on the
import path of a command (``tests/test_cli_start.py``).

Two shapes of callback are served: ``(done, total)`` counts (the bootstrap of ``evenhand
derive``) and one message per step (sealing, verifying and exporting the log, whose store
functions report what they just did): the bar counts the steps and shows the latest message.
"""

from __future__ import annotations

import os
import sys
from types import TracebackType
from typing import Any, Self

ENV = "EVENHAND_PROGRESS"


def bars_enabled() -> bool:
    """Whether to draw bars: forced by ``EVENHAND_PROGRESS``, else only on a terminal."""
    forced = os.environ.get(ENV, "").strip().lower()
    if forced in {"1", "true", "yes", "on"}:
        return True
    if forced in {"0", "false", "no", "off"}:
        return False
    return sys.stderr.isatty()


class _Bar:
    def __init__(self, description: str) -> None:
        self.description = description
        self.enabled = bars_enabled()
        self._bar: Any = None

    def _open(self, **options: Any) -> Any:
        if self._bar is None:
            from tqdm import tqdm

            self._bar = tqdm(desc=self.description, file=sys.stderr, leave=True, **options)
        return self._bar

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        kind: type[BaseException] | None,
        error: BaseException | None,
        trace: TracebackType | None,
    ) -> None:
        self.close()


class CountBar(_Bar):
    """A ``progress(done, total)`` callback drawing a bar of ``total`` units."""

    def __init__(self, description: str, unit: str = "it") -> None:
        super().__init__(description)
        self.unit = unit

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        bar = self._open(total=total, unit=self.unit)
        bar.update(done - bar.n)


class StepBar(_Bar):
    """A ``progress(message)`` callback: a bar counting the steps, the latest message beside."""

    def __call__(self, message: str) -> None:
        if not self.enabled:
            return
        bar = self._open(
            total=None, unit="step", bar_format="{desc}: {n_fmt} step(s) [{elapsed}]{postfix}"
        )
        bar.set_postfix_str(message, refresh=False)
        bar.update(1)
