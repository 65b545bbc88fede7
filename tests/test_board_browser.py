"""The ward board in a REAL browser (Playwright driving Debian's Chromium) against the REAL
service on a REAL Mosquitto (tests/broker.py): the board shows the beds, a new alarm
appears without a reload, a nurse logs in and acknowledges with the keyboard (journaled
with user and role), acknowledging without a login is refused, nothing is fetched from
anywhere but the board, and the board says plainly when the service or its connection is
down. Skipped, with the reason, where no browser can be had.

Meters, beds and patients are invented; every wait is bounded.
"""

from __future__ import annotations

import json
import time
import urllib.error
import urllib.request
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import quote

import pytest

from daemon.journal import SqliteJournal
from daemon.profile_files import load_profiles
from simulator.meterlog import constant, simulate
from tests.boardsite import PASSWORD, users_file
from tests.broker import (
    Watcher,
    broker,  # noqa: F401  (the fixture)
    publish_all,
    publisher,
    running_service,
)

CHROMIUM = Path("/usr/bin/chromium")
# Playwright cannot download its own browsers here: Debian's, headless, and quiet (no
# background requests of its own, so every request seen is the board's).
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--no-first-run"]  # fmt: skip
PROFILE = {p.name: p for p in load_profiles()}["reference-cumulative"]
# source: Adrogue HJ, Madias NE. Hypernatremia. N Engl J Med 2000;342:1493-9 --
# hypernatraemia is a serum sodium above 145 mmol/L (alert_rules/sodium-high.toml)
SODIUM_HIGH = 151.0
FLOW_ML_H = 60.0  # invented, ordinary output
WAIT_MS = 10_000  # generous: two cores shared with other test runs (speed is in make bench)


@pytest.fixture(scope="module")
def chromium():
    try:
        from playwright.sync_api import Error, sync_playwright
    except ImportError:
        pytest.skip("the playwright package is not installed (make install)")
    if not CHROMIUM.exists():
        pytest.skip("no /usr/bin/chromium: `make chromium` installs Debian's (needs root)")
    with sync_playwright() as p:
        try:
            browser = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        except Error as exc:
            pytest.skip(f"Chromium does not start here: {str(exc).splitlines()[0]}")
        yield browser
        browser.close()


def ward_of_two(broker, now: float) -> None:  # noqa: F811
    """Two invented beds on ward icu-east, each with an hour of ordinary readings."""
    pub = publisher(broker, "board-feed")
    ctx = [(f"hourwatch/beds/{b}/context", {"ward": "icu-east", "device_ids": [d],
                                             "weight_kg": 70, "weight_basis": "actual"})
           for b, d in (("b01", "rc-0101"), ("b02", "rc-0102"))]  # fmt: skip
    publish_all(pub, ctx, retain=True)
    for dev in ("rc-0101", "rc-0102"):
        sim = simulate(PROFILE, dev, datetime.fromtimestamp(now - 3600, UTC), 1.0,
                       constant(FLOW_ML_H))  # fmt: skip
        publish_all(pub, [(t, p) for _, t, p in sim.records])
    pub.disconnect()


def sodium(broker, bed: str, now: float) -> None:  # noqa: F811
    pub = publisher(broker, "board-labs")
    lab = {"time": datetime.fromtimestamp(now - 60, UTC).isoformat(),
           "serum_na_mmol_l": SODIUM_HIGH}  # fmt: skip
    publish_all(pub, [(f"hourwatch/beds/{bed}/labs", lab)])
    pub.disconnect()


