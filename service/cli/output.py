"""Writing command output all or nothing: temporary files first, renamed at the very end."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

from service.cli.common import CliError


def check_targets(paths: list[Path]) -> None:
    """Refuse before any work when an output cannot be written where it was asked."""
    seen: set[Path] = set()
    for path in paths:
        resolved = path.resolve()
        if resolved in seen:
            raise CliError(f"{path}: named twice as an output")
        seen.add(resolved)
        if not resolved.parent.is_dir():
            raise CliError(f"{path}: directory {path.parent} does not exist")
        if resolved.is_dir():
            raise CliError(f"{path}: is a directory")


def write_all(outputs: dict[Path, bytes]) -> None:
    """Write every output to a temporary file beside it, then rename them all into place."""
    staged: list[tuple[str, Path]] = []
    mode = 0o666 & ~_umask()  # mkstemp makes 0600 files; outputs get the usual mode
    try:
        for path, data in outputs.items():
            fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
            staged.append((tmp, path))
            with os.fdopen(fd, "wb") as f:
                f.write(data)
            os.chmod(tmp, mode)
        for tmp, path in staged:
            os.replace(tmp, path)
    except OSError as exc:
        for tmp, _ in staged:
            if os.path.exists(tmp):
                os.unlink(tmp)
        raise CliError(f"cannot write output: {exc}") from exc


def _umask() -> int:
    current = os.umask(0)
    os.umask(current)
    return current
