"""What the browser tests share: Debian's Chromium driven by Playwright, a page that records
every console error, failed response and request to another host (the network is cut off:
such a request is refused), and the accessibility check with axe-core.

axe-core comes from the ``axe-playwright-python`` package (PyPI, the test extras), which
carries ``axe.min.js``; it is read from the installed package, never fetched at test time.
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass, field
from importlib.resources import files
from typing import Any

import pytest

CHROMIUM = os.environ.get("EVENHAND_TEST_CHROMIUM", "/usr/bin/chromium")
SEVERE = ("serious", "critical")


def _unavailable(message: str) -> None:
    if os.environ.get("CI", "").lower() in {"1", "true", "yes"}:
        pytest.fail(message + " (CI=true: the browser test is mandatory)")
    pytest.skip(message)


def need_browser() -> None:
    """Skip (fail under CI=true) without Chromium or the playwright package."""
    if shutil.which(CHROMIUM) is None:
        _unavailable(f"no Chromium at {CHROMIUM} (apt-get install chromium)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        _unavailable("the playwright package is not installed (pip install -e '.[test]')")


@dataclass
class Watch:
    """What a page did that it should not: console errors, failed responses, and requests
    to any host other than the server's (each refused)."""

    errors: list[str] = field(default_factory=list)
    elsewhere: list[str] = field(default_factory=list)


def watched_page(browser: Any, base_url: str, watch: Watch) -> Any:
    """A new page with the network cut off: only ``base_url`` answers."""
    page = browser.new_page()

    def only_this_host(route: Any) -> None:
        if route.request.url.startswith(base_url + "/"):
            route.continue_()
        else:
            watch.elsewhere.append(route.request.url)
            route.abort()

    page.route("**/*", only_this_host)
    page.on("console", lambda m: watch.errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: watch.errors.append(str(e)))
    page.on(
        "response",
        lambda r: watch.errors.append(f"{r.status} {r.url}") if r.status >= 400 else None,
    )
    return page


def axe_script() -> str:
    """axe-core's ``axe.min.js`` as shipped in the ``axe-playwright-python`` wheel."""
    try:
        source = files("axe_playwright_python").joinpath("axe.min.js")
    except ModuleNotFoundError:
        _unavailable("axe-playwright-python is not installed (pip install -e '.[test]')")
        raise
    return source.read_text(encoding="utf-8")


def severe_violations(page: Any, script: str, skip: tuple[str, ...] = ()) -> list[str]:
    """Run axe-core in the page (injected through the DevTools protocol, which the page's
    Content-Security-Policy does not govern) with every rule but those in ``skip``, and
    return its serious and critical violations, one line each: rule, impact, the elements."""
    if not page.evaluate("() => typeof window.axe === 'object'"):
        page.evaluate(script)
    result = page.evaluate(
        """async (skip) => {
            const rules = Object.fromEntries(skip.map(id => [id, {enabled: false}]));
            const r = await axe.run(document, {resultTypes: ['violations'], rules});
            return r.violations.map(v => ({
                id: v.id, impact: v.impact, help: v.help,
                nodes: v.nodes.map(n => n.target.join(' ') + ' ' + n.failureSummary)
            }));
        }""",
        list(skip),
    )
    return [
        f"{page.url}: {v['id']} ({v['impact']}): {v['help']}: {'; '.join(v['nodes'][:5])}"
        for v in result
        if v["impact"] in SEVERE
    ]
