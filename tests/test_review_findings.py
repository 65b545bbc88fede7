"""Findings of a review of the replay tools on realistic nights: each test pins one
defect that was found (bad input that escaped as a traceback, evidence shown in a form
a reader cannot use, readings left out of an explanation). All data is invented
(tests/reviewtools.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

from daemon.cli import main
from tests.reviewtools import write_night


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_night(tmp_path_factory.mktemp("findings") / "night.jsonl")


def test_a_plots_folder_that_cannot_be_made_is_one_line_and_exit_2(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    out = tmp_path / "night.html"
    rc = main(["replay", str(night), "--report", str(out), "--plots", str(blocker / "plots")])
    err = capsys.readouterr().err
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and "plots" in err, err
