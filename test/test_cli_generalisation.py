"""Command line of generalisation: --goal and --duration on replay and campaign, --formulation
on learn, goal and duration draws from a campaign spec file; every error one line."""

from __future__ import annotations

import json
import re

import pytest
import yaml
from campaign_support import store_with_demos_and_skill
from cli_support import one_line_error, run_cli

from compliant_demo.app.tour import TourSettings, run_tour
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.store import DemoStore

_SHORT = ["--settle", "0.3", "--quiet"]


@pytest.fixture
def store(tmp_path):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    return path


def test_replay_to_a_new_goal_and_duration_stores_both(store, capsys):
    status, out, err = run_cli(capsys, "replay", "--store", store, "--goal", "0.2", "0.5",
                               "--duration", "1.5", "--json", *_SHORT)
    data = json.loads(out)
    assert status in (0, 1), err
    with DemoStore(store, read_only=True) as opened:
        parameters = opened.load_replay_result(data["result_id"]).info.parameters
    assert (parameters.goal, parameters.duration_s) == ([0.2, 0.5], 1.5)
    assert (data["goal"], data["duration_s"]) == ([0.2, 0.5], 1.5)
    # the trace ends after the new duration and the settling time (recorded per step of 1 ms)
    assert data["metrics"]["steps_planned"] == 1800


@pytest.mark.parametrize(
    ("argv", "pattern"),
    [
        (["--goal", "0.2"], r"--goal: 1 value\(s\) \[0\.2\] for the 2 joints \['shoulder', "
                            r"'elbow'\]; give one angle per joint, rad"),
        (["--goal", "0.2", "1.9"], r"--goal: 1\.9 rad for joint 'elbow' is outside its range "
                                   r"\[-0\.4, 1\.6\] rad"),
        (["--goal", "0.2", "nan"], r"argument --goal: 'nan' is not finite"),
        (["--goal", "0.2", "up"], r"argument --goal: 'up' is not a number"),
        (["--duration", "0"], r"argument --duration: '0' must be > 0"),
        (["--duration", "1e12"], r"duration_s \+ settle_s = 1e\+12 s: more than 10,000,000 "
                                 r"control periods"),
        (["--duration", "1e-6"], r"duration_s: must be at least one control period"),
    ],
)
@pytest.mark.parametrize("command", ["replay", "campaign"])
def test_bad_goals_and_durations_are_one_line_errors(store, capsys, command, argv, pattern):
    status, _, err = run_cli(capsys, command, "--store", store, *argv, "--quiet")
    assert status == 2
    one_line_error(err, command, pattern)


def test_a_campaign_to_a_new_goal_keeps_it_in_its_settings(store, capsys):
    status, out, err = run_cli(capsys, "campaign", "--store", store, "--goal", "0.2", "0.5",
                               "--duration", "1.5", "--scenarios", "2", "--workers", "0",
                               "--json", *_SHORT)
    assert status == 0, err
    with DemoStore(store, read_only=True) as opened:
        config = opened.get_campaign(json.loads(out)["campaign_id"]).config
    assert (config["goal"], config["duration_s"]) == ([0.2, 0.5], 1.5)


def test_a_campaign_spec_drawing_goals_and_durations_stores_each_scenario_s(
        store, tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump({"campaign": {
        "kinds": {"impulse": 1.0},
        "onset_s": {"distribution": "uniform", "low": 0.2, "high": 0.5},
        "goal_offset_rad": {1: {"distribution": "uniform", "low": -0.1, "high": 0.1}},
        "duration_scale": {"distribution": "choice", "values": [0.8, 1.2]},
    }}))
    status, out, err = run_cli(capsys, "campaign", "--store", store, "--spec", spec,
                               "--duration", "1.5", "--scenarios", "3", "--workers", "0",
                               "--json", *_SHORT)
    assert status == 0, err
    with DemoStore(store, read_only=True) as opened:
        campaign_id = json.loads(out)["campaign_id"]
        config = opened.get_campaign(campaign_id).config
        results = list(opened.find_replay_results(campaign_id=campaign_id))
    assert config["spec"]["duration_scale"]["values"] == [0.8, 1.2]
    assert len(results) == 3
    for result in results:
        assert result.parameters.duration_s in (pytest.approx(1.2), pytest.approx(1.8))
        assert result.parameters.goal is not None and len(result.parameters.goal) == 2


