"""Run the `driftscreen` command line in this process (fast, and exceptions surface)."""

from __future__ import annotations

import contextlib
import io

from driftscreen.cli import main


def run_cli(arguments: list[str]) -> tuple[int, str, str]:
    """``driftscreen ARGUMENTS``: exit status, stdout and stderr."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            status = main(arguments)
        except SystemExit as stop:  # usage errors exit from the argument parser
            status = int(stop.code)
    return status, out.getvalue(), err.getvalue()
