"""A small, strict reader of our XML launch files, and a starter for the nodes they declare.

The ``launch/*.launch.xml`` files are valid for ``ros2 launch`` on a full ROS 2 install. Where
the launch packages are not available, :func:`read_launch_file` interprets the subset we use:
``<launch>`` holding ``<arg name default description>`` and ``<node pkg exec name namespace
output>`` elements, each node holding ``<param name value/>`` and ``<param from=FILE/>``, with
``$(var NAME)`` and ``$(find-pkg-share PKG)`` substitutions. Anything else raises
:class:`~compliant_demo.exceptions.LaunchFileError`, as does an executable or parameter file that
does not exist. :func:`start_nodes` starts each declared node as its own process with the same
parameters (``--ros-args -r __node:= -r __ns:= --params-file -p``).
"""

from __future__ import annotations

import importlib.util
import os
import re
import shutil
import sys
import xml.etree.ElementTree as ElementTree
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from compliant_demo.app.supervisor import Child, start_child
from compliant_demo.exceptions import LaunchFileError

__all__ = [
    "LaunchArgument",
    "ParameterValue",
    "ParameterFile",
    "NodeDeclaration",
    "LaunchDescription",
    "NODE_MODULES",
    "ENDS_WHEN",
    "read_launch_file",
    "parse_launch_arguments",
    "start_nodes",
]

PACKAGE = "compliant_demo"

#: Console script of each node and the module that runs it with ``python -m`` (same as setup.py).
NODE_MODULES: dict[str, str] = {
    "teacher_node": "compliant_demo.nodes.teacher",
    "recorder_node": "compliant_demo.nodes.recorder",
    "learner_node": "compliant_demo.nodes.learner",
    "replay_node": "compliant_demo.nodes.replay",
    "fake_hardware_node": "compliant_demo.nodes.fake_hardware",
    "teaching_watch_node": "compliant_demo.nodes.teaching_watch",
}

#: Parameters (with the node's own defaults) that make a node end by itself once its work is
#: done: all of them true or non-zero. A node not listed here (the recorder) runs until stopped.
ENDS_WHEN: dict[str, dict[str, Any]] = {
    "teacher_node": {"exit_when_done": True},
    "learner_node": {"exit_after_fit": False, "fit_when_available": 0},
    "replay_node": {"exit_after_run": False, "run_when_available": False},
}

_ALLOWED_ATTRIBUTES = {
    "launch": set(),
    "arg": {"name", "default", "description"},
    "node": {"pkg", "exec", "name", "namespace", "output"},
    "param": {"name", "value", "from"},
}
_OUTPUTS = ("screen", "log", "both")
_SUBSTITUTION = re.compile(r"\$\(([^()]*)\)")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


@dataclass(frozen=True)
class LaunchArgument:
    """``<arg>``: a launch argument with an optional default (None = must be given)."""

    name: str
    default: str | None
    description: str


@dataclass(frozen=True)
class ParameterValue:
    """``<param name value/>``: one parameter; the value is YAML text as in ``-p name:=value``."""

    name: str
    value: str


@dataclass(frozen=True)
class ParameterFile:
    """``<param from="..."/>``: a ROS 2 parameter YAML file (resolved, existing)."""

    path: Path