def test_a_spec_with_a_duration_scale_reaching_zero_is_a_one_line_error(
        store, tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text("kinds: {impulse: 1}\nduration_scale: {distribution: fixed, value: 0}\n")
    status, _, err = run_cli(capsys, "campaign", "--store", store, "--spec", spec)
    assert status == 2
    one_line_error(err, "campaign", r"spec\.yaml: .*duration_scale: can draw 0\.0")


def test_learn_takes_forms_per_joint_and_reports_them(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path, with_skill=False)
    status, out, err = run_cli(capsys, "learn", "--store", path, "--n-basis", "20",
                               "--formulation", "elbow=classic", "--json")
    assert status == 0, err
    report = json.loads(out)["report"]
    assert "elbow: position RMSE" in report and "form classic (requested)" in report
    # the cork_seat shoulder goes out and back as well: the criterion picks goal_robust
    assert re.search(r"shoulder: .*form goal_robust \(net/excursion 0\.\d\d < 0\.5\)", report)
    with DemoStore(path, read_only=True) as opened:
        payload = opened.load_skill_record("cork_seat").payload
    assert payload["formulation"] == ["goal_robust", "classic"]
    assert [c["chosen_by"] for c in payload["provenance"]["formulation_choice"]] == [
        "criterion", "request"]


@pytest.mark.parametrize(
    ("value", "pattern"),
    [
        ("knee=classic", r"--formulation 'knee=classic': no joint 'knee' in the plant"),
        ("mirror", r"--formulation 'mirror': expected auto, classic, goal_robust"),
    ],
)
def test_learn_refuses_unknown_forms_and_joints(tmp_path, capsys, value, pattern):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path, with_skill=False)
    status, _, err = run_cli(capsys, "learn", "--store", path, "--formulation", value)
    assert status == 2
    one_line_error(err, "learn", pattern)


def test_the_tour_refuses_a_goal_outside_the_range_before_recording(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    status, _, err = run_cli(capsys, "tour", "--store", path, "--out", tmp_path / "run",
                             "--goal", "0.2", "1.9", "--quiet")
    assert status == 2
    one_line_error(err, "tour", r"--goal: 1\.9 rad for joint 'elbow' is outside its range")
    assert not path.exists() and not (tmp_path / "run").exists()
    settings = TourSettings(store=path, out_dir=tmp_path / "run", goal=(0.2, 1.9))
    with pytest.raises(InvalidInputError, match=r"goal: 1\.9 rad for joint 'elbow' is outside"):
        run_tour(settings, progress=False)
    assert not path.exists() and not (tmp_path / "run").exists()


@pytest.mark.parametrize(
    ("argv", "pattern"),
    [
        # each was refused only after four demonstrations were recorded and learned (45 s)
        (["--duration", "1e12"], r"duration_s \+ settle_s = 1e\+12 s: more than 10,000,000"),
        (["--duration", "1e-9"], r"duration_s: must be at least one control period"),
        (["--scenarios", "100000000000"], r"n_scenarios = 100000000000: at most 1,000,000"),
    ],
)
def test_the_tour_refuses_a_replay_it_cannot_run_before_recording(tmp_path, capsys, argv,
                                                                   pattern):
    path = tmp_path / "store.sqlite"
    status, _, err = run_cli(capsys, "tour", "--store", path, "--out", tmp_path / "run", *argv,
                             "--quiet")
    assert status == 2
    one_line_error(err, "tour", pattern)
    assert not path.exists() and not (tmp_path / "run").exists()
