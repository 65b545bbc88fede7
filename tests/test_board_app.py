"""The HTTP application (daemon/web) through Starlette's test client, around a REAL engine
fed from the invented example ward (tests/boardsite.py): the pages, the numbers they show,
logins, CSRF, the rate limit on logins, and acknowledgement through the engine.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from urllib.parse import quote

import numpy as np
import pytest
from starlette.testclient import TestClient

from daemon.caution import CAUTION
from daemon.engine.alarms import ALARM_CAUTION, STATE_WORDS, State
from daemon.engine.numbers import num
from daemon.web.app import CSP, build_app
from daemon.web.users import remove_user
from tests.boardsite import PASSWORD, LogSite, open_alarms, users_file

# The example ward (examples/ward-night.jsonl, invented): bed-02 weighs 82 kg (actual),
# per the log's bed context.
BED02_KG = 82.0


@pytest.fixture(scope="module")
def ward() -> LogSite:
    return LogSite()


def client(site: LogSite, tmp_path, **settings) -> TestClient:
    users = users_file(tmp_path, {"nurse-a": ["bedside-nurse"],
                                  "charge-b": ["charge-nurse", "bedside-nurse"]})  # fmt: skip
    scheme = "https" if settings.get("secure_cookies") else "http"
    return TestClient(build_app(site.site(users, **settings)), base_url=f"{scheme}://board.test")


def login(c: TestClient, user: str = "nurse-a", password: str = PASSWORD):
    form = c.get("/login")
    token = re.search(r'name="csrf" value="([^"]+)"', form.text).group(1)
    return c.post("/login", data={"user": user, "password": password, "csrf": token,
                                  "next": "/ward/4-East"}, follow_redirects=False)  # fmt: skip


def csrf_of(page: str) -> str:
    return re.search(r'<meta name="csrf" content="([^"]*)">', page).group(1)


def test_health_and_metrics_come_from_the_site(ward, tmp_path):
    c = client(ward, tmp_path)
    r = c.get("/health")
    assert r.status_code == 200 and r.json() == {"status": "ok"}
    assert r.headers["cache-control"] == "no-store"
    r = c.get("/metrics")
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    sick = TestClient(build_app(LogSite(None).site(health=(False, {"status": "unhealthy"}))))
    assert sick.get("/health").status_code == 503


def test_the_ward_page_shows_every_bed_with_numbers_computed_independently(ward, tmp_path):
    c = client(ward, tmp_path)
    assert "4-East" in c.get("/").text
    page = c.get("/ward/4-East")
    assert page.status_code == 200
    with ward.lock:
        beds = sorted(b for b, s in ward.engine.beds.items() if s.context.ward == "4-East")
        series = ward.engine.beds["bed-02"].series
        end = series.latest_minute()
        vol, _ = series.minutes(end - 59, end + 1)
        day, _ = series.minutes(end - 1439, end + 1)
        hour = int(series.latest_time // 3600) - 1  # the last completed clock hour
        clock_hour, _ = series.minutes(hour * 60, hour * 60 + 60)
    assert beds == ["bed-01", "bed-02", "bed-03", "bed-04"]
    for bed in beds:
        assert f'id="bed-{bed}"' in page.text
    card = page.text.split('id="bed-bed-02"')[1].split("</article>")[0]
    # independent sums of the minute series (numpy), rounded half up for people
    rows = {m[0]: m[1:] for m in re.findall(
        r'<th scope="row">([^<]+)</th><td class="n">([^<]+)</td><td class="n">([^<]+)</td>',
        card)}  # fmt: skip
    start = datetime.fromtimestamp(hour * 3600, UTC).strftime("%H")
    end = datetime.fromtimestamp(hour * 3600 + 3600, UTC).strftime("%H")
    assert rows["Last 60 min"] == (num(float(np.sum(vol))),
                                   num(float(np.sum(vol)) / BED02_KG, 2))  # fmt: skip
    assert rows["Last 24 h"] == (num(float(np.sum(day))),
                                 num(float(np.sum(day)) / BED02_KG / 24, 2))  # fmt: skip
    assert rows[f"Hour {start}–{end}"] == (num(float(np.sum(clock_hour))),
                                           num(float(np.sum(clock_hour)) / BED02_KG, 2))
    assert CAUTION in page.text or ALARM_CAUTION in page.text


def test_alarms_show_state_words_priority_word_and_shape_and_age(ward, tmp_path):
    page = client(ward, tmp_path).get("/ward/4-East").text
    for a in open_alarms(ward):
        card = page.split(f'id="bed-{a.bed}"')[1].split("</article>")[0]
        item = card.split(f'data-alarm-id="{a.alarm_id}"')[1].split("</li>")[0]
        assert STATE_WORDS[a.state] in item
        word = a.priority.value
        assert f'class="prio prio-{word}"' in item and f"</span>{word}</span>" in item
        bars = {"high": 3, "medium": 2, "low": 1}[word]
        badge = item.split(f"prio-{word}")[1].split("</span>")[0]
        assert badge.count('class="on"') == bars and badge.count('class="off"') == 3 - bars
        assert re.search(r"for (\d+ min|\d+ h \d\d min|\d+ d \d+ h|just now)", card)


def test_a_bed_without_an_order_says_so_and_no_rate_appears(ward, tmp_path):
    page = client(ward, tmp_path).get("/ward/4-East").text
    bed01 = page.split('id="bed-bed-01"')[1].split("</article>")[0]
    assert "Replacement order: none on file." in bed01
    assert "mL/h of" not in bed01 and "Suggest" not in bed01
    bed02 = page.split('id="bed-bed-02"')[1].split("</article>")[0]
    assert "0.45% NaCl" in bed02  # its order is on file


def test_the_bed_page_has_hours_chart_evidence_order_labs_residual_and_quality(ward, tmp_path):
    r = client(ward, tmp_path).get("/bed/bed-02")
    assert r.status_code == 200
    page = r.text
    hours = page.split('id="s-hours"')[1].split("</table>")[0]
    assert hours.count("<tr>") == 1 + 24  # header and the last 24 completed clock hours
    svg = page.split('<svg class="chart"')[1].split("</svg>")[0]
    assert "200 mL/h" in svg  # the post-obstructive diuresis line (Halbgewachs & Domes 2015)
    assert f"{num(0.5 * BED02_KG)} mL/h" in svg  # KDIGO 2012: 0.5 mL/kg/h at 82 kg
    with ward.lock:
        bags = ward.marks.bag_changes("bed-02", ward.now - 86400)
    assert bags, "the example's gravimetric meter has its bag changed during the night"
    assert svg.count('class="bag-mark"') == len(bags)
    assert 'class="span span-medium"' in svg  # the pod-hourly alarm's span
    assert "The windows the rule evaluates" in page and "hour 2 of 2" in page
    assert "hourwatch explain journal.db bed-02/pod-hourly/" in page
    assert "0.45% NaCl" in page and "serum sodium" in page
    assert "Data quality" in page and "gs-0201" in page
    assert "Residual drain" in page
    assert client(ward, tmp_path).get("/bed/no-such-bed").status_code == 404


def test_every_response_keeps_to_this_origin(ward, tmp_path):
    c = client(ward, tmp_path)
    for path in ("/", "/ward/4-East", "/bed/bed-02", "/login", "/static/board.css",
                 "/static/board.js", "/static/palette.css"):  # fmt: skip
        r = c.get(path)
        assert r.status_code == 200
        assert r.headers["content-security-policy"] == CSP
        assert "default-src 'self'" in CSP and "http" not in CSP
        text = re.sub(r'xmlns="http://www.w3.org/2000/svg"', "", r.text)
        assert not re.search(r"(https?:)?//[a-z0-9.-]+\.[a-z]", text, re.I), path
        assert "@import" not in text and "url(" not in text


def test_acknowledging_needs_a_login(ward, tmp_path):
    c = client(ward, tmp_path)
    (a, *_) = open_alarms(ward)
    url = "/alarms/" + quote(a.alarm_id, safe="") + "/ack"
    r = c.post(url, headers={"Accept": "application/json"})
    assert r.status_code == 401 and r.json()["login"] is True
    assert c.post(url).status_code == 401  # a plain form post too
    assert not any(x[1] == a.alarm_id for x in ward.acks)


def test_acknowledging_needs_the_session_csrf_token_and_this_origin(tmp_path):
    site = LogSite()
    c = client(site, tmp_path)
    assert login(c).status_code == 303
    (a, *_) = open_alarms(site, "bed-02")
    url = "/alarms/" + quote(a.alarm_id, safe="") + "/ack"
    assert c.post(url, data={"csrf": "forged"}).status_code == 403
    token = csrf_of(c.get("/ward/4-East").text)
    assert c.post(url, data={"csrf": token},
                  headers={"Origin": "http://elsewhere.test"}).status_code == 403
    assert c.post(url, data={"csrf": token},
                  headers={"Sec-Fetch-Site": "cross-site"}).status_code == 403
    assert site.acks == []  # nothing reached the engine


def test_a_logged_in_nurse_acknowledges_through_the_engine(tmp_path):
    site = LogSite()
    c = client(site, tmp_path)
    assert login(c).status_code == 303
    # an alarm whose condition is still present stays, acknowledged (a latched one whose
    # condition ended would resolve)
    a = next(x for x in open_alarms(site, "bed-02") if x.condition_present)
    token = csrf_of(c.get("/ward/4-East").text)
    r = c.post("/alarms/" + quote(a.alarm_id, safe="") + "/ack",
               headers={"X-CSRF-Token": token, "Accept": "application/json"})  # fmt: skip
    assert r.status_code == 200 and r.json()["ok"] is True, r.text
    # it went through the engine on the user's own acknowledgement topic
    assert site.acks == [("hourwatch/ack/nurse-a", a.alarm_id, "acknowledged")]
    with site.lock:
        now = {v.alarm_id: v for v in site.engine.book.active("bed-02")}[a.alarm_id]
    assert now.state is State.ACKNOWLEDGED
    assert (now.ack_by, now.ack_role) == ("nurse-a", "bedside-nurse")
    ev = [e for e in site.events if e.alarm_id == a.alarm_id][-1]
    assert ev.body["state"] == "acknowledged" and ev.body["by"] == "nurse-a"
    assert ev.body["role"] == "bedside-nurse"
    card = c.get("/ward/4-East").text.split('id="bed-bed-02"')[1].split("</article>")[0]
    assert "acknowledged by nurse-a (bedside-nurse)" in card
    # the URL-encoded id and the plain one name the same alarm
    again = c.post(f"/alarms/{a.alarm_id}/ack", data={"csrf": token})
    assert again.status_code in (200, 409)


def test_a_user_acts_in_the_role_they_choose(tmp_path):
    site = LogSite()
    c = client(site, tmp_path)
    assert login(c, "charge-b").status_code == 303
    page = c.get("/ward/4-East").text
    assert "as <select" in page  # two roles: a choice
    token = csrf_of(page)
    c.post("/role", data={"csrf": token, "role": "bedside-nurse", "next": "/ward/4-East"})
    c.post("/role", data={"csrf": token, "role": "icu-physician"})  # not theirs: ignored
    a = next(x for x in open_alarms(site, "bed-03") if x.condition_present)
    c.post("/alarms/" + quote(a.alarm_id, safe="") + "/ack", data={"csrf": token})
    with site.lock:
        now = {v.alarm_id: v for v in site.engine.book.active("bed-03")}[a.alarm_id]
    assert (now.ack_by, now.ack_role) == ("charge-b", "bedside-nurse")


def test_session_cookie_is_httponly_and_samesite_strict(ward, tmp_path):
    c = client(ward, tmp_path)
    r = login(c)
    (cookie,) = [x for x in r.headers.get_list("set-cookie") if "hourwatch_session=" in x]
    assert "HttpOnly" in cookie and "SameSite=strict" in cookie.replace("Strict", "strict")
    assert "Secure" not in cookie
    secure = client(ward, tmp_path, secure_cookies=True)
    r = login(secure)
    (cookie,) = [x for x in r.headers.get_list("set-cookie") if "hourwatch_session=" in x]
    assert cookie.startswith("__Host-hourwatch_session=") and "Secure" in cookie


def test_failed_logins_are_limited_per_user(ward, tmp_path):
    c = client(ward, tmp_path, login_failures_per_user=3)
    for _ in range(3):
        assert login(c, password="wrong-password").status_code == 401
    r = login(c)  # the right password, but too many failures first
    assert r.status_code == 429 and int(r.headers["retry-after"]) > 0
    assert "Too many failed logins" in r.text
    other = login(c, "charge-b")  # another user from the same address still may
    assert other.status_code == 303


def test_a_login_form_needs_its_own_token(ward, tmp_path):
    c = client(ward, tmp_path)
    r = c.post("/login", data={"user": "nurse-a", "password": PASSWORD, "csrf": "x"})
    assert r.status_code == 403
    assert "hourwatch_session" not in r.headers.get("set-cookie", "")


def test_removing_a_user_ends_their_sessions(tmp_path):
    site = LogSite()
    c = client(site, tmp_path)
    assert login(c).status_code == 303
    token = csrf_of(c.get("/ward/4-East").text)
    assert token
    remove_user(tmp_path / "users.json", "nurse-a")
    (a, *_) = open_alarms(site)
    r = c.post("/alarms/" + quote(a.alarm_id, safe="") + "/ack", data={"csrf": token})
    assert r.status_code == 401


def test_looking_may_require_a_login(ward, tmp_path):
    c = client(ward, tmp_path, require_login=True)
    r = c.get("/ward/4-East", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].startswith("/login?next=/ward/4-East")
    assert c.get("/events/ward/4-East").status_code == 401
    assert c.get("/health").status_code == 200  # an operator's probe needs no login
    assert login(c).status_code == 303
    assert c.get("/ward/4-East").status_code == 200


def test_a_login_goes_back_only_to_this_board(ward, tmp_path):
    c = client(ward, tmp_path)
    form = c.get("/login")
    token = re.search(r'name="csrf" value="([^"]+)"', form.text).group(1)
    r = c.post("/login", data={"user": "nurse-a", "password": PASSWORD, "csrf": token,
                               "next": "//elsewhere.test/x"}, follow_redirects=False)  # fmt: skip
    assert r.status_code == 303 and r.headers["location"] == "/"


def test_unknown_wards_and_pages(ward, tmp_path):
    c = client(ward, tmp_path)
    assert c.get("/ward/5-West").status_code == 404
    assert c.get("/nothing-here").status_code == 404
    assert c.get("/static/../app.py").status_code == 404


def test_every_advice_the_engine_issues_fits_its_message_model(ward):
    """The advice the board shows is the engine's own (AdviceIssued.to_json), published
    through AdviceMessage: its kind, order and pager words included (a mismatch made every
    advice an engine error)."""
    from daemon.messages import AdviceMessage

    advice = [e for e in ward.events if e.kind == "advice"]
    assert {e.body["kind"] for e in advice} >= {"rate", "ended"}
    for e in advice:
        msg = AdviceMessage.model_validate(e.body)
        assert msg.kind == e.body["kind"] and msg.pager == e.body["pager"]


def test_a_latched_alarm_whose_condition_ended_says_so_until_acknowledged() -> None:
    """A latched alarm stays on the card after its condition ends (DESIGN §5); the card
    must not read as if the criterion still held. Invented alarm, no clinical values."""
    from zoneinfo import ZoneInfo

    from daemon.engine.alarms import Kind, Priority
    from daemon.engine.lifecycle import AlarmView
    from daemon.web.views import Words, alarm_line

    t = datetime(2026, 3, 14, 19, 0, tzinfo=UTC).timestamp()  # invented

    def view(state: State, present: bool) -> AlarmView:
        return AlarmView(
            "b01/pod-hourly/20260314T190000Z", "b01", "icu-east", "pod-hourly", "invented",
            Priority.MEDIUM, Kind.PHYSIOLOGICAL, state, 1, t, t, present, None, None, None,
            None, "invented summary", {},
        )  # fmt: skip

    words = Words(ZoneInfo("UTC"))
    ended = alarm_line(view(State.ESCALATED, False), t + 3600, words)
    assert ended.latched_text == "condition no longer met; stays until acknowledged"
    assert alarm_line(view(State.ESCALATED, True), t + 3600, words).latched_text == ""
    assert alarm_line(view(State.ACKNOWLEDGED, False), t + 3600, words).latched_text == ""
