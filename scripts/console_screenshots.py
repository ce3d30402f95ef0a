"""Screenshots of the console's main pages for docs/console/*.png.

    python scripts/console_screenshots.py [--out docs/console] [--cases 1500]

Starts ``evenhand serve`` on a temporary SQLite database, fills it through the served API
with the invented Fernhollow scenario (the demo's policy: submitted, approved by a second
admin and activated; discharges scored and their outcomes reported; this month audited; the
group-blind variant submitted as a draft), then drives Debian's Chromium with Playwright
(``EVENHAND_TEST_CHROMIUM``, default ``/usr/bin/chromium``) through the pages and saves one
PNG each. Nothing leaves the host: every request to another address is refused.
"""

from __future__ import annotations

import argparse
import os
import secrets
import sys
import tempfile
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.demo.api_client import EvenhandClient  # noqa: E402
from service.demo.fernhollow import generate  # noqa: E402
from service.demo.policy import demo_policy, group_blind_variant  # noqa: E402
from service.demo.server import ServerProcess  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.store import keys  # noqa: E402
from service.store.db import create_db_engine, create_session_factory  # noqa: E402
from service.store.migrate import upgrade  # noqa: E402

CHROMIUM = os.environ.get("EVENHAND_TEST_CHROMIUM", "/usr/bin/chromium")
PEOPLE = {
    "author": ("admin-rivera", "admin"),
    "reviewer": ("admin-okafor", "admin"),
    "scoring": ("discharge-system", "scoring"),
    "audit": ("auditor-lindqvist", "audit"),
}


def _keys(database_url: str) -> dict[str, str]:
    engine = create_db_engine(Settings(database_url=database_url))
    try:
        with create_session_factory(engine)() as session:
            tokens = {
                who: keys.create_key(session, name, role)[1] for who, (name, role) in PEOPLE.items()
            }
            session.commit()
    finally:
        engine.dispose()
    return tokens


def fill(api: EvenhandClient, tokens: dict[str, str], cases: int) -> dict[str, str]:
    """The scenario, through the API; returns the names the pages need."""
    document = demo_policy()
    name = document["name"]
    version = api.submit(tokens["author"], document)
    api.approve(tokens["reviewer"], name, version)
    body = {"version": version, "reason": "initial reviewed policy", "expected_current": None}
    api.post(f"/v1/policies/{name}/activate", tokens["author"], body)
    d = generate(cases)
    items = [
        {
            "request_id": f"{d.case_id[i]}-discharge",
            "case_id": d.case_id[i],
            "policy": name,
            "score": float(d.score[i]),
            "attributes": {"community": d.community[i], "language": d.language[i]},
        }
        for i in range(cases)
    ]
    decided = api.post("/v1/recommendations/batch", tokens["scoring"], {"items": items})["items"]
    now = datetime.now(UTC).isoformat()
    outcomes = [
        {
            "recommendation_id": answer["recommendation_id"],
            "outcome": int(d.outcome[i]),
            "source": "readmission-register",
            "observed_at": now,
        }
        for i, answer in enumerate(decided)
        if "recommendation_id" in answer
    ]
    api.post("/v1/outcomes/batch", tokens["scoring"], {"items": outcomes})
    month = datetime.now(UTC).strftime("%Y-%m")
    audit = {"policy": name, "month": month, "provisional": True}
    api.post("/v1/audits", tokens["audit"], audit)
    api.submit(tokens["author"], group_blind_variant(document))
    return {"policy": name, "month": month, "decision": decided[0]["recommendation_id"]}


def shoot(base: str, tokens: dict[str, str], names: dict[str, str], out: Path) -> list[Path]:
    from playwright.sync_api import FloatRect, Route, sync_playwright

    policy, month = names["policy"], names["month"]
    refused: list[str] = []
    saved: list[Path] = []

    def only_this_host(route: Route) -> None:
        if route.request.url.startswith(base + "/"):
            route.continue_()
        else:
            refused.append(route.request.url)
            route.abort()

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 860})
            page.route("**/*", only_this_host)

            def save(file: str, path: str | None = None, height: int = 0) -> None:
                # ``height``: that much of the page from its top (else the window).
                if path is not None:
                    page.goto(base + path)
                target = out / file
                if height:
                    clip: FloatRect = {"x": 0, "y": 0, "width": 1280, "height": height}
                    page.screenshot(path=str(target), full_page=True, clip=clip)
                else:
                    page.screenshot(path=str(target))
                saved.append(target)

            def sign_in(token: str) -> None:
                page.goto(f"{base}/console/sign-in")
                page.get_by_label("API key").fill(token)
                page.get_by_role("button", name="Sign in").click()
                page.wait_for_url("**/console/policies")

            save("sign-in.png", "/console/sign-in")
            sign_in(tokens["reviewer"])
            save("policy-history.png", f"/console/policies/{policy}")
            save("version.png", f"/console/policies/{policy}/versions/1", height=1400)
            save("diff.png", f"/console/policies/{policy}/diff?from=1&to=2", height=1400)
            save("confirm-approve.png", f"/console/policies/{policy}/confirm/approve?version=2")
            sign_in(tokens["audit"])
            save("report-month.png", f"/console/reports/{policy}/{month}", height=2000)
            save("report-history.png", f"/console/reports/{policy}/history", height=1800)
            save("decision.png", f"/console/decisions?id={names['decision']}")
            page.goto(f"{base}/console/log")
            page.get_by_role("button", name="Verify the log now").click()
            page.wait_for_url("**/console/log/verify")
            save("log.png")
        finally:
            browser.close()
    if refused:
        raise SystemExit(f"requests to other hosts were made: {refused}")
    return saved


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--out", type=Path, default=ROOT / "docs" / "console")
    parser.add_argument("--cases", type=int, default=1500)
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'console.db'}"
        upgrade(url)
        tokens = _keys(url)
        env = {
            "EVENHAND_DATABASE_URL": url,
            "EVENHAND_DRAW_SECRET": secrets.token_hex(32),
            "EVENHAND_SIGNING_KEY": secrets.token_hex(32),
            "EVENHAND_SEAL_INTERVAL_SECONDS": "1",
        }
        with ServerProcess(env, Path(tmp) / "server.log") as server:
            with EvenhandClient(server.base_url, timeout=120) as api:
                names = fill(api, tokens, args.cases)
            report: Callable[[Path], Any] = print
            for path in shoot(server.base_url, tokens, names, args.out):
                report(path.relative_to(ROOT) if path.is_relative_to(ROOT) else path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
