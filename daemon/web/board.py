"""The ward board's pages and endpoints (see app.py for the list)."""

from __future__ import annotations

import math
import secrets
from pathlib import Path
from typing import Any
from urllib.parse import quote

from jinja2 import Environment
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import (
    HTMLResponse,
    JSONResponse,
    RedirectResponse,
    Response,
    StreamingResponse,
)
from starlette.routing import Route

from ..caution import CAUTION
from ..engine import rules as r
from ..engine.alarms import ALARM_CAUTION, STATE_WORDS, State
from ..engine.numbers import ml, num
from . import chart
from .auth import (
    COOKIE,
    LOGIN_COOKIE,
    SECURE_COOKIE,
    LoginLimiter,
    Session,
    Sessions,
    same_token,
)
from .forms import read_form, referer_path, safe_next
from .live import Broadcaster, WardFrame
from .palette import css_variables
from .site import BoardData
from .views import (
    ADVICE_WORDS,
    LEVEL,
    PRIORITY_WORDS,
    AlarmDetail,
    BedSnapshot,
    Words,
    alarm_line,
    bed_snapshot,
    card,
    evidence_pairs,
    facts_for,
    hour_rows,
    labs_rows,
    natural,
    residual_rows,
    rule_check_words,
    ward_summary,
)

STATIC = ("board.css", "board.js", "icon.svg")
LEVELS = {w: LEVEL[p] for p, w in PRIORITY_WORDS.items()}
ENDED = frozenset({State.RESOLVED.value, State.INACTIVE.value})
SHOWN = frozenset({State.ACTIVE.value, State.ESCALATED.value, State.ACKNOWLEDGED.value})
DAY_S = 86400.0


