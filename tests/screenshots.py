"""The board's pictures in docs/: `make screenshots` (python -m tests.screenshots docs).

The invented example ward (examples/ward-night.jsonl) in a real engine, served by the
board's own application, photographed by Debian's Chromium at a station screen's size
(1280x800), logged in as an invented user. No real patient data.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

from daemon.web.app import build_app
from daemon.web.server import WebServer
from tests.boardsite import PASSWORD, LogSite, users_file

ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--no-first-run"]  # fmt: skip


def main(out: Path) -> int:
    from playwright.sync_api import sync_playwright

    out.mkdir(parents=True, exist_ok=True)
    site = LogSite()
    with tempfile.TemporaryDirectory() as tmp:
        users = users_file(Path(tmp), {"nurse-a": ["bedside-nurse"]})
        server = WebServer(build_app(site.site(users)), {"board": ("127.0.0.1", 0)})
        server.start()
        host, port = server.address
        base = f"http://{host}:{port}"
        try:
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=ARGS)
                page = browser.new_page(viewport={"width": 1280, "height": 800})
                page.goto(f"{base}/login?next=/ward/4-East")
                page.fill("#user", "nurse-a")
                page.fill("#password", PASSWORD)
                page.press("#password", "Enter")
                page.wait_for_selector('#live-state:text-is("live")')
                time.sleep(0.3)
                page.screenshot(path=str(out / "board.png"))
                page.goto(f"{base}/bed/bed-02")
                page.screenshot(path=str(out / "bed-page.png"))
                page.locator("section[aria-labelledby=s-chart]").screenshot(
                    path=str(out / "bed-chart.png"))
                browser.close()
        finally:
            server.stop()
    print(f"wrote {out / 'board.png'}, {out / 'bed-page.png'}, {out / 'bed-chart.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main(Path(sys.argv[1] if len(sys.argv) > 1 else "docs")))
