"""One safety caution, in one place: every summary of replay, campaign and report ends with it,
the report page carries it, and the README says it in the same words."""

from __future__ import annotations

import html
import json

from campaign_support import store_with_demos_and_skill
from cli_support import run_cli
from store_support import REPO

from compliant_demo.cautions import SAFETY_CAUTION


def test_the_caution_names_the_standards_and_who_decides():
    assert "does not certify a robot as safe" in SAFETY_CAUTION
    for needle in ("ISO 10218", "ISO/TS 15066", "local regulations", "licensed practice"):
        assert needle in SAFETY_CAUTION


def test_replay_campaign_and_report_summaries_end_with_the_caution(tmp_path, capsys):
    store = tmp_path / "store.sqlite"
    store_with_demos_and_skill(store)
    short = ["--duration", "1.0", "--settle", "0.2", "--quiet"]
    status, out, err = run_cli(capsys, "replay", "--store", store, *short)
    assert status == 0, err
    assert out.splitlines()[-1] == SAFETY_CAUTION
    _closes_with_the_verdict(out)
    status, out, err = run_cli(capsys, "campaign", "--store", store, "--scenarios", "3",
                               "--workers", "0", *short)  # fmt: skip
    assert status == 0, err
    assert out.splitlines()[-1] == SAFETY_CAUTION
    _closes_with_the_verdict(out)
    status, out, err = run_cli(capsys, "report", "--store", store, "--out", tmp_path / "rep",
                               "--quiet")  # fmt: skip
    assert status == 0, err
    assert out.splitlines()[-1] == SAFETY_CAUTION
    _closes_with_the_verdict(out)
    page = (tmp_path / "rep" / "report.html").read_text(encoding="utf-8")
    assert html.escape(SAFETY_CAUTION) in page
    # JSON stays one document for scripts: no caution line mixed into it
    status, out, _ = run_cli(capsys, "replay", "--store", store, *short, "--json")
    assert json.loads(out)["status"] == "ok"


def _closes_with_the_verdict(out: str) -> None:
    """The verdict line and its numbered reasons come right before the caution."""
    lines = out.splitlines()[:-1]
    start = max(i for i, line in enumerate(lines) if line.startswith("verdict: "))
    assert lines[start].startswith(("verdict: ready", "verdict: NOT READY")), lines[start]
    assert all(line.startswith("  ") for line in lines[start + 1:]), lines[start:]


def test_the_readme_uses_the_same_words():
    text = (REPO / "README.md").read_text(encoding="utf-8")
    flowing = " ".join(text.replace("\n> ", "\n").split())
    assert flowing.count(SAFETY_CAUTION) >= 2  # the safety note and the tour's output