@dataclass(frozen=True)
class NodeDeclaration:
    """``<node>``: one node to start, with its parameters in declaration order.

    ``command`` is the program and leading arguments that run the executable: the console script
    if it is installed, else ``python -m`` the node module.
    """

    package: str
    executable: str
    name: str | None
    namespace: str | None
    output: str
    parameters: tuple[ParameterValue | ParameterFile, ...]
    command: tuple[str, ...]

    def command_line(self, extra_parameters: Mapping[str, str] | None = None) -> list[str]:
        """Full argument vector: the command plus ``--ros-args`` with names and parameters.

        Parameters
        ----------
        extra_parameters : mapping of name to YAML text, optional
            Appended after the declared parameters, so they win (as a later ``-p`` does).
        """
        ros_args = ["--ros-args"]
        if self.name:
            ros_args += ["-r", f"__node:={self.name}"]
        if self.namespace:
            # rcl wants an absolute namespace; launch_ros makes a relative one absolute too.
            ros_args += ["-r", f"__ns:=/{self.namespace.lstrip('/')}"]
        for parameter in self.parameters:
            if isinstance(parameter, ParameterFile):
                ros_args += ["--params-file", str(parameter.path)]
            else:
                ros_args += ["-p", _override(parameter.name, parameter.value)]
        for name, value in (extra_parameters or {}).items():
            ros_args += ["-p", _override(name, value)]
        return [*self.command, *ros_args]

    def parameter_values(self) -> dict[str, str]:
        """The ``<param name value/>`` entries by name (parameter files not included)."""
        return {p.name: p.value for p in self.parameters if isinstance(p, ParameterValue)}

    def resolved_parameters(self, extra_parameters: Mapping[str, str] | None = None
                            ) -> dict[str, Any]:
        """The values the node will see: parameter files (their ``/**`` and own-name sections),
        then ``<param name value/>``, then ``extra_parameters``, each later one winning."""
        values: dict[str, Any] = {}
        sections = {"/**", self.name or self.executable,
                    f"/{(self.namespace or '').strip('/')}/{self.name}".replace("//", "/")}
        for parameter in self.parameters:
            if isinstance(parameter, ParameterFile):
                values.update(_file_parameters(parameter.path, sections))
            else:
                values[parameter.name] = _yaml_value(parameter.value)
        values.update({k: _yaml_value(v) for k, v in (extra_parameters or {}).items()})
        return values

    def ends_by_itself(self, extra_parameters: Mapping[str, str] | None = None) -> bool:
        """Whether the node ends on its own once its work is done (see :data:`ENDS_WHEN`)."""
        conditions = ENDS_WHEN.get(self.executable)
        if conditions is None:
            return False
        values = self.resolved_parameters(extra_parameters)
        return all(values.get(name, default) for name, default in conditions.items())


@dataclass(frozen=True)
class LaunchDescription:
    """A read launch file: its arguments, the values they took, and its nodes in order."""

    path: Path
    arguments: tuple[LaunchArgument, ...]
    values: Mapping[str, str]
    nodes: tuple[NodeDeclaration, ...]

    def node(self, name: str) -> NodeDeclaration:
        """The node declared with ``name``; LaunchFileError if there is none."""
        for node in self.nodes:
            if node.name == name:
                return node
        raise LaunchFileError(
            f"{self.path}: no node named {name!r}; declared: {[n.name for n in self.nodes]}"
        )


def parse_launch_arguments(items: Sequence[str]) -> dict[str, str]:
    """Parse ``name:=value`` command-line items as ``ros2 launch`` does."""
    values: dict[str, str] = {}
    for item in items:
        name, sep, value = item.partition(":=")
        if not sep or not _NAME.match(name):
            raise LaunchFileError(f"launch argument {item!r}: expected NAME:=VALUE")
        values[name] = value
    return values


def read_launch_file(
    path: str | Path,
    arguments: Mapping[str, str] | None = None,
    *,
    package_share: str | Path | None = None,
) -> LaunchDescription:
    """Read and resolve one of our XML launch files.

    Parameters
    ----------
    path : str or Path
        The ``*.launch.xml`` file.
    arguments : mapping of str to str, optional
        Values for the file's ``<arg>`` declarations (``name:=value`` on the command line).
    package_share : str or Path, optional
        Directory that ``$(find-pkg-share compliant_demo)`` stands for. Default: the directory
        above the launch file when it holds our ``package.xml`` (the source tree and the installed
        ``share/compliant_demo`` look alike), else the ament index.

    Raises
    ------
    LaunchFileError
        Unsupported element, attribute or substitution; unknown or missing argument; missing
        executable or parameter file; malformed XML.
    """
    path = Path(path)
    try:
        root = ElementTree.parse(path).getroot()
    except OSError as exc:
        raise LaunchFileError(f"{path}: cannot read launch file: {exc.strerror}") from None
    except ElementTree.ParseError as exc:
        raise LaunchFileError(f"{path}: not well-formed XML: {exc}") from None
    _check_element(path, root, "launch")
    if (root.text or "").strip():
        raise LaunchFileError(f"{path}: <launch> must not contain text")
    given = dict(arguments or {})
    declared: list[LaunchArgument] = []
    values: dict[str, str] = {}
    nodes: list[NodeDeclaration] = []
    context = _Context(path, values, package_share)
    for element in root:
        if element.tag == "arg":
            argument = _read_argument(path, element, context)
            if argument.name in values:
                raise LaunchFileError(f"{path}: argument {argument.name!r} declared twice")
            declared.append(argument)
            if argument.name in given:
                values[argument.name] = given.pop(argument.name)
            elif argument.default is not None:
                values[argument.name] = argument.default
            else:
                raise LaunchFileError(
                    f"{path}: argument {argument.name!r} has no default; give {argument.name}:=..."
                )
        elif element.tag == "node":
            nodes.append(_read_node(path, element, context))
        else:
            _check_element(path, element, "arg or node")
    if given:
        raise LaunchFileError(
            f"{path}: unknown launch argument(s) {sorted(given)}; declared: "
            f"{[a.name for a in declared]}"
        )
    if not nodes:
        raise LaunchFileError(f"{path}: declares no <node>")
    names = [n.name for n in nodes if n.name]
    if len(set(names)) != len(names):
        raise LaunchFileError(f"{path}: node names repeat: {names}")
    return LaunchDescription(path, tuple(declared), dict(values), tuple(nodes))


