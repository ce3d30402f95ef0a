"""A small closed-loop HTTP/1.1 load generator on asyncio streams (loopback only).

``concurrency`` connections are kept alive; each sends its next request as soon as the last
answer arrived, so the server, not the client, should be the bottleneck (a general-purpose
client library costs more CPU per request than the endpoints measured here). Bounded: exactly
``len(bodies)`` requests are sent, each with a timeout.
"""

from __future__ import annotations

import asyncio
import json
import math
import time
from dataclasses import dataclass
from typing import Any

LOOPBACK = "127.0.0.1"


@dataclass(frozen=True)
class LoadResult:
    requests: int
    seconds: float
    latencies: list[float]
    statuses: dict[int, int]

    @property
    def throughput(self) -> float:
        return self.requests / self.seconds

    def percentile(self, q: float) -> float:
        """Nearest-rank percentile of the latencies, in seconds."""
        ordered = sorted(self.latencies)
        return ordered[min(len(ordered) - 1, max(0, math.ceil(q * len(ordered)) - 1))]


def _request_bytes(path: str, port: int, token: str | None, body: dict[str, Any]) -> bytes:
    payload = json.dumps(body, separators=(",", ":")).encode()
    head = [
        f"POST {path} HTTP/1.1",
        f"Host: {LOOPBACK}:{port}",
        "Content-Type: application/json",
        f"Content-Length: {len(payload)}",
    ]
    if token is not None:
        head.append(f"Authorization: Bearer {token}")
    return ("\r\n".join(head) + "\r\n\r\n").encode() + payload


async def _read_response(reader: asyncio.StreamReader) -> int:
    status_line = await reader.readline()
    if not status_line:
        raise ConnectionError("server closed the connection")
    status = int(status_line.split()[1])
    length = 0
    while True:
        line = await reader.readline()
        if line in (b"\r\n", b""):
            break
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value)
    if length:
        await reader.readexactly(length)
    return status


async def _run(
    port: int,
    path: str,
    token: str | None,
    bodies: list[dict[str, Any]],
    concurrency: int,
    timeout: float,
) -> LoadResult:
    requests = [_request_bytes(path, port, token, b) for b in bodies]
    latencies: list[float] = [0.0] * len(requests)
    statuses: dict[int, int] = {}
    next_index = 0

    async def connection() -> None:
        nonlocal next_index
        reader, writer = await asyncio.open_connection(LOOPBACK, port)
        try:
            while next_index < len(requests):
                i = next_index
                next_index += 1
                start = time.perf_counter()
                writer.write(requests[i])
                await writer.drain()
                status = await asyncio.wait_for(_read_response(reader), timeout)
                latencies[i] = time.perf_counter() - start
                statuses[status] = statuses.get(status, 0) + 1
        finally:
            writer.close()

    start = time.perf_counter()
    await asyncio.gather(*(connection() for _ in range(concurrency)))
    return LoadResult(len(requests), time.perf_counter() - start, latencies, statuses)


def run_load(
    port: int,
    path: str,
    token: str | None,
    bodies: list[dict[str, Any]],
    concurrency: int = 16,
    timeout: float = 30.0,
) -> LoadResult:
    """POST every body once over ``concurrency`` keep-alive connections to 127.0.0.1."""
    return asyncio.run(_run(port, path, token, bodies, concurrency, timeout))
