"""The strict launch-file reader: our launch files resolve, and everything else is a clear error."""

from __future__ import annotations

import ast
import re
import sys
from pathlib import Path

import pytest

from compliant_demo.app.launch_file import (
    NODE_MODULES,
    ParameterFile,
    ParameterValue,
    parse_launch_arguments,
    read_launch_file,
)
from compliant_demo.cli import main as cli_main
from compliant_demo.exceptions import LaunchFileError

ROOT = Path(__file__).resolve().parent.parent
LAUNCH_FILES = sorted((ROOT / "launch").glob("*.launch.xml"))


def _package(tmp_path: Path, launch_text: str, config: dict[str, str] | None = None) -> Path:
    """A package tree like ours (package.xml, launch/, config/) holding one launch file."""
    (tmp_path / "package.xml").write_text(
        "<package format='3'><name>compliant_demo</name></package>"
    )
    (tmp_path / "launch").mkdir()
    (tmp_path / "config").mkdir()
    for name, text in (config or {}).items():
        (tmp_path / "config" / name).write_text(text)
    path = tmp_path / "launch" / "x.launch.xml"
    path.write_text(launch_text)
    return path


_GOOD = """<launch>
  <arg name="store" default="/tmp/a.sqlite" description="store"/>
  <arg name="demos"/>
  <node pkg="compliant_demo" exec="recorder_node" name="rec" namespace="bench" output="screen">
    <param from="$(find-pkg-share compliant_demo)/config/rec.yaml"/>
    <param name="store_path" value="$(var store)"/>
    <param name="tags" value="['a', 'b']"/>
    <param name="notes" value=""/>
  </node>
  <node pkg="compliant_demo" exec="teacher_node" name="teacher">
    <param name="n_demonstrations" value="$(var demos)"/>
  </node>
</launch>
"""


def test_reader_resolves_arguments_files_and_executables(tmp_path: Path) -> None:
    path = _package(tmp_path, _GOOD, {"rec.yaml": "/**:\n  ros__parameters: {}\n"})
    description = read_launch_file(path, {"demos": "4"})
    assert [a.name for a in description.arguments] == ["store", "demos"]
    assert description.values == {"store": "/tmp/a.sqlite", "demos": "4"}
    recorder = description.node("rec")
    assert recorder.parameters == (
        ParameterFile(tmp_path.resolve() / "config" / "rec.yaml"),
        ParameterValue("store_path", "/tmp/a.sqlite"),
        ParameterValue("tags", "['a', 'b']"),
        ParameterValue("notes", ""),
    )
    line = recorder.command_line({"operator": "operator_b"})
    ros_args = line[line.index("--ros-args") :]
    assert ros_args == [
        "--ros-args", "-r", "__node:=rec", "-r", "__ns:=/bench",
        "--params-file", str(tmp_path.resolve() / "config" / "rec.yaml"),
        "-p", "store_path:=/tmp/a.sqlite", "-p", "tags:=['a', 'b']",
        "-p", "notes:=''",  # rcl cannot parse an empty override; YAML '' is the empty string
        "-p", "operator:=operator_b",
    ]  # fmt: skip
    # Either the installed console script or "python -m" the node module.
    assert line[0].endswith("recorder_node") or line[:3] == [
        sys.executable, "-m", "compliant_demo.nodes.recorder"
    ]
    assert description.node("teacher").parameter_values() == {"n_demonstrations": "4"}


