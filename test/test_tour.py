"""The tour end to end: teacher and recorder as real ROS 2 processes on loopback, learning, a
campaign over every perturbation kind, and the report opened in headless Chromium."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from _chromium import visit

from compliant_demo.app.report_content import GroundTruth
from compliant_demo.app.supervisor import node_environment
from compliant_demo.app.tour import (
    TourError,
    TourSettings,
    run_tour,
)
from compliant_demo.cli import main
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.perturbation import PERTURBATION_KINDS
from compliant_demo.resources import package_launch_file
from compliant_demo.store import DemoStore

DOMAIN_ID = 47  # this file's own ROS domain (tests use 20-99)


@pytest.mark.ros
@pytest.mark.slow
def test_tour_records_learns_runs_the_campaign_and_writes_the_report(tmp_path, capsys,
                                                                     monkeypatch):
    # The test process itself stays on loopback too, whatever it imports.
    monkeypatch.setenv("ROS_AUTOMATIC_DISCOVERY_RANGE", "LOCALHOST")
    monkeypatch.setenv("ROS_DOMAIN_ID", str(DOMAIN_ID))
    store, out = tmp_path / "store.sqlite", tmp_path / "tour"
    # the readiness verdict's done-when command, with this test's store, folder, seed and domain
    plant = Path(__file__).resolve().parents[1] / "config" / "joint_cork_seat_antagonistic.yaml"
    status = main(["tour", "--demos", "2", "--scenarios", "28", "--json", "--plant", str(plant),
                   "--store", str(store), "--out", str(out), "--seed", "3",
                   "--domain-id", str(DOMAIN_ID), "--workers", "2"])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    result = json.loads(captured.out)  # exactly one JSON object on stdout
    # antagonistic springs have no damping input: the skill's damping ratio stays near 0.01
    # along the whole skill against the criteria's 0.5, the first and most severe reason
    assert result["verdict"] == "not_ready"
    first = result["reasons"][0]
    assert first["check"] == "under_damped" and first["threshold"] == 0.5
    assert first["value"] < 0.05 and first["from_s"] == 0.0 and first["to_s"] > 5.0
    assert all({"check", "joint", "from_s", "to_s", "value", "threshold", "unit"} <= set(r)
               for r in result["reasons"])

    with DemoStore(store, read_only=True) as opened:
        demos = [opened.get_info(i) for i in result["demonstration_ids"]]
        skill = opened.load_skill_record("cork_seat")
        results = list(opened.find_replay_results(campaign_id=result["campaign"]["id"]))
        stored = opened.latest_verdict(skill_id=result["skill"]["id"],
                                       plant_digest=result["plant_digest"],
                                       criteria_digest=result["criteria_digest"])
    assert stored is not None and stored.id == result["verdict_id"]
    assert (stored.verdict, stored.reasons) == (result["verdict"], result["reasons"])
    assert stored.campaign_id == result["campaign"]["id"] and stored.skill_version == 1
    assert [d.status for d in demos] == ["complete", "complete"]
    assert all(d.tags == (result["tag"],) for d in demos)  # this run's demonstrations only
    assert all(d.has_stiffness and 5500 < d.n_samples < 7500 for d in demos)  # 6 s at 1 kHz
    assert skill.id == result["skill"]["id"]
    assert sorted(skill.demonstration_ids) == sorted(result["demonstration_ids"])
    assert len(results) == 28
    assert sorted({r.parameters.kind for r in results}) == sorted(PERTURBATION_KINDS)
    assert set(result["timings_s"]) == {"record", "learn", "campaign", "report", "total"}
    # The default target has antagonistic springs: no damping input, so the checks flag the
    # teacher's stiffness as under-damped on it.
    assert result["summary"]["plant"] == "antagonistic mechanism on joints shoulder, elbow"

    assert result["seed"] == 3 and result["domain_id"] == DOMAIN_ID and not result["seed_drawn"]
    assert result["truth"] == str(out / f"teacher_truth_{result['tag']}.npz")
    assert Path(result["truth"]).is_file() and Path(result["log"]).is_file()
    seen = visit(out / "report.html")
    assert seen.errors == []
    assert [i["figure"] for i in seen.images] == [
        "fig-demonstrations", "fig-stiffness_estimate", "fig-schedule_checks",
        "fig-replay_traces", "fig-campaign_metrics"]
    assert all(i["complete"] and i["width"] > 300 for i in seen.images)
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "estimate coverage" in page and "cork_seat version 1" in page
    assert "ISO/TS 15066" in page and "Limit violations in the campaign" in page
    assert "<td>under_damped</td>" in page
    assert page.index('id="verdict"') < page.index("Safety cautions")
    assert f'<a href="#{first["link"]}">' in page and f'<tr id="{first["link"]}">' in page


def test_node_processes_get_loopback_discovery_and_their_domain(monkeypatch):
    monkeypatch.setenv("ROS_DOMAIN_ID", "3")
    monkeypatch.delenv("ROS_AUTOMATIC_DISCOVERY_RANGE", raising=False)
    env = node_environment(61)
    assert env["ROS_AUTOMATIC_DISCOVERY_RANGE"] == "LOCALHOST"
    assert env["ROS_DOMAIN_ID"] == "61"
    assert os.environ["ROS_DOMAIN_ID"] == "3"  # this process's own environment is untouched


def test_the_recording_launch_file_ships_with_the_package():
    assert package_launch_file("record.launch.xml").name == "record.launch.xml"
    with pytest.raises(InvalidInputError, match=r"launch file 'nope.launch.xml' not found"):
        package_launch_file("nope.launch.xml")


@pytest.mark.parametrize(("changes", "message"), [
    ({"n_demonstrations": 1}, r"n_demonstrations = 1: must be 2 to 50"),
    ({"n_scenarios": 0}, r"n_scenarios = 0: must be >= 1"),
    ({"domain_id": 102}, r"domain_id = 102: must be 0 to 101"),
    ({"record_timeout_s": 0.0}, r"record_timeout_s = 0.0: must be > 0 s"),
    ({"demo_duration_s": 0.5}, r"demo_duration_s = 0.5: must be 1 to 60 s"),
    ({"seed": 2**31 - 2}, r"seed = 2147483646: must be 0 to 2\*\*31 - 1 - n_demonstrations"),
])
def test_bad_tour_settings_are_refused(tmp_path, changes, message):
    with pytest.raises(InvalidInputError, match=message):
        TourSettings(store=tmp_path / "s.sqlite", out_dir=tmp_path, **changes)


_FAILING_LAUNCH = """<launch>
  <arg name="store" default=""/>
  <arg name="demos" default="2"/>
  <arg name="seed" default="1"/>
  <arg name="operator" default="operator_a"/>
  <arg name="truth" default=""/>
  <node pkg="compliant_demo" exec="recorder_node" name="recorder">
    <param name="store_path" value="$(var store)"/>
  </node>
  <node pkg="compliant_demo" exec="teacher_node" name="teacher">
    <param name="n_demonstrations" value="0"/>
  </node>
