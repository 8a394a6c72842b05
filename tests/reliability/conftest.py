"""The reliability catalogue's harness: one bad input per case, four things checked.

Each case runs a covextract command on a fresh copy of the invented demo
scenario (through typer's ``CliRunner``, as a user would) and asserts:

1. the exact message (what is wrong, where, what to do) on stderr;
2. the exit code;
3. that no Python traceback was printed;
4. that no file changed: every file under the scenario folder (which holds
   the recipe, the inputs, the output folders and the state folder) is
   hashed before and after; the lock and the refresh log are left aside.

Use :func:`bad_input` from a test::

    def test_codebook_over_the_study_table(scenario):
        scenario.edit_recipe(output={"table": "out/t.csv", "codebook": "villages.csv"})
        scenario.expect(["run", scenario.recipe], code=1, message="...")
"""

from __future__ import annotations

import copy
import hashlib
from dataclasses import dataclass
from pathlib import Path

import pytest
import yaml

from covextract.demo import demo_data_folder, lay_out_demo

#: Files that a refused command may still touch (they hold no user data).
IGNORED = {"lock", "refresh.log"}


def snapshot(folder: Path) -> dict:
    """SHA-256 of every file under ``folder`` (symlinks by their target text), lock and log aside."""
    out = {}
    for path in sorted(Path(folder).rglob("*")):
        if path.name in IGNORED:
            continue
        if path.is_symlink():
            out[str(path.relative_to(folder))] = "link:" + str(path.readlink())
        elif path.is_file():
            out[str(path.relative_to(folder))] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


@dataclass
class Scenario:
    """A copy of the demo scenario with a recipe to break, and the assertions of a case."""

    folder: Path
    recipe: Path
    data: dict

    def edit_recipe(self, **blocks) -> Path:
        """Replace top-level blocks of the recipe (``output={...}``) and write it."""
        self.data.update(copy.deepcopy(blocks))
        return self.write_recipe(self.data)

    def write_recipe(self, data=None, text: str | None = None) -> Path:
        """Write the recipe from ``data`` (YAML) or raw ``text``."""
        if text is None:
            text = yaml.safe_dump(self.data if data is None else data, sort_keys=False)
        self.recipe.write_text(text, encoding="utf-8")
        return self.recipe

    def expect(self, args, *, code: int, message: str, changed: bool = False):
        """Run ``covextract *args`` and assert the four properties of a refusal.

        ``message`` must appear in stderr (or stdout) exactly as given.
        Returns the CliRunner result.
        """
        from typer.testing import CliRunner

        from covextract.cli.app import app

        before = snapshot(self.folder)
        result = CliRunner().invoke(app, [str(a) for a in args])
        out = result.stdout + (result.stderr or "")
        assert result.exit_code == code, out
        assert message in out, out
        assert "Traceback" not in out, out
        if result.exception is not None and not isinstance(result.exception, SystemExit):
            raise AssertionError(f"unexpected exception {result.exception!r}") from result.exception
        if not changed:
            assert snapshot(self.folder) == before
        return result


@pytest.fixture
def scenario(tmp_path) -> Scenario:
    """The demo scenario in ``tmp_path/demo`` with its recipe copied to ``case.yaml``."""
    folder = lay_out_demo(tmp_path / "demo")
    data = yaml.safe_load((demo_data_folder() / "recipe.yaml").read_text(encoding="utf-8"))
    recipe = folder / "case.yaml"
    s = Scenario(folder, recipe, data)
    s.write_recipe()
    return s
