"""Merging store files: ids kept, identical demonstrations skipped, differing ones reported."""

from __future__ import annotations

import sqlite3

import numpy as np
import pytest
from store_support import JOINTS, add_demo, integrity, samples

from compliant_demo.exceptions import InvalidInputError, NotFoundError, StoreCorruptError
from compliant_demo.readiness import Verdict, load_criteria
from compliant_demo.store import DemoStore, ReplayParameters


def test_merge_two_stores(tmp_path):
    bench_a, bench_b = tmp_path / "bench_a.sqlite", tmp_path / "bench_b.sqlite"
    with DemoStore(bench_a) as a, DemoStore(bench_b) as b:
        own = add_demo(a, seed=1, operator="operator_a", tags=["press"])
        theirs = add_demo(b, seed=2, operator="operator_b", tags=["soft", "press"])
        shared = add_demo(b, seed=3)
        changed = add_demo(b, seed=4)
        recording = b.begin_demonstration(skill="cork_seat", joints=JOINTS)  # b stays open
        b.append_chunk(recording, **samples(5))

        report = a.merge_from(bench_b)
        assert sorted(report.added) == sorted([theirs, shared, changed])
        assert [(c.id, c.reason) for c in report.conflicts] == [
            (recording, "still recording in the source")
        ]
        a.mark_status(changed, "rejected", reason="re-judged on bench a")

        again = a.merge_from(bench_b)
        assert again.added == []
        assert sorted(again.skipped_duplicates) == sorted([theirs, shared])
        assert {c.id: c.reason for c in again.conflicts} == {
            recording: "still recording in the source",
            changed: "differs in status",
        }
        merged = a.load_demonstration(theirs)
        assert merged.info.tags == ("soft", "press") and merged.info.operator == "operator_b"
        assert [i.id for i in a.find_demonstrations(tag="soft")] == [theirs]
        assert a.get_info(changed).status == "rejected"
        assert a.get_info(own).status == "complete"
        original = b.load_demonstration(theirs)
        for name in ("t", "position", "velocity", "torque", "stiffness"):
            assert np.array_equal(getattr(merged, name), getattr(original, name))
        assert merged.info.range_of_motion == original.info.range_of_motion
        assert a.integrity_check() == ["ok"]
        assert b.get_info(recording).n_samples == 5
    assert integrity(bench_a) == integrity(bench_b) == "ok"


def test_same_id_with_different_samples_is_a_conflict(tmp_path):
    first, second = tmp_path / "first.sqlite", tmp_path / "second.sqlite"
    with DemoStore(first) as a:
        demo_id = add_demo(a, seed=1, start_time=1.7e9)
    with DemoStore(second) as b:
        data = samples(200, seed=1)
        data["torque"] = data["torque"] + 1e-9
        b.add_demonstration(
            **data, skill="cork_seat", joints=JOINTS, operator="operator_a", start_time=1.7e9,
            demo_id=demo_id,
        )  # fmt: skip
    with DemoStore(first) as a:
        report = a.merge_from(second)
        assert (report.added, report.skipped_duplicates) == ([], [])
        assert [(c.id, c.reason) for c in report.conflicts] == [(demo_id, "differs in samples")]
        assert np.array_equal(a.load_demonstration(demo_id).torque, samples(200, seed=1)["torque"])


def test_merge_refuses_itself_missing_and_foreign_files(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        add_demo(store)
        with pytest.raises(InvalidInputError, match="cannot merge store .* into itself"):
            store.merge_from(path)
        with pytest.raises(NotFoundError, match="store file '.*missing.sqlite' does not exist"):
            store.merge_from(tmp_path / "missing.sqlite")
        assert store.integrity_check() == ["ok"]
    foreign = tmp_path / "foreign.sqlite"
    sqlite3.connect(foreign).execute("CREATE TABLE x (y)").connection.commit()
    with DemoStore(path) as store:
        with pytest.raises(StoreCorruptError, match="no store_schema_history table"):
            store.merge_from(foreign)
        assert len(list(store.find_demonstrations())) == 1


def _skill_campaign_results(store, demo_ids, name="cork_seat"):
    skill = store.save_skill(name, {"w": np.arange(3.0)}, demonstration_ids=demo_ids,
                             parameters={"n_basis": 3})  # fmt: skip
    campaign = store.create_campaign(skill.id, {"scenarios": 2})
    results = [
        store.save_replay_result(
            skill_id=skill.id, metrics={"goal_error_rad": 0.01 * i},
            parameters=ReplayParameters(source="campaign", seed=i),
            trace={"q": np.full((4, 2), float(i))}, campaign_id=campaign, scenario_index=i,
        )  # fmt: skip
        for i in range(2)
    ]
    return skill, campaign, results


def test_merge_copies_skills_campaigns_and_results_with_provenance(tmp_path):
    bench_a, bench_b = tmp_path / "bench_a.sqlite", tmp_path / "bench_b.sqlite"
    criteria = load_criteria()
    digests = {"plant_digest": "ab" * 32, "criteria_digest": criteria.digest}
    with DemoStore(bench_b) as b:
        demo_id = add_demo(b, seed=1)
        skill, campaign, results = _skill_campaign_results(b, [demo_id])
        verdict_id = b.save_verdict(Verdict.from_reasons([]), skill_id=skill.id,
                                    campaign_id=campaign, criteria=criteria.model_dump(),
                                    **digests)
    with DemoStore(bench_a) as a:
        report = a.merge_from(bench_b)
        assert report.verdicts_added == [verdict_id]
        latest = a.latest_verdict(skill.id, **digests)
        assert latest is not None and (latest.id, latest.campaign_id) == (verdict_id, campaign)
        assert report.added == [demo_id]
        assert (report.skills_added, report.campaigns_added) == ([skill.id], [campaign])
        assert report.results_added == results and report.conflicts == []
        copied = a.load_skill_record("cork_seat")
        assert (copied.id, copied.version, copied.demonstration_ids) == (skill.id, 1, (demo_id,))
        assert np.array_equal(copied.payload["w"], np.arange(3.0))
        assert a.completed_scenarios(campaign) == {0, 1}
        assert np.array_equal(a.load_replay_result(results[1]).trace["q"], np.full((4, 2), 1.0))
        again = a.merge_from(bench_b)
        assert again.records_skipped == 1 + 1 + 2 + 1 and again.results_added == []
        assert again.conflicts == []
        assert a.integrity_check() == ["ok"]


def test_merge_reports_clashing_skill_versions_and_what_depends_on_them(tmp_path):
    bench_a, bench_b = tmp_path / "bench_a.sqlite", tmp_path / "bench_b.sqlite"
    with DemoStore(bench_a) as a:
        own_skill, _, _ = _skill_campaign_results(a, [add_demo(a, seed=1)])
    with DemoStore(bench_b) as b:
        skill, campaign, results = _skill_campaign_results(b, [add_demo(b, seed=2)])
    with DemoStore(bench_a) as a:
        report = a.merge_from(bench_b)
        reasons = {c.id: c.reason for c in report.conflicts}
        # bench_a has its own cork_seat version 1: bench_b's is not renumbered, it is reported
        assert reasons[skill.id] == (
            "skill not copied: UNIQUE constraint failed: skills.name, skills.version"
        )
        assert reasons[campaign] == "campaign not copied: FOREIGN KEY constraint failed"
        assert all(reasons[r] == "replay result not copied: FOREIGN KEY constraint failed"
                   for r in results)  # fmt: skip
        assert report.skills_added == [] and len(report.added) == 1
        assert [s.id for s in a.list_skills()] == [own_skill.id]
        assert a.integrity_check() == ["ok"]
