"""Start-up of the command line: ``--help`` imports no command module and no heavy library.

Each check runs a fresh interpreter (``python -c``), since the test process itself has long
imported numpy and friends. Which modules an interpreter loaded is read from ``sys.modules``
(Python language reference, "The import system": every imported module is entered there).
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from flairwatch.cli import COMMANDS

HEAVY = ("numpy", "SimpleITK", "onnxruntime", "scipy", "pydicom", "nibabel", "yaml", "watchdog")
PHANTOM_GENERATOR = (
    "flairwatch.phantom.generator",
    "flairwatch.phantom.anatomy",
    "flairwatch.phantom.render",
)

PROBE = """
import json, sys
from flairwatch.cli import main
try:
    main({argv!r})
except SystemExit:
    pass
print(json.dumps(sorted(sys.modules)))
"""


def modules_after(argv: list[str]) -> set[str]:
    """Names in ``sys.modules`` after ``main(argv)`` in a fresh interpreter."""
    out = subprocess.run(
        [sys.executable, "-c", PROBE.format(argv=argv)],
        check=True,
        capture_output=True,
        text=True,
    ).stdout
    return set(json.loads(out.strip().splitlines()[-1]))


def heavy_in(modules: set[str]) -> list[str]:
    return sorted(m for m in modules if m.split(".")[0] in HEAVY or m.startswith(PHANTOM_GENERATOR))


def test_top_level_help_imports_no_command_module_and_nothing_heavy() -> None:
    modules = modules_after(["--help"])
    assert heavy_in(modules) == []
    command_modules = {c.target.partition(":")[0] for c in COMMANDS}
    assert command_modules & modules == set()
    assert "flairwatch.cli" in modules  # the probe did run the command line


@pytest.mark.parametrize("command", [c.name for c in COMMANDS])
def test_each_command_help_imports_nothing_heavy(command: str) -> None:
    modules = modules_after([command, "--help"])
    assert heavy_in(modules) == []
    own = next(c.target.partition(":")[0] for c in COMMANDS if c.name == command)
    assert own in modules
    others = {c.target.partition(":")[0] for c in COMMANDS} - {own}
    assert others & modules == set(), "only the command's own module is imported"


def test_a_failing_probe_would_see_numpy() -> None:
    """The probe can fail: a command that runs the engine does import the heavy libraries."""
    modules = modules_after(["models"])
    assert "numpy" in modules or "yaml" in modules


@pytest.mark.parametrize("form", [["-m", "flairwatch"], ["-m", "flairwatch.cli"]])
def test_module_forms_run_the_same_command_line(form: list[str]) -> None:
    done = subprocess.run([sys.executable, *form, "--help"], capture_output=True, text=True)
    assert done.returncode == 0
    for command in COMMANDS:
        assert command.name in done.stdout
    bad = subprocess.run([sys.executable, *form, "no-such-command"], capture_output=True, text=True)
    assert bad.returncode == 2  # argparse's usage error, as DESIGN's exit codes say
