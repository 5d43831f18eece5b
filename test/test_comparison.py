"""Skills side by side: per-kind reduction, the table's layout, and ``compliant-demo compare``
replaying two versions on the very same scenarios."""

from __future__ import annotations

import json
import re
from types import SimpleNamespace

import numpy as np
import pytest
import yaml
from campaign_support import store_with_demos_and_skill
from cli_support import one_line_error, run_cli

from compliant_demo.comparison import (
    ALL_KINDS,
    SideSummary,
    comparison_columns,
    comparison_rows,
    summarise_side,
)
from compliant_demo.learning import load_skill, save_skill
from compliant_demo.plant import load_plant
from compliant_demo.primitives import DampingPolicy
from compliant_demo.store import DemoStore


def _result(kind: str, status: str, goal_error: float, recovery: list) -> SimpleNamespace:
    metrics = {"goal_error_max_rad": goal_error, "recovery_time_s": recovery,
               "recovery_time_max_s": None if None in recovery else max(recovery, default=None),
               "energy_injected_J": None}
    return SimpleNamespace(status=status, metrics=metrics, parameters=SimpleNamespace(kind=kind))


def test_a_side_is_counted_and_its_medians_taken_per_kind():
    results = [_result("impulse", "ok", 0.01, [0.2]), _result("impulse", "violation", 0.03, [None]),
               _result("wall", "ok", 0.02, [0.4]), _result("impulse", "ok", 0.05, [0.6])]
    side = summarise_side("a:1", "skill-a", "campaign-a", results)
    assert list(side.per_kind) == [ALL_KINDS, "impulse", "wall"]
    impulse = side.per_kind["impulse"]
    assert (impulse["scenarios"], impulse["passed"], impulse["failed"],
            impulse["not_recovered"]) == (3, 2, 1, 1)
    assert impulse["goal_error_max_rad"] == pytest.approx(0.03)  # median of 0.01, 0.03, 0.05
    assert impulse["recovery_time_max_s"] == pytest.approx(0.4)  # of the two recovered
    assert impulse["energy_injected_J"] is None
    assert side.per_kind[ALL_KINDS]["goal_error_max_rad"] == pytest.approx(0.025)


def test_a_per_side_figure_is_one_more_column_of_the_sides_summary_rows():
    results = [_result("impulse", "ok", 0.01, [0.2])]
    sides = [summarise_side("a:1", "a", "ca", results),
             SideSummary("a:2", "b", "cb", summarise_side("x", "b", "cb", results).per_kind,
                         extra={"verdict": "not_ready"})]
    assert comparison_columns(sides)[-1] == "verdict"
    rows = comparison_rows(sides)
    assert [(row["kind"], row["skill"]) for row in rows] == [
        (ALL_KINDS, "a:1"), (ALL_KINDS, "a:2"), ("impulse", "a:1"), ("impulse", "a:2")]
    assert rows[1]["verdict"] == "not_ready" and "verdict" not in rows[0]
    assert sides[1].to_dict()["verdict"] == "not_ready"


@pytest.fixture
def two_versions(tmp_path):
    """cork_seat version 1 (damping ratio 0.7) and version 2 (0.2), on an ideal mechanism
    plant file (it has a damping input, so the ratio matters)."""
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    with DemoStore(path) as store:
        skill = load_skill(store, "cork_seat").skill
        save_skill(store, skill.model_copy(update={"damping_policy": DampingPolicy(zeta=0.2)}))
    plant = tmp_path / "ideal.yaml"
    plant.write_text(yaml.safe_dump({
        "joints": [{"name": "shoulder", "inertia": 0.08, "lower_limit": -1.2, "upper_limit": 1.6},
                   {"name": "elbow", "inertia": 0.03, "lower_limit": -0.4, "upper_limit": 1.6}],
        "mechanism": {"kind": "ideal", "stiffness_min": 5.0, "stiffness_max": 200.0}}))
    return path, plant


def test_compare_replays_two_versions_on_the_same_scenarios(two_versions, capsys):
    path, plant = two_versions
    status, out, err = run_cli(capsys, "compare", "cork_seat:1", "cork_seat", "--store", path,
                               "--plant", plant, "--scenarios", "14", "--seed", "3",
                               "--duration", "1.5", "--settle", "0.3", "--workers", "0",
                               "--quiet", "--json")
    assert status == 0, err
    data = json.loads(out)
    assert [side["label"] for side in data["skills"]] == ["cork_seat:1", "cork_seat:2"]
    with DemoStore(path, read_only=True) as store:
        campaigns = [store.get_campaign(side["campaign_id"]) for side in data["skills"]]
        results = [sorted(store.find_replay_results(campaign_id=c.id),
                          key=lambda r: r.scenario_index) for c in campaigns]
    # same spec, seed and settings: scenario i is the same perturbation for both versions
    assert campaigns[0].config == campaigns[1].config
    assert [r.parameters.schedule for r in results[0]] == [
        r.parameters.schedule for r in results[1]]
    for side, stored in zip(data["skills"], results, strict=True):
        every = side["per_kind"][ALL_KINDS]
        assert every["scenarios"] == 14
        assert every["passed"] == sum(r.status == "ok" for r in stored)
        assert every["goal_error_max_rad"] == pytest.approx(
            np.median([r.metrics["goal_error_max_rad"] for r in stored]), rel=1e-12)
    # each side's verdict is stored for its skill version, plant, criteria and campaign
    with DemoStore(path, read_only=True) as store:
        for side, campaign in zip(data["skills"], campaigns, strict=True):
            record = store.latest_verdict(campaign.skill_id, plant_digest=load_plant(plant).digest,
                                          criteria_digest=data["criteria_digest"])
            assert record is not None and record.campaign_id == side["campaign_id"]
            assert record.verdict == side["verdict"] in ("ready", "not_ready")
            assert record.reasons == side["reasons"]
            assert side["first_reason"] == (None if not record.reasons else
                                            f"{record.reasons[0]['check']} "
                                            f"({record.reasons[0]['joint']})")
    status, out, err = run_cli(capsys, "compare", "cork_seat:1", "cork_seat:2", "--store", path,
                               "--plant", plant, "--scenarios", "7", "--duration", "1.5",
                               "--settle", "0.3", "--workers", "0", "--quiet")
    assert status == 0, err
    lines = out.splitlines()
    assert lines[0].startswith("cork_seat:1 against cork_seat:2 on the ideal mechanism")
    assert re.match(r"kind\s+skill\s+scenarios\s+passed\s+failed", lines[1])
    assert re.match(r"all\s+cork_seat:1\s+7\s+", lines[2])
    assert lines[-1].startswith("Simulation does not certify a robot as safe")
    assert [line.split(" verdict: ")[0] for line in lines if " verdict: " in line] == [
        "cork_seat:1:", "cork_seat:2:"]


@pytest.mark.parametrize(
    ("skills", "pattern"),
    [
        (["cork_seat:1", "cork_seat:1"], r"SKILL\[:VERSION\]: both name cork_seat:1; compare two "
                                         r"different skills or versions"),
        (["cork_seat:0", "cork_seat"], r"SKILL\[:VERSION\] 'cork_seat:0': expected a skill name, "
                                       r"optionally followed by :VERSION"),
        (["cork_seat:9", "cork_seat"], r"skill 'cork_seat' has no version 9 \(versions: 1, 2\)"),
    ],
)
def test_compare_refuses_what_it_cannot_compare(two_versions, capsys, skills, pattern):
    path, _ = two_versions
    status, _, err = run_cli(capsys, "compare", *skills, "--store", path, "--quiet")
    assert status == 2
    one_line_error(err, "compare", pattern)
