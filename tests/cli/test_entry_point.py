"""Smoke test of the real entry point, in a separate Python process.

``python -m covextract`` runs the same ``main`` as the installed ``covextract``
script (``[project.scripts]`` in pyproject.toml). The repository root goes on
PYTHONPATH so the test works from a checkout without installing.
"""

from __future__ import annotations

import os
import subprocess
import sys


def _run(args, cwd, repo_root):
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        [str(repo_root)] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])
    )
    return subprocess.run(
        [sys.executable, "-m", "covextract", *args],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def test_check_on_a_demo_copy_and_help(demo_dir, repo_root):
    recipe = demo_dir / "recipe.yaml"
    check = _run(["check", str(recipe)], demo_dir, repo_root)
    assert check.returncode == 0, check.stderr
    assert check.stdout == f"{recipe}: recipe and inputs look right; nothing was computed.\n"
    assert not (demo_dir / "out").exists()

    helped = _run(["--help"], demo_dir, repo_root)
    assert helped.returncode == 0, helped.stderr
    assert "Usage:" in helped.stdout
    for command in ("run", "check", "describe", "demo"):
        assert f" {command} " in helped.stdout

    (demo_dir / "broken.yaml").write_text("version: 1\nstudy: [\n", encoding="utf-8")
    broken = _run(["check", "broken.yaml"], demo_dir, repo_root)
    assert broken.returncode == 1
    assert "not valid YAML" in broken.stderr
    assert "Traceback" not in broken.stderr
