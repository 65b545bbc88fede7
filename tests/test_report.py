"""`hourwatch replay SOURCE --report OUT.html`: one well-formed, self-contained file
with one plot per bed, an alarm table linking to explanations, data quality and the
caution. All data is invented (tests/reviewtools.py)."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from daemon.caution import CAUTION
from daemon.cli import main
from tests.reviewtools import ACK_BY, alarm_events, write_night

VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}  # fmt: skip
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class Checker(HTMLParser):
    """Tags must nest and close; collects ids, links, images and every attribute."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.ids: list[str] = []
        self.hrefs: list[str] = []
        self.imgs: list[dict[str, str | None]] = []
        self.attrs: list[tuple[str, str | None]] = []
        self.doctype = False

    def handle_decl(self, decl: str) -> None:
        self.doctype = decl.lower() == "doctype html"

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.attrs += attrs
        if a.get("id"):
            self.ids.append(str(a["id"]))
        if tag == "a" and a.get("href") is not None:
            self.hrefs.append(str(a["href"]))
        if tag == "img":
            self.imgs.append(a)
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.attrs += attrs
        if tag not in VOID:
            self.errors.append(f"self-closed <{tag}/>")

    def handle_endtag(self, tag: str) -> None:
        if tag in VOID:
            self.errors.append(f"end tag for void <{tag}>")
        elif not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
        else:
            self.stack.pop()


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, Checker, Path]:
    tmp = tmp_path_factory.mktemp("report")
    night = write_night(tmp / "night.jsonl")
    out = tmp / "night.html"
    assert main(["replay", str(night), "--report", str(out), "--plots", str(tmp / "plots")]) == 0
    text = out.read_text(encoding="utf-8")
    checker = Checker()
    checker.feed(text)
    checker.close()
    return night, text, checker, tmp


def test_well_formed(made: tuple[Path, str, Checker, Path]) -> None:
    _, _, c, _ = made
    assert c.doctype
    assert c.errors == []
    assert c.stack == []  # everything opened was closed
    assert len(c.ids) == len(set(c.ids))  # anchors are unique


def test_one_plot_per_bed(made: tuple[Path, str, Checker, Path]) -> None:
    _, _, c, tmp = made
    plots = [i for i in c.imgs if str(i.get("src", "")).startswith("data:image/png;base64,")]
    assert len(plots) == len(c.imgs) == 3  # bed-sev, bed-bord, bed-norm
    for img in plots:
        data = base64.b64decode(str(img["src"]).split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        assert img.get("alt")
    assert sorted(p.name for p in (tmp / "plots").iterdir()) == [
        "bed-bord.png", "bed-norm.png", "bed-sev.png",
    ]  # fmt: skip


def test_no_external_reference(made: tuple[Path, str, Checker, Path]) -> None:
    _, text, c, _ = made
    for name, value in c.attrs:
        if name in ("src", "href", "srcset", "action", "poster", "data"):
            assert value is not None
            if name == "src":
                assert value.startswith("data:"), value
            else:
                assert value.startswith("#"), value
    stripped = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text)
    for needle in ("http:", "https:", "//", "@import", "url("):
        assert needle not in stripped, needle


def test_alarm_table_links_to_explanations(made: tuple[Path, str, Checker, Path]) -> None:
    night, text, c, _ = made
    raised = {e.alarm_id for e in alarm_events(night) if e.state == "active"}
    assert len(raised) == 4  # pod-hourly and replacement-behind on two invented beds
    ids = set(c.ids)
    for href in c.hrefs:
        assert href[1:] in ids, href  # every link lands inside the file
    for alarm_id in raised:
        assert alarm_id in text
        anchor = "alarm-" + re.sub(r"[^A-Za-z0-9_.-]", "-", alarm_id)
        assert anchor in ids and f'href="#{anchor}"' in text
    assert "recomputed windows equal the alarm event" in text
    assert "<th>pages per bed-day</th>" in text and "<th>pages per alarm</th>" in text


def test_acknowledgement_shown(made: tuple[Path, str, Checker, Path]) -> None:
    _, text, _, _ = made
    assert f"{ACK_BY} (bedside-nurse)" in text  # in the alarm table and the lifecycle


def test_quality_and_caution(made: tuple[Path, str, Checker, Path]) -> None:
    _, text, _, _ = made
    assert 'id="quality"' in text
    for meter in ("rc-9001", "rc-9002", "rc-9003"):
        assert meter in text
    assert text.count(CAUTION) >= 2  # top and bottom


def test_a_journal_source_gives_the_same_report(
    made: tuple[Path, str, Checker, Path], tmp_path: Path
) -> None:
    import json

    from daemon.journal import SqliteJournal
    from daemon.logfile import BadLine, read_log

    night, text, _, _ = made
    journal = SqliteJournal(tmp_path / "night.journal")
    rows = []
    for item in read_log(night):
        assert not isinstance(item, BadLine)
        _, rec = item
        p = rec.payload
        raw = (json.dumps(p) if isinstance(p, dict) else p).encode()
        rows.append((rec.time.timestamp(), rec.topic, raw, 1))
    journal.append_messages(rows)
    out = tmp_path / "journal.html"
    assert main(["replay", str(tmp_path / "night.journal"), "--report", str(out)]) == 0
    from_journal = out.read_text(encoding="utf-8")

    def alarm_rows(html_text: str) -> list[str]:
        return re.findall(r'<tr><td><a href="#alarm-[^"]+">[^<]+</a>.*?</tr>', html_text)

    assert alarm_rows(from_journal) == alarm_rows(text) != []
