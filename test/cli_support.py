"""Helpers shared by the command-line tests: run ``compliant-demo`` in process and check that an
error is one line in the command line's own terms."""

from __future__ import annotations

import re

from compliant_demo.cli import main


def run_cli(capsys, *argv) -> tuple[int, str, str]:
    """Exit status, stdout and stderr of ``compliant-demo argv...`` run in this process."""
    status = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def one_line_error(err: str, command: str, pattern: str) -> None:
    """``err`` is exactly one ``compliant-demo COMMAND: error:`` line matching ``pattern``."""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"compliant-demo {command}: error: "), err
    assert re.search(pattern, lines[0]), lines[0]
    assert "Traceback" not in err
