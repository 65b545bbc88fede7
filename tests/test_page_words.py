"""A page reads true in every state, and a pager line too short for everything keeps
what matters: never a "criterion met" on a resolved page, never a threshold that reads
as the value's own, never a number cut in the middle.

All beds, meters, people and results here are invented; no patient data.
"""

from __future__ import annotations

import re

from hypothesis import given
from hypothesis import strategies as st

from daemon.engine.alarms import (
    PAGER_CAUTION,
    PAGER_MAX,
    STATE_WORDS,
    AlarmEvent,
    Kind,
    Priority,
    State,
    pager_what,
    shorten,
)
from tests.ruletools import Bed, Ward, at, rule, ruleset

KDIGO_1 = "KDIGO stage 1 urine-output criterion met: < 0.5 mL/kg/h over 6 h"


def started(weight_kg: float = 70.0, **ward: object) -> Bed:
    bed = Bed(Ward(**ward), weight_kg=weight_kg)  # type: ignore[arg-type]
    bed.bind()
    bed.start()
    return bed


# --- what a page is about, by state ------------------------------------------------------


def test_an_ended_alarm_says_its_criterion_is_no_longer_met() -> None:
    assert pager_what(KDIGO_1, State.ACTIVE) == "KDIGO stage 1 urine-output criterion met"
    assert pager_what(KDIGO_1, State.ESCALATED).endswith("criterion met")
    for ended in (State.RESOLVED, State.INACTIVE):
        assert pager_what(KDIGO_1, ended) == "KDIGO stage 1 urine-output criterion no longer met"
    # a title that names no criterion reads the same in every state
    assert pager_what("Flow stopped: check the catheter", State.RESOLVED) == "Flow stopped"


def test_kdigo_stage_1_resolves_in_words_that_match_its_numbers() -> None:
    """E1 (70 kg at 28 mL/h = 0.40 mL/kg/h for 7 h) meets stage 1; then 60 mL/h brings
    the 6-h mean back over 0.5 mL/kg/h and the alarm ends after its clear-hold."""
    # source: KDIGO 2012 AKI guideline, Table 2 (< 0.5 mL/kg/h for 6 h); worked example E1
    bed = started(70.0)
    bed.hours([28.0] * 7)
    bed.hours([60.0] * 4)  # invented recovery
    w = bed.ward
    active = w.first("oliguria-kdigo-1")
    ended = w.first("oliguria-kdigo-1", State.RESOLVED)
    assert active is not None and ended is not None
    assert "ALARM low: KDIGO stage 1 urine-output criterion met." in active.pager()
    assert "RESOLVED low: KDIGO stage 1 urine-output criterion no longer met." in ended.pager()
    rate = float(ended.summary.split(" mL/kg/h")[0])
    assert rate >= 0.5 and "(alarm below 0.5;" in ended.summary
    assert "criterion met" not in ended.pager()


def test_every_hour_mode_does_not_claim_every_hour_is_low_once_one_is_not() -> None:
    """Every-hour stage 1 at 70 kg: each of six rolling hours under 35 mL (0.5 mL/kg/h);
    an hour of 60 mL ends it (its clear-hold is 30 min, alert_rules/oliguria-kdigo-1.toml)."""
    # source: KDIGO 2012 AKI guideline, Table 2 (< 0.5 mL/kg/h for 6 h)
    bed = started(70.0, rules=ruleset(rule("oliguria-kdigo-1", mode="every_hour")))
    bed.hours([20.0] * 7)  # invented
    bed.hours([60.0] * 3)
    ended = bed.ward.first("oliguria-kdigo-1", State.RESOLVED)
    assert ended is not None
    assert ended.summary.startswith("highest hour ") and ended.summary.endswith(
        " mL/kg/h in the last 6 h (alarm when every hour is below 0.5)"
    )
    assert float(ended.summary.split()[2]) >= 0.5  # the hour that ended it, in its words
    assert "every hour of the last" not in ended.summary


def test_a_hypovolaemia_page_keeps_its_signs_and_what_to_do() -> None:
    """SI 116/80 = 1.45 (>= 1.0 abnormal, Mutschler 2013), MAP 60 (< 65, Surviving
    Sepsis Campaign 2021), heart rate 116 (> 100, common practice) with 300 mL/h."""
    bed = started(70.0)
    bed.hours([300.0] * 3)  # invented
    bed.vitals(at(3, seconds=20), heart_rate_bpm=116, systolic_mmhg=80, mean_mmhg=60)
    bed.hours([300.0])
    # signs clear: SI 80/125 = 0.64, MAP 90, heart rate 80 (same sources)
    bed.vitals(at(4, seconds=20), heart_rate_bpm=80, systolic_mmhg=125, mean_mmhg=90)
    bed.hours([300.0])
    w = bed.ward
    hypo = w.first("hypovolaemia-risk")
    ended = w.first("hypovolaemia-risk", State.RESOLVED)
    assert hypo is not None and ended is not None
    page = hypo.pager()
    assert len(page) <= PAGER_MAX
    for words in ("assess volume status", "resuscitation per clinician", "shock index 1.45",
                  "MAP 60 mmHg", "heart rate 116/min"):  # fmt: skip
        assert words in page, page
    assert "no sign of hypovolaemia" in ended.summary and "shock index" not in ended.summary


