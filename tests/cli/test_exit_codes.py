"""Exit codes of the command line beyond errors: a reader that stops early."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

# a command whose result is long: every printed line is what `recommend --top 240` would print for many users
_LONG_OUTPUT = """
import sys
from towers import cli
cli.run = lambda args: [print("x" * 80) for _ in range(200_000)] and 0
sys.exit(cli.main(["report", "some_run"]))
"""


def test_a_reader_that_stops_early_ends_the_command_quietly():
    # `towers recommend ... | head -1`: no traceback, and the code shells give a writer whose reader left
    # (128 + SIGPIPE = 141), as for other command-line tools (common practice, no source)
    proc = subprocess.Popen([sys.executable, "-c", _LONG_OUTPUT], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            cwd=ROOT)
    assert proc.stdout.readline().strip() == b"x" * 80
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=60) == 141 and err == ""


def test_version_prints_the_installed_package_version(capsys):
    # reference: the version the installed distribution's metadata holds (importlib.metadata, pyproject.toml)
    from importlib.metadata import version

    from towers import cli

    with pytest.raises(SystemExit) as stop:
        cli.main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.strip() == f"towers {version('towers')}"
