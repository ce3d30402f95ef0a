"""Demo stages after the decisions: outcomes arrive, nurses' final decisions, the month's audit.

Appended to the stages of ``service.demo.story`` (before the summary). Everything goes through
the running server over HTTP: outcomes as a records system would send them, then an audit run
by the auditor's key, and the HTML and CSV report fetched and saved in the output folder.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import httpx
import numpy as np

from service.demo.context import DemoContext, Stage
from service.demo.story import default_stages, print_summary

OUTCOME_BATCH = 500
OVERRIDE_REASONS = ("patient-declined", "clinical-judgement", "already-in-programme")


def outcomes_arrive(ctx: DemoContext) -> None:
    """Readmission outcomes, 30 days after each discharge, from the records system; a few
    cases never report back (moved away), and nurses record their final decisions.

    The story's 30 days pass in a moment, so the outcomes and decisions are dated when they
    are sent: the service refuses a date before the recommendation or in the future."""
    d = ctx.discharges
    assert d is not None
    rng = np.random.default_rng(ctx.seed + 1)
    now = datetime.now(UTC).isoformat()
    reported = rng.random(len(ctx.sent)) >= 0.12  # about 12% lost to follow-up
    items: list[dict[str, Any]] = []
    for sent, seen in zip(ctx.sent, reported, strict=True):
        if not seen:
            continue
        items.append(
            {
                "recommendation_id": sent.recommendation_id,
                "outcome": int(d.outcome[sent.index]),
                "observed_at": now,
                "source": "fernhollow-records",
            }
        )
    ctx.say(f"[10] 30 days later: {len(items)} readmission outcomes arrive from the records system")
    with ctx.client() as api:
        for start in range(0, len(items), OUTCOME_BATCH):
            chunk = items[start : start + OUTCOME_BATCH]
            api.post("/v1/outcomes/batch", ctx.tokens["scoring"], {"items": chunk})
            ctx.say(f"     outcomes: {min(start + OUTCOME_BATCH, len(items))}/{len(items)}")
        # Nurses confirm most recommendations; about 3% they override, with a reason code.
        overrides = followed = 0
        for sent in ctx.sent:
            u = rng.random()
            if u < 0.03:
                body = {
                    "decision": "overridden",
                    "reason_code": OVERRIDE_REASONS[int(rng.integers(len(OVERRIDE_REASONS)))],
                    "decided_at": now,
                    "decided_by": "discharge nurse",
                }
                overrides += 1
            elif u < 0.25:
                body = {
                    "decision": "followed",
                    "decided_at": now,
                    "decided_by": "discharge nurse",
                }
                followed += 1
            else:
                continue
            api.post(
                f"/v1/recommendations/{sent.recommendation_id}/final", ctx.tokens["scoring"], body
            )
    ctx.say(f"     final decisions recorded: {followed} followed, {overrides} overridden")
    ctx.summary.append(
        f"outcomes: {len(items)} of {len(ctx.sent)} reported; final decisions: {followed} "
        f"followed, {overrides} overridden"
    )


def audit_month(ctx: DemoContext) -> None:
    """The auditor runs the month's audit and saves the report as HTML and CSV."""
    assert ctx.sent, "no recommendations were sent"
    with ctx.client() as api:
        listing = api.get(f"/v1/policies/{ctx.policy_name}/versions", ctx.tokens["author"])
        issued = _issue_month()
        ctx.say(f"[11] auditor-lindqvist runs the audit of {ctx.policy_name} for {issued}")
        # The demo's month has not ended, so it is not mature: the auditor asks for the checks
        # that need outcomes to be decided provisionally (the report says so).
        body = {"policy": ctx.policy_name, "month": issued, "provisional": True}
        result = api.post("/v1/audits", ctx.tokens["audit"], body)
        paths = {}
        for kind in ("html", "csv"):
            text = _get_text(ctx, f"/v1/reports/{ctx.policy_name}/{issued}.{kind}")
            path = ctx.output_dir / f"report-{ctx.policy_name}-{issued}.{kind}"
            path.write_text(text, encoding="utf-8")
            paths[kind] = path
    counts = result["row_counts"]
    ctx.say(
        f"     snapshot {result['snapshot_id']}: {counts['recommendations']} recommendations, "
        f"{counts['outcomes']} outcomes, versions {result['versions']} "
        f"(of {len(listing)} stored), {result['maturity']} month, digest "
        f"{result['digest'][:16]}"
    )
    summary = alert_summary(result["alerts"])
    lines = ["", f"Audit of {issued}: {summary[0]}", *summary[1:]]
    lines.append(f"report: {paths['html'].resolve()}")
    lines.append(f"        {paths['csv'].resolve()} (one row per version x group x metric)")
    ctx.summary.extend(lines)
    ctx.say(f"     {len(result['alerts'])} alert(s); report saved to {paths['html']}")


# The order alerts are told in: what needs action first.
_LEVEL_ORDER = ("breach", "watch")


def alert_summary(alerts: list[dict[str, Any]], shown: int = 6) -> list[str]:
    """A headline with the count per level, then the first ``shown`` alerts, most serious
    first; the rest are counted and left to the report (which lists every one)."""
    if not alerts:
        return ["no alerts: no check shows a breach"]
    rank = {level: i for i, level in enumerate(_LEVEL_ORDER)}
    ordered = sorted(alerts, key=lambda a: rank.get(a["level"], len(rank)))
    counts: dict[str, int] = {}
    for alert in ordered:
        counts[alert["level"]] = counts.get(alert["level"], 0) + 1
    head = f"{len(alerts)} alert(s): " + ", ".join(f"{n} {k}" for k, n in counts.items())
    lines = [head]
    lines += [f"  [{a['level']}] v{a['version']} {a['message']}" for a in ordered[:shown]]
    if len(ordered) > shown:
        lines.append(f"  ... and {len(ordered) - shown} more, each listed in the report")
    return lines


def _get_text(ctx: DemoContext, path: str) -> str:
    """A rendered report (CSV or HTML, not JSON) from the server."""
    headers = {"Authorization": f"Bearer {ctx.tokens['audit']}"}
    response = httpx.get(ctx.base_url + path, headers=headers, timeout=60.0)
    response.raise_for_status()
    return response.text


def _issue_month() -> str:
    """The calendar month (UTC, the server's default zone) the recommendations were issued in:
    the demo sends them all within a few minutes of now."""
    now = datetime.now(UTC)
    return f"{now.year:04d}-{now.month:02d}"


def audit_stages() -> list[Stage]:
    return [outcomes_arrive, audit_month]


def full_stages() -> list[Stage]:
    """The whole story: the decision stages, then outcomes and the audit, then the summary."""
    stages = default_stages()
    at = stages.index(print_summary)
    return [*stages[:at], *audit_stages(), *stages[at:]]
