"""The ``compliant-demo`` command line: one entry point, one subcommand per step of the job.

Each subcommand lives in a module of this package that defines ``register(subparsers)``; the
module is listed in ``_COMMAND_MODULES``. :func:`main` is the one error boundary: a user error
(a bad option value, an argument that is not UTF-8, or one of our named exceptions) prints one
line in the command line's own terms (``--force``, not ``force=True``) and exits with status 2;
warnings of the core print as one ``warning:`` line without source paths; a reader that closes
the pipe early (``list | head -2``) ends the command quietly with status 141, as for other tools
killed by SIGPIPE; success exits 0.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import sys
import warnings
from collections.abc import Callable, Mapping, Sequence
from typing import Any, NoReturn

from compliant_demo import __version__
from compliant_demo.cli.common import DASH_VALUE_OPTIONS
from compliant_demo.display import printable
from compliant_demo.exceptions import CompliantDemoError

__all__ = ["main", "build_parser"]

_COMMAND_MODULES: tuple[str, ...] = (
    "compliant_demo.cli.launch_cmds",
    "compliant_demo.cli.store_cmds",
    "compliant_demo.cli.tour_cmds",
    "compliant_demo.cli.teaching_cmds",
    "compliant_demo.cli.watch_cmds",
    "compliant_demo.cli.learn_cmds",
    "compliant_demo.cli.replay_cmds",
    "compliant_demo.cli.campaign_cmds",
    "compliant_demo.cli.compare_cmds",
    "compliant_demo.cli.report_cmds",
)

#: Python parameter names that core messages use, and the destination of the option that sets
#: them on the command line. A message of a command that has the option names the option.
_PARAMETER_OPTIONS: Mapping[str, str] = {
    "force": "force",
    "skip_bad": "skip_bad",
    "order_by": "order_by",
    "limit": "limit",
    "min_duration_s": "min_duration",
    "where": "where",
    "where_args": "arg",
    "started_after": "since",
    "started_before": "until",
    "scheduler": "scheduler",
}
_IDENTIFIER = re.compile(r"(?<![\w.'\"-])([a-z][a-z0-9]*(?:_[a-z0-9]+)*)(=True\b)?(?![\w'\"-])")

_BROKEN_PIPE_STATUS = 128 + 13  # what a shell reports for a process ended by SIGPIPE


class _UsageError(Exception):
    """A command line argparse refused; carries the parser's program name."""

    def __init__(self, prog: str, message: str) -> None:
        super().__init__(message)
        self.prog = prog


class _Parser(argparse.ArgumentParser):
    """An ArgumentParser whose errors reach :func:`main`'s boundary instead of exiting."""

    def error(self, message: str) -> NoReturn:
        raise _UsageError(self.prog, message)


def _build() -> tuple[argparse.ArgumentParser, Mapping[str, argparse.ArgumentParser]]:
    parser = _Parser(
        prog="compliant-demo",
        description=(
            "Record kinesthetic demonstrations on compliant joints, learn skills with stiffness "
            "profiles and check them in perturbed simulation. SI units throughout "
            "(rad, rad/s, N*m, N*m/rad, s)."
        ),
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for module_name in _COMMAND_MODULES:
        importlib.import_module(module_name).register(subparsers)
    return parser, subparsers.choices


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser with every registered subcommand."""
    return _build()[0]


def _prepare(argv: Sequence[str]) -> list[str]:
    """Refuse arguments that are not UTF-8, and join dash-leading values to their option."""
    tokens = list(argv)
    for index, token in enumerate(tokens):
        try:
            token.encode("utf-8")
        except UnicodeEncodeError:
            option, _, value = token.partition("=") if token.startswith("--") else ("", "", token)
            if not option and index > 0 and tokens[index - 1].startswith("-"):
                option = tokens[index - 1]
            raw = value.encode("utf-8", "surrogateescape")
            raise _UsageError(
                "", f"{option or f'argument {index + 1}'}: {raw!r} is not valid UTF-8 text"
            ) from None
    joined: list[str] = []
    for token in tokens:
        if joined and joined[-1] in DASH_VALUE_OPTIONS and re.match(r"-[^-]", token):
            joined[-1] = f"{joined[-1]}={token}"
        else:
            joined.append(token)
    return joined


def _in_cli_terms(message: str, parser: argparse.ArgumentParser | None) -> str:
    """``message`` with the Python parameters it names replaced by ``parser``'s options."""
    if parser is None:
        return message
    options = {
        action.dest: max(action.option_strings, key=len)
        for action in parser._actions
        if action.option_strings
    }

    def swap(match: re.Match[str]) -> str:
        name, set_true = match.group(1), match.group(2)
        option = options.get(_PARAMETER_OPTIONS.get(name, ""))
        if option is None or not (set_true or "_" in name or match.start() == 0):
            return match.group(0)
        return option

    return _IDENTIFIER.sub(swap, message)


def _warning_printer(prog: str) -> Callable[..., None]:
    shown: set[str] = set()

    def show(message: Warning | str, category: type[Warning], *_: Any, **__: Any) -> None:
        text = printable(str(message))
        if text not in shown:
            shown.add(text)
            print(f"{prog}: warning: {text}", file=sys.stderr)

    return show


def _silence_stdout() -> None:
    """Point stdout at /dev/null so the interpreter's last flush meets no closed pipe."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # a captured stdout (tests) has no descriptor to replace
        pass


def _command_of(tokens: Sequence[str], commands: Mapping[str, argparse.ArgumentParser]) -> str:
    return next((token for token in tokens if token in commands), "")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the process exit status."""
    parser, commands = _build()
    tokens = list(sys.argv[1:] if argv is None else argv)
    command = _command_of(tokens, commands)
    prog = f"compliant-demo {command}".rstrip()
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _warning_printer(prog)
            args = parser.parse_args(_prepare(tokens))
            status = args.handler(args)
            sys.stdout.flush()
    except _UsageError as exc:
        print(f"{exc.prog or prog}: error: {printable(exc)} (see --help)", file=sys.stderr)
        return 2
    except CompliantDemoError as exc:
        message = _in_cli_terms(str(exc), commands.get(command))
        print(f"{prog}: error: {printable(message)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{prog}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        _silence_stdout()
        return _BROKEN_PIPE_STATUS
    return int(status or 0)
