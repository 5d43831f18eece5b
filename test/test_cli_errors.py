"""The command line's one error boundary: every user error is one line in the command line's own
terms with exit status 2, core warnings are one line without source paths, and a closed pipe
ends a command quietly."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from campaign_support import store_with_demos_and_skill
from cli_support import one_line_error, run_cli
from pydantic import BaseModel, ConfigDict, ValidationError
from store_support import REPO, add_demo

from compliant_demo.cli import _build, _in_cli_terms
from compliant_demo.exceptions import InvalidInputError
from compliant_demo.models import validation_message
from compliant_demo.perturbation import load_campaign_yaml
from compliant_demo.store import DemoStore

CONFIG = REPO / "config"


@pytest.fixture
def demos(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        short = add_demo(store, seed=1, n=100, start_time=1.70e9)
        long = add_demo(store, seed=2, n=400, start_time=1.71e9)
    return path, short, long


@pytest.mark.parametrize("form", ["separate", "joined"])
def test_order_by_a_descending_column_parses(demos, capsys, form):
    path, short, long = demos
    order = ["--order-by", "-duration_s"] if form == "separate" else ["--order-by=-duration_s"]
    status, out, err = run_cli(capsys, "list", "--store", path, *order)
    assert status == 0, err
    rows = out.splitlines()[1:]
    assert [row.split()[0] for row in rows] == [long[:8], short[:8]]


def test_the_readme_list_example_runs(demos, capsys):
    path, short, long = demos
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    example = re.search(r"^compliant-demo (list --order-by -duration_s[^\n#]*)", readme, re.M)
    assert example is not None, "README shows no `list --order-by -duration_s` example"
    status, out, err = run_cli(capsys, *example.group(1).split(), "--store", path)
    assert status == 0, err
    assert out.splitlines()[1].startswith(long[:8])


def test_usage_errors_are_one_line_with_status_2(demos, capsys):
    path, _, _ = demos
    status, out, err = run_cli(capsys, "list", "--store", path, "--status", "lost")
    assert (status, out) == (2, "")
    one_line_error(err, "list", r"argument --status: invalid choice: 'lost'")


@pytest.mark.parametrize(
    ("value", "pattern"),
    [
        ("100000000000000000000", r"argument --limit: 100000000000000000000 is out of range "
                                   r"\(0\.\.9223372036854775807\)"),
        ("10^20", r"argument --limit: '10\^20' is not an integer \(0\.\.9223372036854775807\)"),
        ("9" * 5000, r"argument --limit: a 5000-digit number is out of range"),
        ("-1", r"argument --limit: -1 is out of range"),
    ],
)
def test_integer_options_state_their_range_and_name_the_option(demos, capsys, value, pattern):
    path, _, _ = demos
    status, _, err = run_cli(capsys, "list", "--store", path, f"--limit={value}")
    assert status == 2
    one_line_error(err, "list", pattern)
    assert len(err) < 200


def test_an_argument_that_is_not_utf8_is_named(demos, capsys):
    path, _, _ = demos
    undecodable = os.fsdecode(b"op\xff")  # how Python hands a non-UTF-8 argv entry over
    status, _, err = run_cli(capsys, "list", "--store", path, "--operator", undecodable)
    assert status == 2
    one_line_error(err, "list", r"--operator: b'op\\xff' is not valid UTF-8 text")
    status, _, err = run_cli(capsys, "list", "--store", path, f"--skill={undecodable}")
    one_line_error(err, "list", r"--skill: b'op\\xff' is not valid UTF-8 text")


def test_messages_name_options_not_python_parameters(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        demo = add_demo(store, seed=3)
        store.save_skill("cork_seat", {"w": [1.0]}, demonstration_ids=[demo], parameters={})
    status, _, err = run_cli(capsys, "delete", demo, "--store", path)
    assert status == 2
    one_line_error(err, "delete", r"provenance of skill\(s\) cork_seat v1; pass --force to")
    assert "force=True" not in err
    status, _, err = run_cli(capsys, "list", "--store", path, "--order-by", "nothing")
    one_line_error(err, "list", r"^compliant-demo list: error: --order-by column 'nothing'")


def test_an_unreachable_scheduler_is_named_by_its_option(tmp_path, capsys):
    # the README's campaign on a Dask cluster, with an address where nothing listens (loopback)
    store_with_demos_and_skill(tmp_path / "store.sqlite")
    status, _, err = run_cli(capsys, "campaign", "--store", tmp_path / "store.sqlite",
                             "--skill", "cork_seat", "--scheduler", "tcp://127.0.0.1:1")
    assert status == 2
    one_line_error(err, "campaign", r"error: --scheduler = 'tcp://127\.0\.0\.1:1': cannot "
                                    r"connect to the Dask scheduler")


def test_readme_config_paths_name_the_shipped_files_from_any_folder(tmp_path, capsys,
                                                                   monkeypatch):
    # the README's replay with --schedule config/replay_bumps.yaml, run outside the checkout
    store_with_demos_and_skill(tmp_path / "store.sqlite")
    monkeypatch.chdir(tmp_path)
    status, out, err = run_cli(capsys, "replay", "--store", "store.sqlite", "--schedule",
                               "config/replay_bumps.yaml", "--criteria",
                               "config/readiness_criteria.yaml", "--json")
    assert status in (0, 1), err  # 1: a limit stopped the replay, which is a result too
    assert json.loads(out)["result_id"]
    status, _, err = run_cli(capsys, "replay", "--store", "store.sqlite", "--schedule",
                             "config/no_such_schedule.yaml")
    assert status == 2
    one_line_error(err, "replay", r"--schedule 'config/no_such_schedule.yaml': no such file$")
    # a file of that name in the working folder is the one used
    (tmp_path / "config").mkdir()
    (tmp_path / "config" / "replay_bumps.yaml").write_text("name: [unclosed\n")
    status, _, err = run_cli(capsys, "replay", "--store", "store.sqlite", "--schedule",
                             "config/replay_bumps.yaml")
    assert status == 2
    one_line_error(err, "replay", r"replay_bumps\.yaml")
    # the README's launch files too
    status, out, err = run_cli(capsys, "launch", "launch/replay.launch.xml", "--print")
    assert status == 0, err
    assert "compliant_demo.nodes.replay" in out or "replay_node" in out, out
    status, _, err = run_cli(capsys, "launch", "launch/no_such.launch.xml")
    assert status == 2
    one_line_error(err, "launch", r"launch_file 'launch/no_such\.launch\.xml': no such file$")


def test_the_parameter_mapping_follows_each_commands_options():
    _, commands = _build()
    message = "3 bad sample(s) (import with skip_bad=True to drop such samples)"
    assert _in_cli_terms(message, commands["import"]) == (
        "3 bad sample(s) (import with --skip-bad to drop such samples)"
    )
    # a command without the option keeps the words; unrelated words are never touched
    assert _in_cli_terms(message, commands["list"]) == message
    assert _in_cli_terms("torque limit: shoulder", commands["list"]) == "torque limit: shoulder"


def test_a_list_of_schedules_given_as_one_schedule_is_named_in_one_short_line(tmp_path, capsys):
    status, _, err = run_cli(capsys, "replay", "--store", tmp_path / "none.sqlite", "--schedule",
                          CONFIG / "perturbations_cork_seat.yaml")  # fmt: skip
    assert status == 2
    one_line_error(err, "replay", r"perturbations_cork_seat\.yaml: holds a list of schedules "
                                   r"\('scenarios'\).*config/replay_bumps\.yaml")  # fmt: skip
    assert len(err) < 300
    status, _, err = run_cli(capsys, "replay", "--store", tmp_path / "none.sqlite", "--schedule",
                          CONFIG / "perturbations_campaign.yaml")  # fmt: skip
    one_line_error(err, "replay", r"is a campaign spec, not a schedule; use it with "
                                   r"`compliant-demo campaign --spec`")  # fmt: skip


@pytest.mark.parametrize("name", ["perturbations_cork_seat.yaml", "replay_bumps.yaml"])
def test_a_schedule_given_as_a_campaign_spec_is_named(name):
    with pytest.raises(InvalidInputError, match=rf"{name}: holds perturbation schedules, not a "
                                                r"campaign spec .*`compliant-demo replay "
                                                r"--schedule`"):  # fmt: skip
        load_campaign_yaml(CONFIG / name)


def test_plant_errors_name_file_field_and_a_truncated_value(tmp_path, capsys):
    plant = tmp_path / "plant.yaml"
    plant.write_text(yaml.safe_dump({"joints": [{"name": "shoulder", "inertia": "x" * 500}],
                                     "mechanism": {"kind": "ideal"}}))  # fmt: skip
    status, _, err = run_cli(capsys, "replay", "--store", tmp_path / "none.sqlite",
                             "--plant", plant)  # fmt: skip
    assert status == 2
    one_line_error(err, "replay", r"plant\.yaml: field 'joints\.0\.inertia' = 'xxx+\.\.\.: "
                                   r"Input should be a valid number")  # fmt: skip
    assert len(err) < len(str(plant)) + 200
    plant.write_text(yaml.safe_dump({"mechanism": {"kind": "ideal", "stiffness_max": 9.0}}))
    status, _, err = run_cli(capsys, "replay", "--store", tmp_path / "none.sqlite",
                             "--plant", plant)  # fmt: skip
    one_line_error(err, "replay", r"plant\.yaml: field 'joints' is missing \(required\)$")
    plant.write_text("[1, 2]\n")
    status, _, err = run_cli(capsys, "replay", "--store", tmp_path / "none.sqlite",
                             "--plant", plant)  # fmt: skip
    one_line_error(err, "replay", r"plant\.yaml: expected a mapping for a replay plant, got list")


class StrictGain(BaseModel):
    model_config = ConfigDict(extra="forbid")
    gain: float = 1.0


def test_validation_message_shows_no_enclosing_document():
    with pytest.raises(ValidationError) as info:
        StrictGain.model_validate({"gain": 1.0, "scenarios": [{"name": "n" * 200}] * 50})
    shown = repr([{"name": "n" * 200}])[:57] + "..."  # 60 characters of the value
    assert validation_message(info.value) == (
        f"field 'scenarios' = {shown} is not a field of a strict gain (unknown field)"
    )
    with pytest.raises(ValidationError) as info:
        StrictGain.model_validate({"gain": ["n" * 200] * 50})
    message = validation_message(info.value, "file.yaml")
    assert message.startswith("field 'file.yaml.gain' = ['nnnn") and len(message) < 140


def test_core_warnings_are_one_line_without_source_paths(tmp_path, capsys):
    from campaign_support import store_with_demos_and_skill

    path = tmp_path / "store.sqlite"
    store_with_demos_and_skill(path)
    schedule = tmp_path / "late.yaml"
    schedule.write_text(yaml.safe_dump({"name": "late", "perturbations": [
        {"kind": "impulse", "joint": 0, "onset_s": 60.0, "magnitude": 0.01}]}))  # fmt: skip
    status, _, err = run_cli(capsys, "replay", "--store", path, "--schedule", schedule, "--quiet",
                          "--duration", "1.0", "--settle", "0.1")  # fmt: skip
    assert status == 0, err
    lines = err.strip().splitlines()
    assert lines == ["compliant-demo replay: warning: 1 perturbation(s) start after the run's "
                     "1100 steps and never act: schedules[0].perturbations[0]"], err  # fmt: skip
    assert ".py" not in err and "UserWarning" not in err


@pytest.mark.parametrize(
    ("edit", "pattern"),
    [
        (("# flags: {}", "# flags: " + "[" * 50_000 + "]" * 50_000),
         r"bad\.csv, line \d+, metadata 'flags': JSON nested too deeply"),
        (("# nominal_rate_hz: 1000.0", "# nominal_rate_hz: " + "9" * 5000),
         r"bad\.csv, line \d+, metadata 'nominal_rate_hz': not valid JSON \(Exceeds the limit"),
        (("# flags: {}", "# flags: [1]"),
         r"bad\.csv, line \d+: metadata 'flags' must be an object of counters, got \[1\]"),
        (("# tags: []", '# tags: {"a": 1}'),
         r"bad\.csv, line \d+: metadata 'tags' must be a list of strings"),
    ],
)
def test_hostile_csv_metadata_is_one_line_naming_the_file(demos, tmp_path, capsys, monkeypatch,
                                                          edit, pattern):  # fmt: skip
    path, short, _ = demos
    monkeypatch.chdir(tmp_path)
    assert run_cli(capsys, "export", short, "--format", "csv", "--out", "good.csv",
                "--store", path)[0] == 0  # fmt: skip
    text = Path("good.csv").read_text()
    assert edit[0] in text
    Path("bad.csv").write_text(text.replace(edit[0], edit[1]))
    target = tmp_path / "target.sqlite"
    status, _, err = run_cli(capsys, "import", "bad.csv", "--new-id", "--store", target)
    assert status == 2
    one_line_error(err, "import", pattern)
    assert len(err) < 300
    with DemoStore(target, read_only=True) as store:
        assert list(store.find_demonstrations()) == []


def test_a_reader_closing_the_pipe_ends_the_command_quietly(tmp_path):
    path = tmp_path / "store.sqlite"
    with DemoStore(path) as store:
        add_demo(store, seed=4, notes="n" * 1_000_000)  # 1 MB of JSON: more than a pipe holds
    paths = [str(REPO), os.environ.get("PYTHONPATH", "")]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(paths))
    process = subprocess.Popen(
        [sys.executable, "-c", "from compliant_demo.cli import main; raise SystemExit(main())",
         "list", "--json", "--store", str(path)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
    )  # fmt: skip
    assert process.stdout is not None and process.stderr is not None
    assert process.stdout.read(2) == b"[\n"
    process.stdout.close()
    err = process.stderr.read().decode()
    assert process.wait(timeout=60) == 141
    assert err == ""


def test_list_reports_recovered_recordings_as_one_warning_line(tmp_path, capsys):
    path = tmp_path / "store.sqlite"
    writer = (
        "import os, sys\n"
        "from compliant_demo.store import DemoStore\n"
        "store = DemoStore(sys.argv[1])\n"
        "store.begin_demonstration(skill='cork_seat', joints=['shoulder'])\n"
        "os._exit(0)  # the writer dies while recording\n"
    )
    paths = [str(REPO), os.environ.get("PYTHONPATH", "")]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(paths))
    subprocess.run([sys.executable, "-c", writer, str(path)], env=env, check=True, timeout=60)
    status, out, err = run_cli(capsys, "list", "--store", path)
    assert status == 0
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("compliant-demo list: warning: "), err
    assert "were marked incomplete" in lines[0] and ".py" not in err
    assert "incomplete" in out.splitlines()[1]