class Board:
    def __init__(self, data: BoardData, env: Environment, log: Any) -> None:
        self.data = data
        self.env = env
        self.log = log
        self.words = Words(data.timezone)
        s = data.settings
        self.sessions = Sessions(s.session_hours * 3600.0)
        self.limiter = LoginLimiter(s.login_failures_per_user, s.login_failures_per_address,
                                    s.login_window_s)  # fmt: skip
        self.cookie = SECURE_COOKIE if s.secure_cookies else COOKIE
        self.broadcaster = Broadcaster(data.changes, self.frames, self.status)
        here = Path(__file__).resolve().parent / "static"
        self.static = {name: (here / name).read_bytes() for name in STATIC}
        self.static["palette.css"] = css_variables().encode()

    def routes(self) -> list[Route]:
        return [
            Route("/", self.index, methods=["GET"]),
            Route("/ward/{ward}", self.ward, methods=["GET"]),
            Route("/events/ward/{ward}", self.events, methods=["GET"]),
            Route("/bed/{bed}", self.bed, methods=["GET"]),
            Route("/alarms/{alarm_id:path}/ack", self.acknowledge, methods=["POST"]),
            Route("/login", self.login_form, methods=["GET"]),
            Route("/login", self.login, methods=["POST"]),
            Route("/logout", self.logout, methods=["POST"]),
            Route("/role", self.role, methods=["POST"]),
            Route("/static/{name}", self.asset, methods=["GET"]),
        ]

    # --- sessions -------------------------------------------------------------------
    def session(self, request: Request) -> Session | None:
        s = self.sessions.get(request.cookies.get(self.cookie))
        if s is None:
            return None
        roles = self.data.users.roles(s.user)
        if roles is None:  # removed from the users file: logged out everywhere
            self.sessions.end_user(s.user)
            return None
        if roles != s.roles:  # the file changed the user's roles
            s.roles = roles
            if s.role not in roles:
                s.role = roles[0]
        return s

    def _may_look(self, request: Request) -> bool:
        return not self.data.settings.require_login or self.session(request) is not None

    def _to_login(self, request: Request) -> Response:
        return RedirectResponse("/login?next=" + quote(request.url.path, safe="/"), 303)

    @staticmethod
    def _cross_site(request: Request) -> bool:
        """A request another site made the browser send (CSRF defence besides the token)."""
        if request.headers.get("sec-fetch-site", "") == "cross-site":
            return True
        origin = request.headers.get("origin")
        if origin and origin != "null":
            host = request.headers.get("host", "")
            return origin.split("://", 1)[-1] != host
        return False

    # --- rendering ------------------------------------------------------------------
    def wards(self) -> list[str]:
        with self.data.lock:
            names = {b.context.ward for b in self.data.engine.beds.values()}
        return sorted(names, key=natural)

    def page(self, request: Request, template: str, status: int = 200,
             **ctx: Any) -> HTMLResponse:  # fmt: skip
        s = self.session(request)
        html = self.env.get_template(template).render(
            user=s, csrf=s.csrf if s else "", wards=self.wards(), caution=ALARM_CAUTION,
            here=request.url.path, current_ward=ctx.pop("current_ward", None),
            levels=LEVELS, **ctx,
        )  # fmt: skip
        return HTMLResponse(html, status_code=status, headers={"Cache-Control": "no-store"})

    def message(self, request: Request, status: int, heading: str, lines: list[str],
                back: str = "/") -> HTMLResponse:  # fmt: skip
        return self.page(request, "message.html", status, title=heading, heading=heading,
                         lines=lines, back=back)  # fmt: skip

    def render_card(self, snap: BedSnapshot, now: float, csrf: str = "") -> str:
        return self.env.get_template("card.html").render(c=card(snap, now, self.words), csrf=csrf)

    def _snapshots(self, ward: str) -> list[BedSnapshot]:
        data = self.data
        with data.lock:
            beds = [b for b, st in data.engine.beds.items() if st.context.ward == ward]
            beds.sort(key=natural)
            return [bed_snapshot(data.engine, b, data.latest_advice(b)) for b in beds]

    def summary_html(self, snaps: list[BedSnapshot]) -> str:
        return self.env.get_template("summary.html").render(s=ward_summary(snaps), levels=LEVELS)

    def frames(self, wards: set[str]) -> dict[str, WardFrame]:
        """The frames of these wards as they stand (called from a worker thread)."""
        now = self.data.clock()
        out = {}
        for ward in wards:
            snaps = self._snapshots(ward)
            out[ward] = WardFrame(
                ward, [s.bed for s in snaps], {s.bed: self.render_card(s, now) for s in snaps},
                self.summary_html(snaps), self.words.clock_s(now),
            )  # fmt: skip
        return out

    def status(self) -> dict[str, str]:
        """What the banner says about the service itself ("ok": nothing)."""
        fn = self.data.service_state
        if fn is None:
            return {"state": "ok", "text": ""}
        ok, body = fn()
        state = str(body.get("status", "ok" if ok else "unhealthy"))
        if ok and state == "ok":
            return {"state": "ok", "text": ""}
        why = []
        if not body.get("worker_alive", True):
            why.append("its worker has stopped")
        if not body.get("connected", True):
            why.append("it has lost the MQTT broker: no new readings arrive")
        if body.get("journal_full"):
            why.append("its journal is full: nothing new is evaluated")
        why += [str(x) for x in body.get("degraded") or []]
        what = "; ".join(why) or state
        if not ok:
            return {"state": state, "text": f"Hourwatch is not working: {what}. The figures "
                    "below may be out of date and new alarms may not show. Check the "
                    "service and the meters at the bedside."}  # fmt: skip
        return {"state": state, "text": f"Hourwatch is behind: {what}. The figures below may "
                "lag."}  # fmt: skip

    # --- pages ----------------------------------------------------------------------
    async def asset(self, request: Request) -> Response:
        name = request.path_params["name"]
        body = self.static.get(name)
        if body is None:
            return Response("not found\n", 404, media_type="text/plain")
        kind = {"css": "text/css", "js": "text/javascript", "svg": "image/svg+xml"}[
            name.rsplit(".", 1)[-1]]
        return Response(body, media_type=f"{kind}; charset=utf-8",
                        headers={"Cache-Control": "no-cache"})  # fmt: skip

    async def index(self, request: Request) -> Response:
        if not self._may_look(request):
            return self._to_login(request)
        rows = []
        for ward in self.wards():
            snaps = await run_in_threadpool(self._snapshots, ward)
            s = ward_summary(snaps)
            rows.append({"ward": ward, "beds": len(snaps), "counts": s["counts"],
                         "total": s["total"]})  # fmt: skip
        return self.page(request, "index.html", title="Wards", rows=rows)

    async def ward(self, request: Request) -> Response:
        if not self._may_look(request):
            return self._to_login(request)
        ward = request.path_params["ward"]
        if ward not in self.wards():
            return self.message(request, 404, "No such ward",
                                [f"No bed is on ward {ward!r}. The wards are listed on the "
                                 "first page."])  # fmt: skip
        s = self.session(request)
        snaps = await run_in_threadpool(self._snapshots, ward)
        now = self.data.clock()
        cards = [self.render_card(x, now, s.csrf if s else "") for x in snaps]
        return self.page(request, "ward.html", title=f"Ward {ward}", ward=ward, cards=cards,
                         summary=self.summary_html(snaps), as_of=self.words.clock_s(now),
                         zone=self.words.zone(now), current_ward=ward)  # fmt: skip

    async def events(self, request: Request) -> Response:
        if not self._may_look(request):
            return Response("log in first\n", 401, media_type="text/plain")
        self.broadcaster.start()
        return StreamingResponse(
            self.broadcaster.stream(request.path_params["ward"]),
            media_type="text/event-stream",
            headers={"Cache-Control": "no-store", "X-Accel-Buffering": "no"},
        )

    async def bed(self, request: Request) -> Response:
        if not self._may_look(request):
            return self._to_login(request)
        bed = request.path_params["bed"]
        s = self.session(request)
        ctx = await run_in_threadpool(self._bed_page, bed, s.csrf if s else "")
        if ctx is None:
            return self.message(request, 404, "No such bed", [f"No bed {bed!r} is known."])
        return self.page(request, "bed.html", title=f"Bed {bed}",
                         current_ward=ctx["c"].ward, **ctx)  # fmt: skip

    def _bed_page(self, bed_id: str, csrf: str) -> dict[str, Any] | None:
        data, w = self.data, self.words
        now = data.clock()
        t0 = math.floor((now - DAY_S) / 60.0) * 60.0
        with data.lock:
            bed = data.engine.beds.get(bed_id)
            if bed is None:
                return None
            snap = bed_snapshot(data.engine, bed_id, data.latest_advice(bed_id))
            hours = hour_rows(bed, w)
            hours_total = sum(h.volume_ml for h in list(bed.series.completed_hours())[-24:])
            details = [(a, facts_for(data.engine, bed, a.rule, w)) for a in snap.alarms]
            rules = {x.id: x for x in data.engine.rules}
            labs = labs_rows(bed, now, w)
            residual = residual_rows(bed, w)
            lo = int(t0 // 60) - 59
            vol, states = bed.series.minutes(lo, lo + 59 + 1440)
            latest = bed.series.latest_minute()
            lines = thresholds(data.engine.rules, bed.context.weight_kg,
                               set(bed.context.disabled_rules))  # fmt: skip
            bags = data.marks.bag_changes(bed_id, t0)
        events = data.bed_events(bed_id, now - DAY_S)
        c = card(snap, now, w)
        history: dict[str, list[tuple[str, str, str, str, int]]] = {}
        spans: dict[str, dict[str, Any]] = {}
        advice: list[tuple[str, str, str]] = []
        for e in events:
            b = e.body
            if e.kind == "advice":
                advice.append((w.when(e.time), ADVICE_WORDS.get(str(b.get("kind")), "Advice"),
                               str(b.get("summary", ""))))  # fmt: skip
                continue
            if e.kind != "alarm" or not e.alarm_id:
                continue
            state = str(b.get("state", ""))
            who = f" by {b['by']} ({b['role']})" if b.get("by") else ""
            notify = b.get("notify")
            paged = ""
            if isinstance(notify, list) and notify:
                paged = f"; paged {', '.join(map(str, notify))}"
            word = STATE_WORDS[State(state)] if state in State._value2member_map_ else state
            rows = history.setdefault(e.alarm_id, [])
            reason = str(b.get("reason", ""))
            if reason == "renotify" and rows and rows[-1][3] == "renotify":
                first, _, _, _, n = rows[-1]
                rows[-1] = (first, word, f"renotify x {n + 1} until {w.clock(e.time)}{paged}",
                            "renotify", n + 1)
            else:
                rows.append((w.when(e.time), word, f"{reason}{who}{paged}", reason, 1))
            sp = spans.setdefault(e.alarm_id, {"title": b.get("title") or b.get("rule"),
                                               "start": None, "end": None})  # fmt: skip
            sp["priority"] = str(b.get("priority", "low"))
            if state in SHOWN and sp["start"] is None:
                sp["start"] = e.time
            if state in ENDED:
                sp["end"] = e.time
                sp["how"] = f"{word.lower()}: {b.get('reason', '')}"
        open_ids = {a.alarm_id for a in snap.alarms}
        for a in snap.alarms:  # open alarms older than the journal's window, or no journal
            sp = spans.setdefault(a.alarm_id, {"title": a.title, "start": None, "end": None})
            sp["priority"] = PRIORITY_WORDS[a.priority]
            if sp["start"] is None and a.state.value in SHOWN:
                sp["start"] = a.activated_at if a.activated_at is not None else a.onset
        drawn = [chart.Span(sp["start"], sp["end"] if sp["end"] is not None else now,
                            sp["priority"],
                            f"{sp['priority']} {sp['title']}, {w.clock(sp['start'])}–"
                            f"{w.clock(sp['end']) if sp['end'] is not None else 'now'}")
                 for sp in spans.values() if sp["start"] is not None]  # fmt: skip
        ended = [
            {"priority": sp["priority"], "level": LEVELS.get(sp["priority"], 0),
             "title": sp["title"], "start": w.when(sp["start"]) if sp["start"] else "-",
             "end": w.when(sp["end"]), "how": sp.get("how", "")}
            for aid, sp in spans.items() if aid not in open_ids and sp["end"] is not None
        ]  # fmt: skip
        svg = chart.render(t0, vol, states, latest, [chart.Threshold(v, t) for v, t, _ in lines],
                           bags, drawn, w.clock,
                           f"Bed {bed_id}: rolling hourly output, last 24 h")  # fmt: skip
        alarm_details = []
        for a, facts in details:
            rule = rules.get(a.rule)
            alarm_details.append(AlarmDetail(
                line=alarm_line(a, now, w), rule_title=rule.title if rule else a.title,
                source=rule.source if rule else "", rationale=rule.rationale if rule else "",
                check=rule_check_words(rule) if rule else "", facts=facts,
                evidence=[] if facts else evidence_pairs(dict(a.evidence)),
                history=_last(history.get(a.alarm_id, [])),
                explain=(f"hourwatch explain {data.journal} {a.alarm_id}"
                         if data.journal else ""),
            ))  # fmt: skip
        quality = [{"device": m.device_id, "status": ml_.status, "word": ml_.word,
                    "received": m.received,
                    "outcomes": ", ".join(f"{k} {n}" for k, n in sorted(m.counts.items())) or "-"}
                   for m, ml_ in zip(snap.meters, c.meters, strict=True)]  # fmt: skip
        episodes = [f"{e['kind'].replace('_', ' ')}"
                    f"{' (' + e['reason'] + ')' if e.get('reason') else ''} at "
                    f"{w.iso_local(e['at'])}" for e in snap.episodes]  # fmt: skip
        return {
            "c": c, "card": self.render_card(snap, now, csrf), "details": alarm_details,
            "chart": svg, "hours": hours, "hours_total": ml(hours_total),
            "advice": list(reversed(advice)), "advice_caution": CAUTION, "labs": labs,
            "residual": residual, "quality": quality, "ended": ended, "episodes": episodes,
            "as_of": w.clock_s(now), "zone": w.zone(now),
            "threshold_rules": [(t, ids) for _, t, ids in lines],
        }  # fmt: skip

    # --- acknowledgement ------------------------------------------------------------
    async def acknowledge(self, request: Request) -> Response:
        alarm_id = request.path_params["alarm_id"]
        wants_json = "application/json" in request.headers.get("accept", "")
        back = request.headers.get("referer", "")
        back = safe_next(referer_path(back))
        s = self.session(request)
        if s is None:
            login = "/login?next=" + quote(back, safe="/")
            if wants_json:
                return JSONResponse({"ok": False, "login": True, "login_url": login,
                                     "text": "Log in to acknowledge."}, 401)  # fmt: skip
            return self.message(request, 401, "Log in to acknowledge",
                                ["Only a logged-in user can acknowledge an alarm."], login)
        fields = await read_form(request)
        token = request.headers.get("x-csrf-token") or fields.get("csrf")
        if self._cross_site(request) or not same_token(token, s.csrf):
            return self._refuse(request, wants_json, 403,
                                "Refused: this request did not come from this board's page "
                                "(reload the page and try again).", back)  # fmt: skip
        if len(alarm_id) > 200:
            return self._refuse(request, wants_json, 404, "No such alarm.", back)
        outcome = await run_in_threadpool(self.data.acknowledge, alarm_id, s.user, s.role)
        self.log.info("board_ack", alarm_id=alarm_id, bed=alarm_id.split("/", 1)[0],
                      user=s.user, role=s.role, acknowledged=outcome.ok,
                      detail=outcome.text)  # fmt: skip
        if outcome.ok:
            text = f"Acknowledged {alarm_id} as {s.role} ({s.user})."
        else:
            text = f"Not acknowledged: {outcome.text}"
        if wants_json:
            return JSONResponse({"ok": outcome.ok, "alarm_id": alarm_id, "text": text},
                                200 if outcome.ok else 409)  # fmt: skip
        return self.message(request, 200 if outcome.ok else 409,
                            "Acknowledged" if outcome.ok else "Not acknowledged",
                            [text], back)  # fmt: skip

    def _refuse(self, request: Request, wants_json: bool, status: int, text: str,
                back: str) -> Response:  # fmt: skip
        if wants_json:
            return JSONResponse({"ok": False, "text": text}, status)
        return self.message(request, status, "Refused", [text], back)

    # --- logging in and out ---------------------------------------------------------
    async def login_form(self, request: Request) -> Response:
        return self._login_page(request, "", "", request.query_params.get("next"))

    def _login_page(self, request: Request, error: str, name: str, nxt: str | None,
                    status: int = 200) -> Response:  # fmt: skip
        token = secrets.token_urlsafe(24)
        resp = self.page(request, "login.html", status, title="Log in", error=error, name=name,
                         next=safe_next(nxt), login_csrf=token,
                         require_login=self.data.settings.require_login)  # fmt: skip
        resp.set_cookie(LOGIN_COOKIE, token, max_age=1800, httponly=True, samesite="strict",
                        secure=self.data.settings.secure_cookies, path="/login")  # fmt: skip
        return resp

    async def login(self, request: Request) -> Response:
        f = await read_form(request)
        name, password, nxt = f.get("user", "")[:64], f.get("password", ""), f.get("next")
        if self._cross_site(request) or not same_token(f.get("csrf"),
                                                       request.cookies.get(LOGIN_COOKIE, "")):
            return self._login_page(request, "The form had expired: please log in again.",
                                    name, nxt, 403)  # fmt: skip
        address = request.client.host if request.client else "?"
        wait = self.limiter.blocked_for(name, address)
        if wait > 0:
            self.log.warning("board_login_limited", user=name, address=address)
            resp = self._login_page(request, f"Too many failed logins: try again in "
                                    f"{num(math.ceil(wait / 60))} min.", name, nxt, 429)
            resp.headers["Retry-After"] = str(math.ceil(wait))
            return resp
        roles = await run_in_threadpool(self.data.users.verify, name, password)
        if roles is None:
            self.limiter.failed(name, address)
            self.log.info("board_login_failed", user=name, address=address)
            return self._login_page(request, "That user name and password do not match.",
                                    name, nxt, 401)  # fmt: skip
        self.limiter.succeeded(name)
        s = self.sessions.create(name, roles)
        self.log.info("board_login", user=name, roles=roles, address=address)
        resp = RedirectResponse(safe_next(nxt), 303)
        resp.set_cookie(self.cookie, s.token, httponly=True, samesite="strict",
                        secure=self.data.settings.secure_cookies, path="/")  # fmt: skip
        resp.delete_cookie(LOGIN_COOKIE, path="/login")
        return resp

    async def logout(self, request: Request) -> Response:
        s = self.session(request)
        f = await read_form(request)
        if s is not None:
            if self._cross_site(request) or not same_token(f.get("csrf"), s.csrf):
                return self.message(request, 403, "Refused", ["Reload the page, then log out."])
            self.sessions.end(s.token)
            self.log.info("board_logout", user=s.user)
        resp = RedirectResponse("/", 303)
        resp.delete_cookie(self.cookie, path="/")
        return resp

    async def role(self, request: Request) -> Response:
        s = self.session(request)
        f = await read_form(request)
        if s is None:
            return self._to_login(request)
        if self._cross_site(request) or not same_token(f.get("csrf"), s.csrf):
            return self.message(request, 403, "Refused", ["Reload the page and try again."])
        if f.get("role") in s.roles:
            s.role = f["role"]
        return RedirectResponse(safe_next(f.get("next")), 303)


HISTORY_ROWS = 12


def _last(rows: list[tuple[str, str, str, str, int]]) -> list[tuple[str, str, str]]:
    """The last HISTORY_ROWS rows (runs of re-notification folded into one)."""
    out = [(t, s, what) for t, s, what, _, _ in rows[-HISTORY_ROWS:]]
    if len(rows) > HISTORY_ROWS:
        out.insert(0, ("", "", f"... {len(rows) - HISTORY_ROWS} earlier rows"))
    return out


def thresholds(rules: list[r.RuleDef], weight_kg: float | None,
               disabled: set[str]) -> list[tuple[float, str, str]]:  # fmt: skip
    """(mL in 60 min, its label, the rules) of the hourly lines the bed's rules draw."""
    lines: dict[float, tuple[str, list[str]]] = {}
    for rule in rules:
        if not rule.enabled or rule.id in disabled:
            continue
        c = rule.check
        if isinstance(c, r.HourlyAbove):
            v, label = c.threshold_ml_h, f"{num(c.threshold_ml_h)} mL/h"
        elif isinstance(c, r.Hypovolaemia):
            v, label = c.hourly_above_ml, f"{num(c.hourly_above_ml)} mL/h"
        elif isinstance(c, r.RateBelow) and weight_kg:
            v = c.threshold_ml_kg_h * weight_kg
            label = f"{num(v)} mL/h ({num(c.threshold_ml_kg_h, 1)}/kg)"
        else:
            continue
        key = round(v, 1)
        lines.setdefault(key, (label, []))[1].append(rule.id)
    return [(v, label, ", ".join(ids)) for v, (label, ids) in sorted(lines.items(), reverse=True)]