@pytest.mark.parametrize(
    "text, arguments, match",
    [
        ("<launch><include file='x'/></launch>", {}, r"unsupported element <include>"),
        ("<launch><group><node/></group></launch>", {}, r"unsupported element <group>"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node' respawn='true'/></launch>", {},
         r"unsupported attribute\(s\) \['respawn'\]"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'><remap from='a' to='b'/>"
         "</node></launch>", {}, r"unsupported element <remap>"),
        ("<launch><node pkg='compliant_demo' exec='no_such_node'/></launch>", {},
         r"<node exec='no_such_node'>: not a node; only the package's own executables run "
         r"\(fake_hardware_node, learner_node, recorder_node, replay_node, teacher_node, "
         r"teaching_watch_node\)"),
        ("<launch><node pkg='compliant_demo' exec='../../bin/teacher_node'/></launch>", {},
         r"<node exec='../../bin/teacher_node'>: a path; only the package's own executables"),
        ("<launch><node pkg='compliant_demo' exec='/bin/sh'/></launch>", {},
         r"<node exec='/bin/sh'>: a path; only the package's own executables"),
        ("<launch><node pkg='compliant_demo' exec='..'/></launch>", {},
         r"<node exec='..'>: a path; only"),
        ("<launch><arg name='tool' default='sh'/><node pkg='compliant_demo' exec='$(var tool)'/>"
         "</launch>", {}, r"<node exec='sh'>: another program on PATH; only the package's own"),
        ("<launch><node pkg='compliant_demo' exec='python3'/></launch>", {},
         r"<node exec='python3'>: another program on PATH"),
        ("<launch><node pkg='other_pkg' exec='talker'/></launch>", {},
         r"only compliant_demo nodes"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'>"
         "<param from='$(find-pkg-share compliant_demo)/config/missing.yaml'/></node></launch>",
         {}, r"parameter file .*missing\.yaml does not exist"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'>"
         "<param name='seed' value='$(env HOME)'/></node></launch>", {},
         r"unsupported substitution \$\(env HOME\)"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'>"
         "<param name='seed' value='$(var seed)'/></node></launch>", {},
         r"\$\(var seed\) names no argument"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'>"
         "<param name='seed'/></node></launch>", {}, r"either from=FILE or both name and value"),
        ("<launch><arg name='a'/><node pkg='compliant_demo' exec='teacher_node'/></launch>", {},
         r"argument 'a' has no default"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node'/></launch>", {"b": "1"},
         r"unknown launch argument\(s\) \['b'\]"),
        ("<launch><arg name='a' default='1'/><arg name='a' default='2'/>"
         "<node pkg='compliant_demo' exec='teacher_node'/></launch>", {}, r"declared twice"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node' name='n'/>"
         "<node pkg='compliant_demo' exec='recorder_node' name='n'/></launch>", {},
         r"node names repeat"),
        ("<launch><node pkg='compliant_demo' exec='teacher_node' output='tty'/></launch>", {},
         r"output='tty'"),
        ("<launch></launch>", {}, r"declares no <node>"),
        ("<launch><node pkg='compliant_demo'/></launch>", {}, r"non-empty 'exec' attribute"),
        ("<launchfile/>", {}, r"unsupported element <launchfile>"),
        ("<launch><node", {}, r"not well-formed XML"),
    ],
)
def test_reader_refuses_what_it_does_not_support(
    tmp_path: Path, text: str, arguments: dict, match: str
) -> None:
    path = _package(tmp_path, text)
    with pytest.raises(LaunchFileError, match=match):
        read_launch_file(path, arguments)


def test_reader_refuses_a_missing_file(tmp_path: Path) -> None:
    with pytest.raises(LaunchFileError, match=r"cannot read launch file"):
        read_launch_file(tmp_path / "absent.launch.xml")


def test_unknown_node_name_is_an_error(tmp_path: Path) -> None:
    path = _package(tmp_path, _GOOD, {"rec.yaml": "/**:\n  ros__parameters: {}\n"})
    with pytest.raises(LaunchFileError, match=r"no node named 'replay'"):
        read_launch_file(path, {"demos": "1"}).node("replay")


@pytest.mark.parametrize(
    "items, expected",
    [([], {}), (["a:=1", "store:=/tmp/x:y.sqlite", "empty:="], {"a": "1",
      "store": "/tmp/x:y.sqlite", "empty": ""})],
)
def test_launch_arguments_parse(items: list[str], expected: dict) -> None:
    assert parse_launch_arguments(items) == expected


@pytest.mark.parametrize("item", ["a=1", ":=1", "1a:=2"])
def test_launch_arguments_refuse_bad_items(item: str) -> None:
    with pytest.raises(LaunchFileError, match="expected NAME:=VALUE"):
        parse_launch_arguments([item])


