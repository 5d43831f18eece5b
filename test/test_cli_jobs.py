"""The learn, replay, campaign and report subcommands: JSON output, exit codes, one-line errors,
help texts with units and defaults."""

from __future__ import annotations

import json
import re

import pytest
import yaml
from campaign_support import store_with_demos_and_skill
from cli_support import one_line_error, run_cli

from compliant_demo.cli import main
from compliant_demo.perturbation import PERTURBATION_KINDS
from compliant_demo.resources import package_file
from compliant_demo.store import DemoStore

_SHORT = ["--duration", "1.5", "--settle", "0.3"]


@pytest.fixture
def store(tmp_path):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    return path


@pytest.mark.parametrize(
    ("command", "needles"),
    [
        ("learn", ["N*m/rad", "kg*m^2", "default: 30", "default: cork_seat"]),
        ("replay", ["N*m/rad/s", "default: 1", "rad", "Exits 0"]),
        ("campaign", ["N*m*s", "default: 350", "default: every core", "--resume"]),
        ("report", ["N*m/rad", "default: a folder of its own, compliant_demo_runs/report-",
                    "self-contained"]),
        ("tour", ["loopback", "default: 4", "ROS_DOMAIN_ID", "default: 350",
                  "drawn afresh for each run and printed", "compliant_demo_runs/<run tag>"]),
        ("simulate-teaching", ["loopback", "N*m/rad", "default: 4", "ROS_DOMAIN_ID", "rad/s",
                               "simulated teacher", "another run holds it"]),
    ],
)
def test_help_explains_units_and_defaults(capsys, command, needles):
    with pytest.raises(SystemExit) as exit_info:
        main([command, "--help"])
    assert exit_info.value.code == 0
    text = " ".join(capsys.readouterr().out.split())
    for needle in needles:
        assert needle in text, needle


def test_learn_saves_a_new_version_and_reports_fit_errors(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path, with_skill=False)
    status, out, err = run_cli(capsys, "learn", "--store", path, "--n-basis", "20", "--json")
    assert status == 0, err
    data = json.loads(out)
    assert (data["skill"], data["version"], len(data["demonstration_ids"])) == ("cork_seat", 1, 3)
    assert "shoulder: position RMSE" in data["report"]
    with DemoStore(path, read_only=True) as store:
        assert store.load_skill_record("cork_seat").id == data["skill_id"]
    status, out, _ = run_cli(capsys, "learn", "--store", path)
    assert status == 0 and "saved as cork_seat version 2" in out


def test_learn_refuses_when_too_few_demonstrations_match(store, capsys):
    status, out, err = run_cli(capsys, "learn", "--store", store, "--skill", "nothing_here")
    assert (status, out) == (2, "")
    one_line_error(err, "learn",
                   re.escape("0 complete demonstration(s) match skill='nothing_here'"))


def test_bad_option_values_are_one_line_usage_errors(store, capsys):
    status, _, err = run_cli(capsys, "campaign", "--store", store, "--scenarios", "0")
    assert status == 2
    one_line_error(err, "campaign", re.escape("argument --scenarios: 0 is out of range (1.."))
    status, _, err = run_cli(capsys, "replay", "--store", store, "--dt", "nan")
    assert status == 2
    one_line_error(err, "replay", re.escape("argument --dt: 'nan' is not finite"))


def test_replay_with_a_schedule_stores_the_result(store, tmp_path, capsys):
    schedule = tmp_path / "bump.yaml"
    schedule.write_text(
        yaml.safe_dump(
            {
                "name": "bump",
                "perturbations": [
                    {
                        "kind": "torque_window",
                        "joint": 0,
                        "onset_s": 0.5,
                        "duration_s": 0.2,
                        "magnitude": 0.5,
                        "sign": 1,
                    }
                ],
            }
        )
    )
    status, out, err = run_cli(
        capsys, "replay", "--store", store, "--schedule", schedule, "--quiet", "--json", *_SHORT
    )
    assert status == 0, err
    data = json.loads(out)
    assert data["status"] == "ok" and data["reason"] is None
    assert len(data["metrics"]["recovery_time_s"]) == 1  # one perturbation, one recovery
    with DemoStore(store, read_only=True) as opened:
        result = opened.load_replay_result(data["result_id"])
    assert result.info.parameters.kind == "torque_window"
    assert result.trace["q"].shape[1] == 2


def test_replay_stopped_by_a_limit_exits_non_zero(store, tmp_path, capsys):
    plant = tmp_path / "weak.yaml"
    plant.write_text(
        yaml.safe_dump(
            {
                "joints": [
                    {"name": "shoulder", "inertia": 0.08, "torque_limit": 0.05},
                    {"name": "elbow", "inertia": 0.03},
                ],
                "mechanism": {"kind": "ideal", "stiffness_min": 5.0, "stiffness_max": 200.0},
            }
        )
    )
    status, out, err = run_cli(
        capsys, "replay", "--store", store, "--plant", plant, "--quiet", *_SHORT
    )
    assert status == 1, err
    assert "replay of cork_seat version 1 on the ideal mechanism on joints shoulder, elbow: " \
           "stopped (torque limit: shoulder" in out


def test_replay_with_a_missing_schedule_file_is_a_one_line_error(store, tmp_path, capsys):
    missing = tmp_path / "none.yaml"
    status, _, err = run_cli(capsys, "replay", "--store", store, "--schedule", missing)
    assert status == 2
    one_line_error(err, "replay", re.escape("none.yaml' : no such file".replace("' :", "':")))


