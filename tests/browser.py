"""Open a local HTML file in Debian's headless Chromium through Playwright, offline, and watch it.

Never downloads a browser: it drives ``/usr/bin/chromium``. Every request other than the file
itself is refused and recorded, so a test can fail on any attempt to reach the network.
"""

from __future__ import annotations

import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import pytest

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
ARTIFACTS = Path(__file__).resolve().parent.parent / "test-artifacts"


def require_chromium() -> None:
    """Skip when there is no browser here, unless this is CI, where a missing browser is a failure."""
    missing = []
    if not (os.path.exists(CHROMIUM) or shutil.which("chromium")):
        missing.append("Debian's chromium is not installed")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        missing.append("the playwright package is not installed")
    if missing:
        if os.environ.get("CI") == "true":
            pytest.fail("; ".join(missing))
        pytest.skip("; ".join(missing))


@dataclass
class PageVisit:
    """What happened while a page was open."""

    errors: list[str] = field(default_factory=list)      # uncaught exceptions and console errors
    blocked: list[str] = field(default_factory=list)     # requests other than the file itself
    dialogs: list[str] = field(default_factory=list)     # alert()/confirm() the page tried to open
    console: list[str] = field(default_factory=list)


class OfflinePage:
    """Context manager: ``with OfflinePage(path) as (page, visit): ...``."""

    def __init__(self, path: str | os.PathLike, width: int = 1400, height: int = 1000) -> None:
        self.url = Path(path).resolve().as_uri()
        self.size = {"width": width, "height": height}
        self.visit = PageVisit()

    def __enter__(self):
        from playwright.sync_api import sync_playwright
        self._pw = sync_playwright().start()
        self._browser = self._pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
        context = self._browser.new_context(viewport=self.size, service_workers="block")
        self.page = context.new_page()
        visit = self.visit

        def route(r):
            if r.request.url == self.url:
                r.continue_()
            else:
                visit.blocked.append(r.request.url)
                r.abort()

        context.route("**/*", route)
        context.on("websocket", lambda ws: visit.blocked.append(ws.url))
        self.page.on("pageerror", lambda exc: visit.errors.append(f"page error: {exc}"))
        self.page.on("console", lambda m: (visit.console.append(m.text),
                                          m.type == "error" and visit.errors.append(f"console: {m.text}")))

        def dialog(d):
            visit.dialogs.append(d.message)
            d.dismiss()

        self.page.on("dialog", dialog)
        self.page.goto(self.url, wait_until="load", timeout=60_000)
        return self.page, visit

    def __exit__(self, *exc) -> None:
        self._browser.close()
        self._pw.stop()


def screenshot(page, name: str, full_page: bool = True) -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / name
    page.screenshot(path=str(path), full_page=full_page)
    return path
