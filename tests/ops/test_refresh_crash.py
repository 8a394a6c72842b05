"""A refresh killed at any point: outputs intact, ledger consistent, the next refresh completes.

Each test starts from the same "previous month" state (a refresh done while
December 2021 was not delivered yet), adds December, and kills a refresh in a
subprocess: at a named crash point (``COVEXTRACT_CRASH_AT``: the process sends
itself SIGKILL, so no cleanup code runs) or from outside with a real
``kill -9`` while it waits at ``COVEXTRACT_HOLD_AT``. No test sleeps.
"""

from __future__ import annotations

import os
import selectors
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from typer.testing import CliRunner

from covextract.cli.app import app
from covextract.crashpoints import CRASH_ENV, HOLD_ENV
from covextract.demo import lay_out_demo
from covextract.io.writers import COMMIT_JOURNAL, recover_commit
from covextract.ops.refresh import refresh
from covextract.outputs.manifest import verify_outputs
from covextract.run import run
from covextract.state.ledger import Ledger
from covextract.state.lock import EXIT_CODES, LockedError

LATE = ("rain/rain_202112.tif", "ndvi_monthly/ndvi_202112.tif")
TABLE = Path("table.csv")  # as _outputs keys it: relative to out/


def _write(folder: Path, data: dict) -> Path:
    path = folder / "test_recipe.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    return path


def _outputs(folder: Path) -> dict:
    """The output files as a reader sees them (temporaries and staged folders left aside)."""
    out = folder / "out"
    return {
        p.relative_to(out): p.read_bytes()
        for p in sorted(out.rglob("*"))
        if p.is_file()
        and p.name != "table_manifest.json"
        and not any(part.startswith(".") for part in p.relative_to(out).parts)
    }


def _complete(folder: Path) -> bool:
    """The outputs on disk are the complete set their manifest describes."""
    return (
        verify_outputs(
            folder / "out" / "table_manifest.json", base_dir=folder, panel=folder / "out" / "panel"
        )
        == []
    )


@pytest.fixture(scope="module")
def states(tmp_path_factory, refresh_recipe_data):
    """``(previous, late files, final outputs, previous outputs)``, built once for the module."""
    base = tmp_path_factory.mktemp("crash")
    full = lay_out_demo(base / "full")
    run(_write(full, refresh_recipe_data))
    previous = lay_out_demo(base / "previous")
    late = base / "late"
    late.mkdir()
    for rel in LATE:
        shutil.move(previous / rel, late / Path(rel).name)
    refresh(_write(previous, refresh_recipe_data))
    return previous, late, _outputs(full), _outputs(previous), refresh_recipe_data


@pytest.fixture
def month_delivered(states, tmp_path):
    """A copy of the previous state with December delivered; returns its recipe."""
    previous, late, _, _, data = states
    folder = tmp_path / "site"
    shutil.copytree(previous, folder)
    for rel in LATE:
        shutil.copy2(late / Path(rel).name, folder / rel)
    return _write(folder, data)


def _env(**extra) -> dict:
    env = dict(os.environ)
    repo = str(Path(__file__).resolve().parents[2])
    env["PYTHONPATH"] = os.pathsep.join(
        [repo] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else [])
    )
    env.pop(CRASH_ENV, None)
    env.pop(HOLD_ENV, None)
    env.update(extra)
    return env


def _refresh_cmd(recipe: Path) -> list[str]:
    return [sys.executable, "-m", "covextract", "refresh", str(recipe), "-q"]


def _ledger_consistent(state: Path) -> set:
    """Check the ledger and return the periods it records."""
    with Ledger(state) as ledger:
        ledger.check()
        rows = ledger.rows()
    assert all((state / r.output_file).is_file() for r in rows)
    return {r.period_start for r in rows}


#: crash point -> the output set it leaves: "old" (the previous set, complete), "new" (the
#: new set, complete) or "journal" (the commit is decided and half done: the next run or
#: refresh completes it before anything else, giving the new set)
CRASH_POINTS = {
    "before_rename:2021-12-01.parquet": "old",  # the first new piece, complete, not renamed
    "after_pieces": "old",
    "after_panel": "old",  # staged: the new panel folder beside the old one
    "after_codebook": "old",
    "after_table": "old",
    "after_staging": "old",  # every new file staged, the manifest too; no journal yet
    "before_rename:commit.json": "old",  # the journal complete, not yet in place
    "after_journal": "journal",
    "before_rename:panel": "journal",  # each rename of the commit, in its fixed order
    "before_rename:table_codebook.csv": "journal",
    "before_rename:table_codebook.md": "journal",
    "before_rename:table.csv": "journal",
    "before_rename:table_manifest.json": "journal",  # the manifest is renamed last
    "after_manifest": "new",
    "before_ledger_commit": "new",
    "after_ledger_commit": "new",
}