def start_nodes(
    description: LaunchDescription,
    *,
    env: Mapping[str, str] | None = None,
    extra_parameters: Mapping[str, Mapping[str, str]] | None = None,
    stdout: int | None = None,
    stderr: int | None = None,
) -> list[Child]:
    """Start every declared node as its own process, in declaration order.

    Each node goes through :func:`compliant_demo.app.supervisor.start_child`: its own process
    group, ended by the kernel when this process dies.

    Parameters
    ----------
    description : LaunchDescription
    env : mapping, optional
        Environment of the processes (default: this process's).
    extra_parameters : mapping of node name to {parameter: YAML text}, optional
        Overrides appended after the declared parameters.
    stdout, stderr : optional
        Passed to :class:`subprocess.Popen` (e.g. ``subprocess.PIPE``); default inherits ours.
    """
    children: list[Child] = []
    try:
        for node in description.nodes:
            extra = (extra_parameters or {}).get(node.name or "", None)
            children.append(start_child(node.name or node.executable, node.command_line(extra),
                                        env=env, stdout=stdout, stderr=stderr))
    except OSError as exc:
        for child in children:
            child.process.kill()
            child.process.wait()
        raise LaunchFileError(f"{description.path}: cannot start node: {exc}") from None
    return children


def _yaml_value(text: str) -> Any:
    """A ``-p name:=value`` text as rcl reads it (YAML), or the text itself."""
    try:
        return yaml.safe_load(text) if text else ""
    except yaml.YAMLError:
        return text


def _file_parameters(path: Path, sections: set[str]) -> dict[str, Any]:
    try:
        document = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise LaunchFileError(f"parameter file {path}: cannot read it as YAML ({exc})") from None
    values: dict[str, Any] = {}
    if isinstance(document, dict):
        for section, body in document.items():
            if section in sections and isinstance(body, dict):
                values.update(body.get("ros__parameters") or {})
    return values


def _override(name: str, value: str) -> str:
    """``name:=value`` for ``-p``; rcl cannot parse an empty value, so it becomes YAML ''."""
    return f"{name}:={value if value else repr('')}"


@dataclass
class _Context:
    path: Path
    values: dict[str, str]
    package_share: str | Path | None

    def substitute(self, text: str) -> str:
        def replace(match: re.Match[str]) -> str:
            parts = match.group(1).split()
            if len(parts) == 2 and parts[0] == "var":
                if parts[1] not in self.values:
                    raise LaunchFileError(
                        f"{self.path}: $(var {parts[1]}) names no argument declared before it"
                    )
                return self.values[parts[1]]
            if len(parts) == 2 and parts[0] == "find-pkg-share":
                return str(_package_share(self.path, parts[1], self.package_share))
            raise LaunchFileError(
                f"{self.path}: unsupported substitution $({match.group(1)}); "
                "only $(var NAME) and $(find-pkg-share PKG)"
            )

        result = _SUBSTITUTION.sub(replace, text)
        if "$(" in result:
            raise LaunchFileError(f"{self.path}: malformed substitution in {text!r}")
        return result


def _check_element(path: Path, element: ElementTree.Element, expected: str) -> None:
    allowed = _ALLOWED_ATTRIBUTES.get(element.tag)
    if allowed is None or element.tag not in expected.split(" or "):
        raise LaunchFileError(
            f"{path}: unsupported element <{element.tag}> where {expected} is expected"
        )
    unknown = sorted(set(element.attrib) - allowed)
    if unknown:
        raise LaunchFileError(f"{path}: <{element.tag}> has unsupported attribute(s) {unknown}")


def _required(path: Path, element: ElementTree.Element, attribute: str) -> str:
    value = element.get(attribute)
    if value is None or not value.strip():
        raise LaunchFileError(f"{path}: <{element.tag}> needs a non-empty {attribute!r} attribute")
    return value