</launch>
"""


@pytest.mark.ros
def test_a_node_that_fails_during_recording_is_a_clear_tour_error(tmp_path):
    # n_demonstrations = 0 is outside the teacher's declared range: its process exits 2, a bad
    # setting, with one FATAL line naming it.
    launch = tmp_path / "failing.launch.xml"
    launch.write_text(_FAILING_LAUNCH, encoding="utf-8")
    settings = TourSettings(store=tmp_path / "s.sqlite", out_dir=tmp_path / "out",
                            n_demonstrations=2, n_scenarios=7, domain_id=DOMAIN_ID + 1,
                            launch_file=launch, record_timeout_s=60.0)
    with pytest.raises(TourError, match=r"teacher node exited with 2 during recording; log .*"
                                        r"Parameter n_demonstrations out of range"):
        run_tour(settings, progress=False)
    (log,) = (tmp_path / "out").glob("nodes_tour-*.log")
    assert log.stat().st_size > 0


@pytest.mark.ros
def test_simulate_teaching_stores_tagged_demonstrations_and_the_truth(tmp_path, capsys):
    store, out = tmp_path / "store.sqlite", tmp_path / "rec"
    status = main(["simulate-teaching", "--store", str(store), "--out", str(out), "--demos", "2",
                   "--demo-duration", "1.5", "--seed", "8", "--operator", "operator_b",
                   "--tag", "bench_morning", "--domain-id", str(DOMAIN_ID + 2), "--json"])
    captured = capsys.readouterr()
    assert status == 0, captured.err
    result = json.loads(captured.out)
    assert result["tag"] == "bench_morning" and len(result["demonstration_ids"]) == 2
    with DemoStore(store, read_only=True) as opened:
        infos = list(opened.find_demonstrations(tag="bench_morning"))
    assert sorted(i.id for i in infos) == sorted(result["demonstration_ids"])
    assert {(i.operator, i.status, i.skill) for i in infos} == {
        ("operator_b", "complete", "cork_seat")}
    assert len(GroundTruth.from_npz(result["truth"]).series) == 2
    assert result["truth"] == str(out / "teacher_truth_bench_morning.npz")
    assert (result["seed"], result["seed_drawn"]) == (8, False)
    assert "run bench_morning: seed 8, ROS domain" in captured.err
