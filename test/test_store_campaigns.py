"""Ids for people: any unique id prefix names a demonstration, skill, campaign or result (in the
store API and every CLI option that takes an id); campaigns are listed with their progress; a
campaign run says its id at start and how to resume it when interrupted."""

from __future__ import annotations

import json
import re
import shlex

import pytest
from campaign_support import store_with_demos_and_skill
from store_support import add_demo

from compliant_demo.cli import main
from compliant_demo.exceptions import InvalidInputError, NotFoundError
from compliant_demo.store import DemoStore, ReplayParameters

TWINS = ("aaaa0000-0000-4000-8000-000000000001", "aaaa1111-0000-4000-8000-000000000002")
SHORT = ["--duration", "1.5", "--settle", "0.3", "--workers", "0"]


@pytest.fixture
def store():
    with DemoStore(":memory:") as opened:
        yield opened


def test_a_unique_prefix_names_a_record_of_every_kind(store):
    demo_ids = [add_demo(store, demo_id=demo_id) for demo_id in TWINS]
    skill = store.save_skill("cork_seat", {}, demonstration_ids=demo_ids, parameters={})
    campaign = store.create_campaign(skill.id, {"n_scenarios": 3}, TWINS[0])
    result = store.save_replay_result(
        skill_id=skill.id, metrics={}, parameters=ReplayParameters(source="command")
    )
    assert store.resolve_id("demonstration", "aaaa1") == TWINS[1]
    assert store.resolve_id("demonstration", "AAAA0") == TWINS[0]
    assert store.resolve_id("demonstration", TWINS[0]) == TWINS[0]
    assert store.resolve_id("skill", skill.id[:6]) == skill.id
    assert store.resolve_id("campaign", "a") == campaign
    assert store.resolve_id("result", result[:8]) == result


def test_an_ambiguous_or_unknown_prefix_names_the_prefix(store):
    for demo_id in TWINS:
        add_demo(store, demo_id=demo_id)
    with pytest.raises(
        InvalidInputError,
        match=f"demonstration id prefix 'aaaa' is ambiguous: it starts {TWINS[0]}, {TWINS[1]}$",
    ):
        store.resolve_id("demonstration", "aaaa")
    with pytest.raises(NotFoundError, match="no campaign id starts with 'aaaa'"):
        store.resolve_id("campaign", "aaaa")
    with pytest.raises(InvalidInputError, match="skill id must not be empty"):
        store.resolve_id("skill", " ")
    with pytest.raises(InvalidInputError, match="kind must be one of .*; got 'robot'"):
        store.resolve_id("robot", "aaaa")


def test_campaigns_are_listed_with_their_progress(store):
    skill = store.save_skill("cork_seat", {}, demonstration_ids=[add_demo(store)], parameters={})
    first = store.create_campaign(skill.id, {"n_scenarios": 3})
    second = store.create_campaign(skill.id, {"seed": 1})
    for index in range(2):
        store.save_replay_result(
            skill_id=skill.id, metrics={}, campaign_id=first, scenario_index=index,
            parameters=ReplayParameters(source="campaign", scenario_index=index),
        )  # fmt: skip
    listed = store.list_campaigns()
    progress = [(c.id, c.skill_name, c.skill_version, c.scenarios_stored, c.scenarios_planned)
                for c in listed]  # fmt: skip
    assert progress == [(first, "cork_seat", 1, 2, 3), (second, "cork_seat", 1, 0, None)]
    assert listed[0].created <= listed[1].created


@pytest.fixture
def job_store(tmp_path):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    return path


def _run(capsys, *argv):
    status = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_campaign_says_its_id_and_how_to_resume_after_an_interrupt(job_store, capsys, monkeypatch):
    original = DemoStore.save_replay_result
    calls = []

    def interrupted_third(self, **kwargs):
        calls.append(kwargs["scenario_index"])
        if len(calls) == 3:
            raise KeyboardInterrupt
        return original(self, **kwargs)

    monkeypatch.setattr(DemoStore, "save_replay_result", interrupted_third)
    status, _, err = _run(capsys, "campaign", "--store", job_store, "--scenarios", "7",
                          "--batch-size", "1", *SHORT)  # fmt: skip
    assert status == 130
    lines = err.strip().splitlines()
    campaign_id = lines[0].split()[1].rstrip(":")
    assert lines[0] == f"campaign {campaign_id}: started"
    command = f"compliant-demo campaign --store {job_store} --resume {campaign_id}"
    assert lines[-2] == (
        f"campaign {campaign_id}: interrupted with 2 of 7 scenarios stored; resume with: {command}"
    )
    monkeypatch.undo()
    status, out, err = _run(capsys, *shlex.split(command)[1:], "--workers", "0", "--json")
    assert status == 0, err
    assert err.strip() == f"campaign {campaign_id}: resuming"
    assert (json.loads(out)["run"], json.loads(out)["skipped"]) == (5, 2)

    status, out, _ = _run(capsys, "campaigns", "--store", job_store, "--json")
    (listed,) = json.loads(out)
    assert (listed["id"], listed["scenarios_stored"], listed["scenarios_planned"]) == (
        campaign_id, 7, 7
    )  # fmt: skip
    status, out, _ = _run(capsys, "campaigns", "--store", job_store)
    header, row = out.splitlines()
    assert header.split() == ["id", "skill", "version", "stored", "planned", "created"]
    assert row.split()[:5] == [campaign_id, "cork_seat", "1", "7", "7"]
    # The same time format as every other listing (``list``): ISO 8601, one token.
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", row.split()[5]), row


def test_cli_options_take_unique_prefixes(job_store, capsys):
    status, out, err = _run(capsys, "campaign", "--store", job_store, "--scenarios", "2",
                            "--json", *SHORT)  # fmt: skip
    assert status == 0, err
    campaign_id = json.loads(out)["campaign_id"]
    status, out, err = _run(capsys, "campaign", "--store", job_store, "--resume",
                            campaign_id[:5], "--json", "--workers", "0")  # fmt: skip
    assert status == 0, err
    assert json.loads(out)["campaign_id"] == campaign_id
    status, out, err = _run(capsys, "report", "--store", job_store, "--campaign",
                            campaign_id[:6], "--out", job_store.parent / "rep", "--json",
                            "--quiet")  # fmt: skip
    assert status == 0, err
    assert campaign_id in json.loads(out)["summary"]["campaign"]
    with DemoStore(job_store, read_only=True) as store:
        demo_id = next(store.find_demonstrations()).id
    status, out, err = _run(capsys, "show", demo_id[:6], "--store", job_store, "--json")
    assert status == 0, err
    assert json.loads(out)["id"] == demo_id
    status, _, err = _run(capsys, "campaign", "--store", job_store, "--resume", "zz")
    assert status == 2 and "no campaign id starts with 'zz'" in err
