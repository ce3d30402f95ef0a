"""Invariants of a policy's history, checked by replaying it from the first event.

- every event is a transition the lifecycle allows from the state the earlier events left:
  a submit adds the next number as a draft, an approval moves a draft, an activation or a
  rollback starts from the version that was active (``from_version``) and retires it, a
  shadow designation starts from the shadow that was designated, an unshadow ends it;
- the replayed statuses are the ones the service derives, at most one version is active,
  and the policy's state row holds the replayed active and shadow versions;
- a decision record names the version that was active, and the shadow that was designated,
  at its ``issued_at`` (the state after the last event stamped at or before it).
"""

from __future__ import annotations

from bisect import bisect_right
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any


@dataclass
class State:
    statuses: dict[int, str] = field(default_factory=dict)
    active: int | None = None
    shadow: int | None = None


def replay(events: Sequence[Any]) -> list[tuple[datetime, State]]:
    """The state after each event (ordered by id), with the event's time; AssertionError on
    the first impossible transition."""
    state = State()
    out: list[tuple[datetime, State]] = []
    for e in sorted(events, key=lambda e: e.id):
        s = state.statuses
        where = f"event {e.id} {e.action} {e.from_version}->{e.to_version}"
        if e.action == "submit":
            assert e.to_version == len(s) + 1, where
            s[e.to_version] = "draft"
        elif e.action == "approve":
            assert s.get(e.to_version) == "draft", where
            s[e.to_version] = "approved"
        elif e.action in ("activate", "rollback"):
            assert e.from_version == state.active, f"{where}: v{state.active} was active"
            allowed = ("approved",) if e.action == "activate" else ("approved", "retired")
            assert s.get(e.to_version) in allowed, f"{where}: target is {s.get(e.to_version)}"
            assert state.shadow != e.to_version, f"{where}: the target is still the shadow"
            if state.active is not None:
                s[state.active] = "retired"
            s[e.to_version] = "active"
            state.active = e.to_version
        elif e.action == "shadow":
            assert e.from_version == state.shadow, f"{where}: v{state.shadow} was the shadow"
            assert s.get(e.to_version) == "approved", where
            assert e.to_version != e.from_version, where
            state.shadow = e.to_version
        elif e.action == "unshadow":
            assert state.shadow is not None and e.from_version == state.shadow, where
            state.shadow = None
        elif e.action == "retire":  # recorded by migration 0050 only
            assert s.get(e.from_version) == "approved", where
            s[e.from_version] = "retired"
        else:
            raise AssertionError(f"unexpected {where}")
        assert list(s.values()).count("active") <= 1, where
        out.append((e.at, State(dict(s), state.active, state.shadow)))
    return out


def check_history(events: Sequence[Any], statuses: dict[int, str]) -> None:
    """Every transition possible, and the stored statuses the replayed ones."""
    timeline = replay(events)
    final = timeline[-1][1] if timeline else State()
    assert final.statuses == statuses
    assert list(statuses.values()).count("active") <= 1


def check_state(events: Sequence[Any], active: int | None, shadow: int | None) -> None:
    """The state row's active and shadow versions are the ones the history ends in."""
    timeline = replay(events)
    final = timeline[-1][1] if timeline else State()
    assert (active, shadow) == (final.active, final.shadow), (active, shadow, final)


def check_records(events: Sequence[Any], records: Iterable[Any]) -> None:
    """Each record (request_id, version, shadow_version, issued_at) against the history."""
    timeline = replay(events)
    times = [at for at, _ in timeline]
    assert times == sorted(times), "events stamped out of order"
    ordered = sorted(events, key=lambda e: e.id)
    wrong = []
    for r in records:
        k = bisect_right(times, r.issued_at)
        state = timeline[k - 1][1] if k else State()
        if (state.active, state.shadow) != (r.version, r.shadow_version):
            wrong.append(
                f"{r.request_id} at {r.issued_at.isoformat()}: v{r.version} shadow "
                f"{r.shadow_version}, history says v{state.active} shadow {state.shadow}; "
                + ", ".join(
                    f"{e.action} {e.from_version}->{e.to_version} at {e.at.isoformat()}"
                    for e in ordered[max(k - 2, 0) : k + 2]
                )
            )
    assert not wrong, f"{len(wrong)} record(s) outside their version's interval: {wrong[:5]}"