def test_replay_of_an_unknown_skill_version_is_a_one_line_error(store, capsys):
    status, _, err = run_cli(capsys, "replay", "--store", store, "--version", "7")
    assert status == 2
    one_line_error(err, "replay", re.escape("skill 'cork_seat' has no version 7 (versions: 1)"))


def test_campaign_runs_every_kind_resumes_and_reports(store, tmp_path, capsys):
    status, out, err = run_cli(
        capsys,
        "campaign",
        "--store",
        store,
        "--scenarios",
        "14",
        "--seed",
        "3",
        "--workers",
        "0",
        "--json",
        *_SHORT,
    )
    assert status == 0, err
    data = json.loads(out)
    assert (data["run"], data["skipped"], data["backend"]) == (14, 0, "inline")
    assert {kind: c["scenarios"] for kind, c in data["per_kind"].items()} == {
        kind: 2 for kind in sorted(PERTURBATION_KINDS)
    }
    assert data["violations"] == sum(c["violations"] for c in data["per_kind"].values())
    assert data["plant"] == "antagonistic mechanism on joints shoulder, elbow"  # the default
    # the verdict closes the document and is stored with the campaign, plant and criteria
    assert data["verdict"] == "not_ready" and data["reasons"][0]["check"] == "under_damped"
    with DemoStore(store, read_only=True) as opened:
        stored = opened.latest_verdict(data["skill_id"], plant_digest=data["plant_digest"],
                                       criteria_digest=data["criteria_digest"])
    assert stored is not None and stored.id == data["verdict_id"]
    assert (stored.campaign_id, stored.reasons) == (data["campaign_id"], data["reasons"])
    status, out, err = run_cli(
        capsys, "campaign", "--store", store, "--resume", data["campaign_id"], "--json"
    )
    assert status == 0, err
    assert (json.loads(out)["run"], json.loads(out)["skipped"]) == (0, 14)

    status, out, err = run_cli(
        capsys, "report", "--store", store, "--out", tmp_path / "rep", "--json", "--quiet"
    )
    assert status == 0, err
    report = json.loads(out)
    assert report["report"].endswith("rep/report.html")
    assert [p.rsplit("/", 1)[1] for p in report["figures"]] == [
        "demonstrations.png",
        "stiffness_estimate.png",
        "schedule_checks.png",
        "replay_traces.png",
        "campaign_metrics.png",
    ]
    assert report["summary"]["within limits"] == f"{14 - data['violations']} of 14"
    assert data["campaign_id"] in report["summary"]["campaign"]
    # scenarios with a wall never touched: the same count in the campaign's and the report's
    assert report["summary"]["walls never touched"].startswith(
        f"{data['untouched_walls']} scenario(s)")


@pytest.mark.parametrize("command", ["campaign", "replay", "report", "tour"])
def test_a_missing_criteria_file_is_a_one_line_error(store, tmp_path, capsys, command):
    missing = tmp_path / "none.yaml"
    status, _, err = run_cli(capsys, command, "--store", store, "--criteria", missing)
    assert status == 2
    one_line_error(err, command, re.escape(f"--criteria {str(missing)!r}: no such file"))
    status, _, err = run_cli(capsys, command, "--store", store, "--criteria", tmp_path)
    assert status == 2
    one_line_error(err, command, re.escape(f"--criteria {str(tmp_path)!r}: a directory, not a "
                                           "file"))
    if command != "report":  # the commands that take a plant file say the same of it
        status, _, err = run_cli(capsys, command, "--store", store, "--plant", tmp_path)
        assert status == 2
        one_line_error(err, command, re.escape(f"--plant {str(tmp_path)!r}: a directory, not a "
                                               "file"))


def test_a_bad_criteria_file_names_the_field_and_value(store, tmp_path, capsys):
    criteria = tmp_path / "criteria.yaml"
    text = package_file("config", "readiness_criteria.yaml").read_text(encoding="utf-8")
    criteria.write_text(text.replace("value: 0.02\n", "value: -0.02\n"), encoding="utf-8")
    status, _, err = run_cli(capsys, "replay", "--store", store, "--criteria", criteria)
    assert status == 2
    one_line_error(err, "replay", r"thresholds\.max_goal_error\.value.*-0\.02")


def test_resume_of_an_unknown_campaign_is_a_one_line_error(store, capsys):
    status, _, err = run_cli(capsys, "campaign", "--store", store, "--resume", "no-such-id")
    assert status == 2
    one_line_error(err, "campaign", "no campaign id starts with 'no-such-id'")


def test_campaign_with_a_bad_spec_file_is_a_one_line_error(store, tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text("campaign:\n  kinds: {earthquake: 1}\n")
    status, _, err = run_cli(capsys, "campaign", "--store", store, "--spec", spec)
    assert status == 2
    one_line_error(err, "campaign", re.escape("'earthquake', not a perturbation kind"))


def test_report_without_a_store_file_is_a_one_line_error(tmp_path, capsys):
    status, _, err = run_cli(
        capsys, "report", "--store", tmp_path / "absent.sqlite", "--out", tmp_path / "rep"
    )
    assert status == 2
    one_line_error(err, "report", re.escape("absent.sqlite"))


def test_report_with_a_truth_file_that_is_not_one_is_a_one_line_error(store, tmp_path, capsys):
    truth = tmp_path / "truth.npz"
    truth.write_bytes(b"not a zip file")
    status, _, err = run_cli(
        capsys, "report", "--store", store, "--truth", truth, "--out", tmp_path / "rep"
    )
    assert status == 2
    one_line_error(err, "report", re.escape("not a teacher truth file"))
