"""Every command's help renders, shows flags as flags, and needs no heavy import."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest
from typer.testing import CliRunner

from covextract.cli.app import app

runner = CliRunner()

COMMANDS = ("run", "check", "describe", "demo", "refresh", "status", "schedule")

#: Flags (options that take no value) of each command, as the help must list them.
FLAGS = {
    "run": ("-q, --quiet", "--debug"),
    "check": ("--debug",),
    "describe": ("--debug",),
    "demo": ("--spi / --no-spi", "--debug"),
    "refresh": ("-q, --quiet", "--recompute", "--debug"),
    "status": ("--debug",),
    "schedule": ("--systemd", "--install", "-y, --yes", "--debug"),
}


def option_lines(text: str) -> dict:
    """``{option declaration: rest of its first line}`` of a help screen's Options section."""
    rows = {}
    section = text.split("Options:", 1)[1]
    for line in section.splitlines():
        stripped = line.strip()
        if stripped.startswith("-"):
            decl, _, rest = stripped.partition("  ")
            rows[decl.strip()] = rest.strip()
    return rows


@pytest.mark.parametrize("command", COMMANDS)
def test_each_command_help_renders_without_bool(command):
    result = runner.invoke(app, [command, "--help"])
    assert result.exit_code == 0, result.output
    text = result.stdout
    assert text.startswith("Usage: ")
    assert "<bool>" not in text
    rows = option_lines(text)
    # a flag is listed bare: its declaration is followed by its help, not by a type
    for flag in FLAGS[command] + ("--help",):
        assert flag in rows, (flag, sorted(rows))
        assert not rows[flag].startswith("<"), (flag, rows[flag])
    assert rows["--help"] == "Show this message and exit."


@pytest.mark.parametrize("command", ["run", "check", "refresh", "status", "schedule"])
def test_recipe_argument_is_named_as_the_help_text_names_it(command):
    text = runner.invoke(app, [command, "--help"]).stdout
    assert "RECIPE" in text.splitlines()[0]
    assert "  RECIPE <path>  The recipe file (YAML)." in text


def test_top_level_help_lists_every_command_without_bool():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    assert "<bool>" not in result.stdout
    assert option_lines(result.stdout)["--version"] == "Print versions and exit."
    for command in COMMANDS:
        assert f"\n  {command} " in result.stdout


def test_help_needs_no_heavy_import(repo_root):
    # `covextract --help` stays instant: rendering it loads neither rich nor the science stack
    code = (
        "import sys\n"
        "from covextract.cli.app import app\n"
        "for args in (['--help'], ['run', '--help'], ['refresh', '--help']):\n"
        "    try:\n"
        "        app(args)\n"
        "    except SystemExit as exc:\n"
        "        assert exc.code == 0, exc.code\n"
        "heavy = ('rich', 'numpy', 'pandas', 'numba', 'rasterio', 'pyproj', 'shapely')\n"
        "print(','.join(m for m in heavy if m in sys.modules), file=sys.stderr)\n"
    )
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(repo_root)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])
    )
    done = subprocess.run(
        [sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert done.stderr == "\n"