@pytest.mark.parametrize("point", list(CRASH_POINTS))
def test_a_refresh_killed_at_a_crash_point_is_completed_by_the_next(point, states, month_delivered):
    _, _, final, before, _ = states
    folder = month_delivered.parent
    state = folder / ".covextract-state"
    killed = subprocess.run(
        _refresh_cmd(month_delivered),
        env=_env(**{CRASH_ENV: point}),
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    # the set is the old one or the new one, each complete; a commit killed half way is
    # recorded in its journal and completed (what the next run does first, under the lock)
    left = CRASH_POINTS[point]
    journal = state / COMMIT_JOURNAL
    assert journal.exists() == (left == "journal")
    if left == "journal":
        assert recover_commit(state)
        assert not journal.exists()
    assert _outputs(folder) == (before if left == "old" else final)
    assert _complete(folder)
    recorded = _ledger_consistent(state)
    committed = point == "after_ledger_commit"
    assert ("2021-12-01" in recorded) == committed
    # the next refresh (same recipe, lock free again) completes the work
    done = refresh(month_delivered)
    if committed:
        # everything was in place and recorded; only the run's own end was not
        assert done.status == "nothing_to_do" and done.computed == {}
    else:
        assert done.status == "success"
        assert sum(len(v) for v in done.computed.values()) == 3
    assert _outputs(folder) == final
    assert "2021-12-01" in _ledger_consistent(state)
    # temporary files the killed run left behind were cleared by the next one
    assert not [p for p in folder.rglob(".*") if ".tmp" in p.name]


def test_a_real_kill_9_while_refreshing_leaves_everything_consistent(states, month_delivered):
    _, _, final, before, _ = states
    folder = month_delivered.parent
    runner = CliRunner()
    holder = subprocess.Popen(
        _refresh_cmd(month_delivered),
        env=_env(**{HOLD_ENV: "after_pieces"}),
        stdin=subprocess.PIPE,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        seen = _wait_for_line(holder, "covextract: holding at after_pieces", timeout=300)
        assert seen, "the refresh never reached the hold point"
        # while it holds the state folder, a second refresh is refused with its own code
        with pytest.raises(LockedError, match=f"pid {holder.pid}"):
            refresh(month_delivered)
        second = runner.invoke(app, ["refresh", str(month_delivered), "-q"])
        assert second.exit_code == EXIT_CODES["locked"] == 5
        assert "another covextract run holds the lock" in second.output
        assert f"(pid {holder.pid}," in second.output
        os.kill(holder.pid, signal.SIGKILL)
        assert holder.wait(timeout=60) == -signal.SIGKILL
    finally:
        if holder.poll() is None:
            holder.kill()
            holder.wait()
        holder.stdin.close()
        holder.stderr.close()
    assert (folder / "out" / TABLE).read_bytes() == before[TABLE]
    assert "2021-12-01" not in _ledger_consistent(folder / ".covextract-state")
    with Ledger(folder / ".covextract-state") as ledger:
        last = ledger.last_run()
    assert last.finished is None  # the killed run: started, never finished
    done = runner.invoke(app, ["refresh", str(month_delivered), "-q"])
    assert done.exit_code == 0, done.output
    assert "computed 3 piece(s)" in done.output
    assert _outputs(folder) == final
    status = runner.invoke(app, ["status", str(month_delivered)])
    assert status.exit_code == 0
    assert "result success" in status.output


def _wait_for_line(proc, text: str, *, timeout: float) -> bool:
    """Read the process's stderr until a line holds ``text`` (False on EOF or timeout)."""
    sel = selectors.DefaultSelector()
    sel.register(proc.stderr, selectors.EVENT_READ)
    try:
        while True:
            if not sel.select(timeout=timeout):
                return False
            line = proc.stderr.readline()
            if not line:
                return False
            if text in line:
                return True
    finally:
        sel.close()