# --- the pager line's length --------------------------------------------------------------

WORD = st.one_of(
    st.from_regex(r"[a-z]{1,10}", fullmatch=True),
    st.from_regex(r"[0-9]{1,4}(\.[0-9]{1,2})?", fullmatch=True).map(lambda n: f"{n} mL"),
)
CLAUSE = st.lists(WORD, min_size=1, max_size=6).map(" ".join)
DETAIL = CLAUSE.map(lambda c: f" (alarm below {c})")


@st.composite
def summaries(draw: st.DrawFn) -> str:
    parts = draw(st.lists(st.tuples(CLAUSE, st.one_of(st.just(""), DETAIL)), min_size=1,
                          max_size=8))  # fmt: skip
    sep = draw(st.sampled_from(["; ", ", ", ": "]))
    return sep.join(c + d for c, d in parts)


@given(
    summary=summaries(),
    title=st.sampled_from([KDIGO_1, "Flow stopped: check the catheter", "x" * 100]),
    state=st.sampled_from(list(State)),
    advice=st.one_of(st.none(), st.just("Suggest 150-225 mL/h 0.45% NaCl per order.")),
    holding=st.lists(st.sampled_from(["oliguria-kdigo-1", "anuria-12h"]), max_size=2),
)
def test_a_pager_line_fits_ends_with_the_caution_and_cuts_only_between_words(
    summary: str, title: str, state: State, advice: str | None, holding: list[str]
) -> None:
    e = AlarmEvent(
        time=at(1), alarm_id="a1", bed="bed-07", ward="unit-c", rule="r", priority=Priority.LOW,
        kind=Kind.PHYSIOLOGICAL, state=state, reason="", summary=summary, evidence={}, tier=0,
        notify=(), title=title, clock="03:10", holding_back=tuple(holding),
        advice={"pager": advice} if advice else None,
    )  # fmt: skip
    page = e.pager()
    assert len(page) <= PAGER_MAX and page.endswith(PAGER_CAUTION)
    head = f"03:10 bed-07 {STATE_WORDS[state]} low: "
    assert page.startswith(head)
    if state in (State.RESOLVED, State.INACTIVE):
        assert "criterion met" not in page
    what = pager_what(title, state)
    if not page.startswith(f"{head}{what}. "):
        return  # a title too long to leave room for numbers: the head itself is cut
    rest = page[len(head) + len(what) + 2 :]
    bare = re.sub(r" ?\([^()]*\)", "", summary)
    if rest.startswith(f"{summary}."):
        return  # whole
    if rest.startswith(f"{bare}."):
        return  # without its bracketed details
    if "..." not in rest:  # no room left for numbers at all: bed, what and tail only
        assert len(page) > PAGER_MAX - 12 and not rest.startswith(summary)
        return
    kept = rest.split("...")[0]
    assert bare.startswith(kept)
    assert bare[len(kept)] in " ;,:", (kept, bare)  # between words, never inside one


def test_shorten_keeps_a_summary_that_fits_and_drops_details_first() -> None:
    text = "serum sodium 134 mmol/L at 12:30 (0.8 h ago; alarm below 135); order on file"
    assert shorten(text, 200) == text
    assert shorten(text, 60) == "serum sodium 134 mmol/L at 12:30; order on file"
    assert shorten(text, 40) == "serum sodium 134 mmol/L at 12:30.."


def test_a_replacement_share_never_reads_as_its_own_line() -> None:
    """The demo paged "intake 896 mL = 100% of output 892 mL (alarm above 100%)": 896 / 892
    is 100.4%, above the line, but whole percent read as the line itself."""
    from daemon.engine.checks import _share

    # the lines of alert_rules/replacement-excess.toml (100%) and replacement-behind.toml
    # (50%): common practice, no single source
    assert _share(896 / 892, 1.0) == "100.4%"
    assert _share(0.4996, 0.5) == "49.96%"
    assert _share(1.0, 1.0) == "100%"  # exactly the line: nothing to tell apart
    assert _share(633 / 1390, 0.5) == "46%"  # far from the line: whole percent
