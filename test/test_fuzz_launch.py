"""Fuzz the XML launch-file reader (and the node command lines it builds) with hypothesis.

Mutations start from the package's own launch files: damaged bytes, elements and attributes added,
dropped or renamed, substitutions and argument values of any text. Every input ends in a launch
description or LaunchFileError; the command lines are lists of plain strings (no shell ever sees
them), and an argument value, whatever it holds, stays inside the one ``-p`` it was given to.
"""

from __future__ import annotations

import xml.etree.ElementTree as ElementTree
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st
from reliability_support import FUZZ_SETTINGS, count_case, fuzz_file, no_hang

from compliant_demo.app.launch_file import read_launch_file
from compliant_demo.exceptions import LaunchFileError

REPO = Path(__file__).resolve().parent.parent
LAUNCH_FILES = sorted((REPO / "launch").glob("*.launch.xml"))

_text = st.one_of(
    st.sampled_from(["$(var store)", "$(var nope)", "$(find-pkg-share compliant_demo)",
                     "$(find-pkg-share other_pkg)", "$(env HOME)", "$(", ")", "$(var", "'", '"',
                     "; rm -rf /", "$(var x) && reboot", "-p evil:=1", "--ros-args", "a:=b", ""]),
    st.text(alphabet=st.characters(blacklist_categories=["Cs", "Cc"]), max_size=30),
)  # fmt: skip


@st.composite
def _mutated_launch(draw: st.DrawFn) -> bytes:
    source = draw(st.sampled_from(LAUNCH_FILES)).read_bytes()
    if draw(st.booleans()):
        data = bytearray(source)
        for _ in range(draw(st.integers(1, 6))):
            data[draw(st.integers(0, len(data) - 1))] = draw(st.integers(0, 255))
        return bytes(data)
    root = ElementTree.fromstring(source)
    elements = list(root.iter())
    for _ in range(draw(st.integers(1, 4))):
        element = draw(st.sampled_from(elements))
        action = draw(st.sampled_from(["attr", "drop_attr", "child", "remove", "tag", "text"]))
        if action == "attr":
            name = draw(st.sampled_from(["name", "default", "value", "from", "exec", "pkg",
                                         "namespace", "output", "if", "unless"]))  # fmt: skip
            element.set(name, draw(_text))
        elif action == "drop_attr" and element.attrib:
            del element.attrib[draw(st.sampled_from(sorted(element.attrib)))]
        elif action == "child":
            tag = draw(st.sampled_from(["arg", "node", "param", "include", "group", "let"]))
            ElementTree.SubElement(element, tag, {"name": draw(_text), "value": draw(_text)})
        elif action == "remove" and len(element):
            element.remove(draw(st.sampled_from(list(element))))
        elif action == "tag" and element is not root:
            element.tag = draw(st.sampled_from(["arg", "node", "param", "executable", "x"]))
        elif action == "text":
            element.text = draw(_text)
    return ElementTree.tostring(root)


@FUZZ_SETTINGS
@given(
    document=_mutated_launch(),
    arguments=st.dictionaries(
        st.sampled_from(["store", "demos", "seed", "operator", "truth", "skill", "nope", ""]),
        _text,
        max_size=3,
    ),
)
def test_fuzz_launch_file(document: bytes, arguments: dict[str, str]) -> None:
    with fuzz_file("fuzz.launch.xml", document) as path:
        with no_hang(10.0):
            try:
                description = read_launch_file(path, arguments, package_share=REPO)
            except LaunchFileError as exc:
                assert "fuzz.launch.xml" in str(exc), str(exc)
            else:
                for node in description.nodes:
                    command = node.command_line()
                    assert all(isinstance(part, str) for part in command)
                    # Each value is the single word after its "-p": nothing can add a parameter.
                    overrides = [command[i + 1] for i, part in enumerate(command) if part == "-p"]
                    assert len(overrides) == len(node.parameter_values())
    count_case("launch_xml")


@pytest.mark.parametrize("path", LAUNCH_FILES, ids=lambda p: p.name)
def test_launch_fuzzer_starts_from_files_that_read(path: Path) -> None:
    assert read_launch_file(path, package_share=REPO).nodes