# -- Our own launch files ----------------------------------------------------------------------


def test_every_expected_launch_file_exists() -> None:
    names = {path.name for path in LAUNCH_FILES}
    assert {"record.launch.xml", "learn.launch.xml", "replay.launch.xml",
            "pipeline.launch.xml"} <= names


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_our_launch_files_name_existing_executables_and_parameter_files(path: Path) -> None:
    """Reading resolves every executable and parameter file; a missing one raises."""
    description = read_launch_file(path)
    assert description.nodes
    for node in description.nodes:
        assert node.package == "compliant_demo"
        assert node.executable in NODE_MODULES
        for parameter in node.parameters:
            if isinstance(parameter, ParameterFile):
                assert parameter.path.is_file()
                assert parameter.path.parent == ROOT / "config"


def test_node_modules_match_the_console_scripts_of_setup_py() -> None:
    tree = ast.parse((ROOT / "setup.py").read_text())
    scripts = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and "=" in node.value:
            name, _, target = (part.strip() for part in node.value.partition("="))
            if name.endswith("_node"):
                scripts[name] = target.removesuffix(":main")
    assert scripts == NODE_MODULES


def test_launch_command_prints_the_node_command_lines(capsys) -> None:
    status = cli_main(
        ["launch", str(ROOT / "launch" / "record.launch.xml"), "demos:=2", "--print"]
    )
    lines = capsys.readouterr().out.splitlines()
    assert status == 0 and len(lines) == 2
    assert "__node:=recorder" in lines[0] and "__node:=teacher" in lines[1]
    assert "n_demonstrations:=2" in lines[1]


def test_launch_command_reports_a_bad_file_as_a_user_error(tmp_path: Path, capsys) -> None:
    path = _package(tmp_path, "<launch><node pkg='compliant_demo' exec='nope'/></launch>")
    assert cli_main(["launch", str(path)]) == 2
    assert "<node exec='nope'>: not a node" in capsys.readouterr().err


@pytest.mark.parametrize("extra", [[], ["--print"]])
def test_launch_command_refuses_an_unknown_until_node_before_starting_anything(
    capsys, extra: list[str]
) -> None:
    path = ROOT / "launch" / "pipeline.launch.xml"
    assert cli_main(["launch", str(path), "--until", "teachr", *extra]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""  # nothing printed, nothing started
    assert re.search(r"--until 'teachr': .*pipeline\.launch\.xml declares no node of that name "
                     r"\(nodes: recorder, teacher, learner, replay\); did you mean 'teacher'\?",
                     captured.err)


@pytest.mark.parametrize(("launch_file", "arguments", "ending"), [
    ("pipeline.launch.xml", {}, {"recorder": False, "teacher": True, "learner": True,
                                 "replay": True}),
    ("record.launch.xml", {}, {"recorder": False, "teacher": True}),
    ("learn.launch.xml", {}, {"learner": False}),  # fits on request only
    ("learn.launch.xml", {"fit_when": "2"}, {"learner": False}),  # fits, then keeps serving
    ("learn.launch.xml", {"fit_when": "2", "exit_after_fit": "true"}, {"learner": True}),
    ("replay.launch.xml", {"auto": "true", "exit_after_run": "true"}, {"replay": True}),
    ("replay.launch.xml", {"exit_after_run": "true"}, {"replay": False}),
])
def test_nodes_that_end_by_themselves_follow_their_parameters(
    launch_file: str, arguments: dict[str, str], ending: dict[str, bool]
) -> None:
    description = read_launch_file(ROOT / "launch" / launch_file, arguments)
    assert {node.name: node.ends_by_itself() for node in description.nodes} == ending


def test_the_teacher_told_to_stay_does_not_end_by_itself() -> None:
    teacher = read_launch_file(ROOT / "launch" / "record.launch.xml").node("teacher")
    assert teacher.resolved_parameters()["exit_when_done"] is True  # from config/teacher.yaml
    assert not teacher.ends_by_itself({"exit_when_done": "false"})