def _read_argument(path: Path, element: ElementTree.Element, context: _Context) -> LaunchArgument:
    _check_element(path, element, "arg")
    if len(element):
        raise LaunchFileError(f"{path}: <arg> must be empty")
    name = _required(path, element, "name")
    if not _NAME.match(name):
        raise LaunchFileError(f"{path}: argument name {name!r} is not an identifier")
    default = element.get("default")
    if default is not None:
        default = context.substitute(default)
    return LaunchArgument(name, default, element.get("description", ""))


def _read_node(path: Path, element: ElementTree.Element, context: _Context) -> NodeDeclaration:
    _check_element(path, element, "node")
    package = context.substitute(_required(path, element, "pkg"))
    executable = context.substitute(_required(path, element, "exec"))
    name = element.get("name")
    namespace = element.get("namespace")
    output = element.get("output", "log")
    if output not in _OUTPUTS:
        raise LaunchFileError(f"{path}: <node> output={output!r}; expected one of {_OUTPUTS}")
    parameters: list[ParameterValue | ParameterFile] = []
    for child in element:
        _check_element(path, child, "param")
        if len(child):
            raise LaunchFileError(f"{path}: <param> must be empty")
        if "from" in child.attrib:
            if set(child.attrib) != {"from"}:
                raise LaunchFileError(f"{path}: <param from=...> takes no other attribute")
            file = Path(context.substitute(child.attrib["from"]))
            if not file.is_file():
                raise LaunchFileError(f"{path}: parameter file {file} does not exist")
            parameters.append(ParameterFile(file))
        else:
            if set(child.attrib) != {"name", "value"}:
                raise LaunchFileError(
                    f"{path}: <param> needs either from=FILE or both name and value"
                )
            parameters.append(
                ParameterValue(
                    context.substitute(_required(path, child, "name")),
                    context.substitute(child.attrib["value"]),
                )
            )
    return NodeDeclaration(
        package=package,
        executable=executable,
        name=context.substitute(name) if name else None,
        namespace=context.substitute(namespace) if namespace else None,
        output=output,
        parameters=tuple(parameters),
        command=_resolve_executable(path, package, executable, context),
    )


def _package_share(launch_path: Path, package: str, override: str | Path | None) -> Path:
    if package == PACKAGE and override is not None:
        return Path(override)
    here = launch_path.resolve().parent.parent
    if package == PACKAGE and _names_package(here / "package.xml", package):
        return here
    try:
        from ament_index_python.packages import (
            PackageNotFoundError,
            get_package_share_directory,
        )
    except ImportError:
        raise LaunchFileError(
            f"{launch_path}: cannot find package {package!r} (no ament index available)"
        ) from None
    try:
        return Path(get_package_share_directory(package))
    except (PackageNotFoundError, ValueError, LookupError):
        raise LaunchFileError(f"{launch_path}: package {package!r} not found") from None


def _names_package(package_xml: Path, package: str) -> bool:
    try:
        root = ElementTree.parse(package_xml).getroot()
    except (OSError, ElementTree.ParseError):
        return False
    return root.findtext("name", "").strip() == package


def _resolve_executable(
    path: Path, package: str, executable: str, context: _Context
) -> tuple[str, ...]:
    """Console script in lib/<pkg> or on PATH, else ``python -m`` the node module."""
    if package != PACKAGE:
        raise LaunchFileError(
            f"{path}: <node pkg={package!r}>: only {PACKAGE} nodes can be started by this reader"
        )
    if executable not in NODE_MODULES:
        if "/" in executable or "\\" in executable or executable in (".", ".."):
            kind = "a path"
        elif shutil.which(executable):
            kind = "another program on PATH"
        else:
            kind = "not a node"
        raise LaunchFileError(
            f"{path}: <node exec={executable!r}>: {kind}; only the package's own executables "
            f"run ({', '.join(sorted(NODE_MODULES))})"
        )
    script_dirs = [Path(sys.prefix) / "lib" / package]
    prefix = os.environ.get("AMENT_PREFIX_PATH", "")
    script_dirs += [Path(p) / "lib" / package for p in prefix.split(os.pathsep) if p]
    for directory in script_dirs:
        candidate = directory / executable
        if candidate.is_file() and os.access(candidate, os.X_OK):
            return (str(candidate),)
    on_path = shutil.which(executable)
    if on_path:
        return (on_path,)
    module = NODE_MODULES.get(executable)
    if module is not None and importlib.util.find_spec(module) is not None:
        return (sys.executable, "-m", module)
    raise LaunchFileError(
        f"{path}: executable {executable!r} of package {package!r} not found "
        f"(looked in {[str(d) for d in script_dirs]}, PATH and {sorted(NODE_MODULES)})"
    )
