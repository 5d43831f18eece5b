"""Commands that start worker processes, killed by SIGKILL mid-run: no child outlives them, and
the store they wrote to is sound, with the unfinished campaign shown as unfinished.

Covers what test_campaign_lifetime (campaign, one worker) and test_launch_supervision (tour while
it records) leave open: a pool of two workers, ``compare``, ``tour`` killed in its campaign, and
what a tour killed while it records leaves in the store.
"""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import pytest
from campaign_lifetime_support import sigkill_mid_run, template_store

from compliant_demo.learning import load_skill, save_skill
from compliant_demo.primitives import DampingPolicy
from compliant_demo.store import DemoStore

pytestmark = pytest.mark.slow

TOUR_DOMAIN_ID = 98  # this file's own ROS domain (tests use 20-99)
SHORT = ["--duration", "1.5", "--settle", "0.3", "--quiet"]


def _campaigns_after_the_kill(path: Path) -> list:
    """The store's findings must be none; returns its campaigns as listed for people."""
    with DemoStore(path) as store:
        assert store.verify() == []
        campaigns = store.list_campaigns()
        for campaign in campaigns:
            stored = store.completed_scenarios(campaign.id)
            # one result per scenario, whatever was in flight when the parent died
            assert len(stored) == campaign.scenarios_stored, campaign
    return campaigns


def _verdict_campaigns(path: Path) -> set[str]:
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as conn:
        return {row[0] for row in conn.execute("SELECT campaign_id FROM verdicts")}


@pytest.fixture
def path(tmp_path: Path) -> Path:
    """A store holding the cork_seat demonstrations and skill."""
    template, _ = template_store(tmp_path)
    return Path(shutil.copy(template, tmp_path / "killed.sqlite"))


def test_a_campaign_on_two_workers_killed_leaves_no_worker_and_an_unfinished_campaign(
    path: Path,
) -> None:
    argv = ["campaign", "--store", str(path), "--scenarios", "2000", "--seed", "4",
            "--batch-size", "2", "--workers", "2", *SHORT]
    workers, survivors = sigkill_mid_run(argv, path, min_children=2)
    assert len(workers) >= 2 and survivors == []
    (campaign,) = _campaigns_after_the_kill(path)
    assert campaign.scenarios_planned == 2000
    assert 0 < campaign.scenarios_stored < 2000


def test_compare_killed_mid_campaign_leaves_no_worker_and_no_verdict_of_it(path: Path) -> None:
    with DemoStore(path) as store:  # version 2 of the skill, with another damping ratio
        skill = load_skill(store, "cork_seat").skill
        save_skill(store, skill.model_copy(update={"damping_policy": DampingPolicy(zeta=0.2)}))
    argv = ["compare", "cork_seat:1", "cork_seat:2", "--store", str(path),
            "--scenarios", "2000", "--workers", "2", *SHORT]
    workers, survivors = sigkill_mid_run(argv, path, min_children=2)
    assert len(workers) >= 2 and survivors == []
    (campaign,) = _campaigns_after_the_kill(path)
    assert (campaign.skill_version, campaign.scenarios_planned) == (1, 2000)
    assert 0 < campaign.scenarios_stored < 2000
    # compare stores a side's verdict only after its whole campaign
    assert campaign.id not in _verdict_campaigns(path)


@pytest.mark.ros
def test_a_tour_killed_in_its_campaign_leaves_no_worker_and_no_node(tmp_path: Path) -> None:
    from nodes_support import ros_env

    path = tmp_path / "store.sqlite"
    argv = ["tour", "--demos", "2", "--scenarios", "2000", "--workers", "2", "--store",
            str(path), "--out", str(tmp_path / "out"), "--domain-id", str(TOUR_DOMAIN_ID),
            "--quiet"]
    children, survivors = sigkill_mid_run(argv, path, min_children=2,
                                          env=ros_env(TOUR_DOMAIN_ID))
    assert len(children) >= 2 and survivors == []
    campaigns = _campaigns_after_the_kill(path)
    assert len(campaigns) == 1 and 0 < campaigns[0].scenarios_stored < 2000
    with DemoStore(path, read_only=True) as store:
        assert {info.status for info in store.find_demonstrations()} == {"complete"}


@pytest.mark.ros
def test_a_tour_killed_while_recording_leaves_no_node_and_no_open_demonstration(
    tmp_path: Path,
) -> None:
    from nodes_support import ros_env

    path = tmp_path / "store.sqlite"

    def recording(path: Path) -> bool:
        with DemoStore(path, read_only=True) as store:
            return any(True for _ in store.find_demonstrations())

    argv = ["tour", "--demos", "3", "--scenarios", "7", "--store", str(path), "--out",
            str(tmp_path / "out"), "--domain-id", str(TOUR_DOMAIN_ID), "--quiet"]
    nodes, survivors = sigkill_mid_run(argv, path, min_children=2, env=ros_env(TOUR_DOMAIN_ID),
                                       ready=recording)
    assert len(nodes) >= 2 and survivors == []
    # The recorder, told to end by the kernel when its parent died, finished what was open.
    with DemoStore(path) as store:
        assert store.verify() == []
        statuses = [info.status for info in store.find_demonstrations()]
        assert statuses and set(statuses) <= {"complete", "incomplete"}, statuses
        assert store.list_campaigns() == []