def test_a_nurse_sees_the_ward_live_and_acknowledges_after_logging_in(
    broker, tmp_path, chromium  # noqa: F811
):
    users = users_file(tmp_path, {"nurse-a": ["bedside-nurse"]})
    jpath = tmp_path / "j.db"
    w = Watcher(broker)
    with running_service(broker, jpath, w, board__listen="127.0.0.1:0",
                         board__users_file=str(users)) as svc:  # fmt: skip
        host, port = svc.health.addresses["board"]
        base = f"http://{host}:{port}"
        now = time.time()
        ward_of_two(broker, now)
        context = chromium.new_context(viewport={"width": 1280, "height": 800})
        page = context.new_page()
        requests: list[str] = []
        page.on("request", lambda r: requests.append(r.url))
        page.goto(f"{base}/ward/icu-east")
        page.wait_for_selector("#bed-b01", timeout=WAIT_MS)
        page.wait_for_selector("#bed-b02", timeout=WAIT_MS)
        # (a page-side predicate would need eval, which the board's CSP refuses)
        page.wait_for_selector('#live-state:text-is("live")', timeout=WAIT_MS)
        assert "ml" in page.inner_text("#bed-b01").lower()
        assert "Replacement order: none on file." in page.inner_text("#bed-b01")
        assert page.is_hidden("#banner")

        # a new alarm appears without a reload
        page.evaluate("window.notReloaded = true")
        sodium(broker, "b01", now)
        page.wait_for_selector("#bed-b01 >> text=Serum sodium above 145", timeout=WAIT_MS)
        assert page.evaluate("window.notReloaded === true")
        card = page.inner_text("#bed-b01")
        assert "ALARM" in card and "MEDIUM" in card.upper()
        assert "Acknowledge" not in card  # no button before logging in

        # without a login, acknowledging is refused (the service's own HTTP server)
        alarm_id = page.get_attribute("#bed-b01 li.alarm", "data-alarm-id")
        assert alarm_id and alarm_id.startswith("b01/sodium-high/")
        url = f"{base}/alarms/{quote(alarm_id, safe='')}/ack"
        with pytest.raises(urllib.error.HTTPError) as refused:
            urllib.request.urlopen(urllib.request.Request(url, data=b"", method="POST"),
                                   timeout=5)  # fmt: skip
        assert refused.value.code == 401

        # log in, then acknowledge with the keyboard
        page.click("text=Log in")
        page.fill("#user", "nurse-a")
        page.fill("#password", PASSWORD)
        page.press("#password", "Enter")
        page.wait_for_url(f"{base}/ward/icu-east", timeout=WAIT_MS)
        button = page.locator("#bed-b01 .ack-button")
        button.wait_for(state="visible", timeout=WAIT_MS)
        button.focus()
        # a live update (another bed's new alarm changes the ward's summary and its
        # card) must leave the keyboard on the same button
        sodium(broker, "b02", now)
        page.wait_for_selector("#bed-b02 >> text=Serum sodium above 145", timeout=WAIT_MS)
        page.wait_for_selector("#bed-b01 .ack-button:focus", timeout=WAIT_MS)
        page.keyboard.press("Enter")
        page.wait_for_selector("#ack-result >> text=Acknowledged", timeout=WAIT_MS)
        page.wait_for_selector("#bed-b01 >> text=acknowledged by nurse-a (bedside-nurse)",
                               timeout=WAIT_MS)  # fmt: skip
        assert "ACKNOWLEDGED" in page.inner_text("#bed-b01")

        # the bed page opens from the card
        page.click("#bed-b01 h2 a")
        page.wait_for_selector("svg.chart", timeout=WAIT_MS)
        assert "Serum sodium above 145" in page.inner_text("#main")

        # on a phone: one column, nothing wider than the screen
        phone = context.new_page()
        phone.set_viewport_size({"width": 390, "height": 844})
        phone.on("request", lambda r: requests.append(r.url))
        phone.goto(f"{base}/ward/icu-east")
        phone.wait_for_selector("#bed-b02", timeout=WAIT_MS)
        phone.wait_for_selector("#bed-b01", timeout=WAIT_MS)
        # measured in one page-side step: a live update may swap a card between two calls
        xs = set(
            phone.evaluate(
                "['b01', 'b02'].map(b => Math.round("
                "document.getElementById('bed-' + b).getBoundingClientRect().x))"
            )
        )
        assert len(xs) == 1
        assert phone.evaluate("document.documentElement.scrollWidth") <= 390
        context.close()

    # nothing was fetched from anywhere but the board
    assert requests and all(u.startswith(base + "/") for u in requests), [
        u for u in requests if not u.startswith(base + "/")
    ]
    # journaled: the acknowledgement message on the user's own topic, with the role, and
    # the engine's acknowledged event with user and role
    with SqliteJournal(jpath) as j:
        messages = list(j.messages_between(None, None))
        events = list(j.events_between(None, None))
    acks = [m for m in messages if m.topic == "hourwatch/ack/nurse-a"]
    assert len(acks) == 1
    assert json.loads(acks[0].payload) == {"alarm_id": alarm_id, "role": "bedside-nurse"}
    acked = [e for e in events if e.kind == "alarm" and e.alarm_id == alarm_id
             and e.body["state"] == "acknowledged"]  # fmt: skip
    assert len(acked) == 1
    assert (acked[0].body["by"], acked[0].body["role"]) == ("nurse-a", "bedside-nurse")
    w.close()


def test_the_board_says_plainly_when_the_service_or_its_connection_is_down(
    broker, tmp_path, chromium  # noqa: F811
):
    with running_service(broker, tmp_path / "j.db", board__listen="127.0.0.1:0") as svc:
        host, port = svc.health.addresses["board"]
        ward_of_two(broker, time.time())
        page = chromium.new_page(viewport={"width": 1280, "height": 800})
        page.goto(f"http://{host}:{port}/ward/icu-east")
        # (a page-side predicate would need eval, which the board's CSP refuses)
        page.wait_for_selector('#live-state:text-is("live")', timeout=WAIT_MS)
        # the broker is lost: the service is up, but not working
        svc.link.client.disconnect()
        page.wait_for_selector("#banner >> text=Hourwatch is not working", timeout=WAIT_MS)
        assert "lost the MQTT broker" in page.inner_text("#banner")
        assert "stale" in page.get_attribute("body", "class")
    # the service (and its web server) stopped: the page itself says so
    page.wait_for_selector("#banner >> text=Live updates lost", timeout=WAIT_MS)
    assert page.is_visible("#banner")
    assert page.inner_text("#live-state") == "not live"
    page.close()
