"""Reliability catalogue: output paths that would damage what the user has, and write failures.

Every case asserts the exact message, the exit code, that no traceback was
printed and that no file changed (see ``conftest.py``). Tests run as root
here, where ``chmod`` does not stop writes, so read-only folders, full disks
and quotas are simulated by making the system calls answer as the kernel
would (``statvfs`` flags a read-only mount, ``access`` refuses, ``fsync``
finds no room for the data, ``os.replace`` fails in the state folder).
"""

from __future__ import annotations

import copy
import errno
import os
from pathlib import Path

import pytest

from tests.ops.conftest import REFRESH_RECIPE
from tests.reliability.conftest import snapshot

NEVER = "covextract never writes over an input: choose another path"


def _only_under(folder: Path, real, exc_errno: int):
    """A wrapper of ``real(path, ...)`` that fails with ``exc_errno`` for paths under ``folder``."""
    folder = str(folder)

    def fake(path, *args, **kwargs):
        p = os.fspath(path) if not isinstance(path, int) else ""
        if isinstance(p, bytes):
            p = os.fsdecode(p)
        if p and os.path.abspath(p).startswith(folder + os.sep):
            raise OSError(exc_errno, os.strerror(exc_errno), p)
        return real(path, *args, **kwargs)

    return fake


def _unwritable(monkeypatch, folder: Path, code: int) -> None:
    """Make ``folder`` look read-only (EROFS: a read-only mount) or forbidden (EACCES)."""
    folder = os.path.abspath(folder)
    if code == errno.EROFS:
        real = os.statvfs

        def statvfs(path):
            result = real(path)
            if os.path.abspath(path) != folder:
                return result
            values = list(result)
            values[8] |= os.ST_RDONLY  # f_flag
            return os.statvfs_result(values)

        monkeypatch.setattr(os, "statvfs", statvfs)
    else:
        real_access = os.access

        def access(path, mode, **kw):
            if os.path.abspath(path) == folder and mode & os.W_OK:
                return False
            return real_access(path, mode, **kw)

        monkeypatch.setattr(os, "access", access)


def _fsync_failing_under(folder: Path, exc_errno: int):
    """``os.fsync`` failing for files under ``folder`` (the data does not fit on the disk)."""
    real = os.fsync
    folder = str(folder)

    def fake(fd):
        try:
            target = os.readlink(f"/proc/self/fd/{fd}")
        except OSError:
            target = ""
        if target.startswith(folder + os.sep) and os.path.isfile(target):
            raise OSError(exc_errno, os.strerror(exc_errno))
        return real(fd)

    return fake


def _outside_state(folder: Path) -> dict:
    """The snapshot of everything but the state folder (recomputable pieces may appear there)."""
    return {k: v for k, v in snapshot(folder).items() if not k.startswith(".covextract-state")}


# ------------------------------------------------------------------ inputs
def test_codebook_over_the_study_table(scenario):
    scenario.data["output"]["codebook"] = "villages.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=f"error: output.codebook is villages.csv, the study table (an input); {NEVER}",
    )


def test_check_reports_the_codebook_over_the_study_table(scenario):
    scenario.data["output"]["codebook"] = "villages.csv"
    scenario.write_recipe()
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=f"output.codebook is villages.csv, the study table (an input); {NEVER}",
    )


def test_manifest_over_another_input(scenario):
    scenario.data["output"]["manifest"] = "district_totals.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.manifest is district_totals.csv, the totals file of pop_alloc "
            f"(an input); {NEVER}"
        ),
    )


def test_output_equal_to_the_input(scenario):
    # written as an absolute path, so only the resolved paths show it is the study table
    scenario.data["output"]["table"] = str(scenario.folder / "villages.csv")
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=f"output.table is villages.csv, the study table (an input); {NEVER}",
    )


def test_output_equal_to_the_input_through_a_symlink(scenario):
    (scenario.folder / "shared.csv").symlink_to(scenario.folder / "villages.csv")
    scenario.data["output"]["table"] = "shared.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.table is shared.csv, which leads to villages.csv, the study table "
            f"(an input); {NEVER}"
        ),
    )


def test_output_over_a_raster_through_a_symlinked_folder(scenario):
    (scenario.folder / "published").symlink_to(scenario.folder)
    scenario.data["output"]["codebook"] = "published/ndvi_2021.tif.csv"
    scenario.data["output"]["manifest"] = "published/night_lights_2021.tif"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.manifest is published/night_lights_2021.tif, which leads to "
            "night_lights_2021.tif, a file of layer lights (an input); " + NEVER
        ),
    )


def test_codebook_equal_to_the_table(scenario):
    scenario.data["output"]["codebook"] = str(scenario.folder / "out/villages_covariates.csv")
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.table is out/villages_covariates.csv, the same file as "
            "output.codebook; give each output its own path"
        ),
    )


def test_manifest_equal_to_the_codebook_markdown(scenario):
    scenario.data["output"]["manifest"] = "out/codebook.md"
    scenario.write_recipe()
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="output.manifest is out/codebook.md; it is written as JSON: give a name ending "
        "in .json",
    )


def _refresh_scenario(scenario, **output):
    data = copy.deepcopy(REFRESH_RECIPE)
    data["output"].update(output)
    scenario.data = data
    scenario.write_recipe()


def test_panel_in_the_rain_input_folder(scenario):
    _refresh_scenario(scenario, panel="rain")
    scenario.expect(
        ["refresh", scenario.recipe],
        code=1,
        message=(
            "error: output.panel is rain, the folder of layer rain's series (an input); "
            "covextract never writes into an input folder: choose another path"
        ),
    )


def test_panel_below_the_rain_input_folder(scenario):
    _refresh_scenario(scenario, panel="rain/panel")
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=(
            "output.panel is rain/panel, inside rain, the folder of layer rain's series (an "
            "input); covextract never writes into an input folder: choose another path"
        ),
    )


def test_panel_folder_that_holds_the_inputs(scenario):
    _refresh_scenario(scenario, panel=".")
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.panel is ., a folder that holds inputs (case.yaml, "
            "ndvi_2021.tif, ndvi_monthly/ndvi_202001.tif, ...); covextract replaces the panel "
            "folder whole at every run: choose a folder of its own"
        ),
    )


# ------------------------------------------------------------------ shapes of paths
def test_output_parent_that_is_a_file(scenario):
    (scenario.folder / "notes.txt").write_text("field notes\n", encoding="utf-8")
    scenario.data["output"]["table"] = "notes.txt/table.csv"
    scenario.data["output"]["codebook"] = "out/codebook.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message="error: output.table is notes.txt/table.csv, but notes.txt is a file, not a "
        "folder: choose another path",
    )


def test_xlsx_table(scenario):
    scenario.data["output"]["table"] = "out/villages.xlsx"
    scenario.write_recipe()
    scenario.expect(["run", scenario.recipe], code=1, message=".xlsx")


def test_xlsx_codebook(scenario):
    scenario.data["output"]["codebook"] = "out/codebook.xlsx"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message="error: output.codebook is out/codebook.xlsx; it is written as CSV: give a name "
        "ending in .csv",
    )


def test_folder_as_output(scenario):
    (scenario.folder / "out" / "villages_covariates.csv").mkdir(parents=True)
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message="error: output.table is out/villages_covariates.csv, which is a folder; give "
        "a file name",
    )


def test_state_path_that_is_a_file(scenario):
    scenario.data["output"]["state"] = "villages_state.txt"
    (scenario.folder / "villages_state.txt").write_text("not a folder\n", encoding="utf-8")
    scenario.write_recipe()
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message="output.state is villages_state.txt, which is a file; output.state is a folder: "
        "give a folder name",
    )


# ------------------------------------------------------------------ files covextract did not write
def test_relative_path_out_of_the_recipe_folder_over_an_unrelated_file(scenario, tmp_path):
    precious = tmp_path.parent / "x.csv"
    precious.write_text("somebody else's data\n", encoding="utf-8")
    try:
        scenario.data["output"]["table"] = "../../x.csv"
        scenario.data["output"]["codebook"] = "out/codebook.csv"
        scenario.write_recipe()
        scenario.expect(
            ["run", scenario.recipe],
            code=1,
            message=(
                f"error: output.table is {precious}, an existing file covextract did not write "
                "(the last run's manifest does not list it); covextract replaces only its own "
                "outputs: choose another path, or pass --overwrite to replace it"
            ),
        )
        assert precious.read_text(encoding="utf-8") == "somebody else's data\n"
    finally:
        precious.unlink()


def test_absolute_path_over_an_existing_file_needs_overwrite(scenario, tmp_path):
    other = tmp_path / "elsewhere"
    other.mkdir()
    target = other / "table.csv"
    target.write_text("an older table, kept by hand\n", encoding="utf-8")
    scenario.data["output"]["table"] = str(target)
    scenario.data["output"]["codebook"] = "out/codebook.csv"
    scenario.write_recipe()
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            f"error: output.table is {target}, an existing file covextract did not write (the "
            "last run's manifest does not list it); covextract replaces only its own outputs: "
            "choose another path, or pass --overwrite to replace it"
        ),
    )
    # accepted with --overwrite, and then it is covextract's own: a second run needs no flag
    done = scenario.expect(
        ["run", scenario.recipe, "--overwrite", "-q"], code=0, message="", changed=True
    )
    assert done.exit_code == 0
    assert target.read_text(encoding="utf-8").startswith("village_id,")
    scenario.expect(["run", scenario.recipe, "-q"], code=0, message="", changed=True)


def test_edited_output_is_not_replaced_without_overwrite(scenario):
    scenario.expect(["run", scenario.recipe, "-q"], code=0, message="", changed=True)
    table = scenario.folder / "out" / "villages_covariates.csv"
    table.write_text(table.read_text(encoding="utf-8") + "note added by hand\n", encoding="utf-8")
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.table is out/villages_covariates.csv, an existing file covextract "
            "did not write (the last run's manifest does not list it); covextract replaces only "
            "its own outputs: choose another path, or pass --overwrite to replace it"
        ),
    )


def test_panel_folder_with_files_covextract_did_not_write(scenario):
    _refresh_scenario(scenario, panel="out/panel")
    panel = scenario.folder / "out" / "panel"
    panel.mkdir(parents=True)
    (panel / "README.txt").write_text("my notes\n", encoding="utf-8")
    scenario.expect(
        ["refresh", scenario.recipe],
        code=1,
        message=(
            "error: output.panel is out/panel, a folder holding files covextract did not write "
            "(README.txt); the panel folder is replaced whole at every run: choose another "
            "path, or pass --overwrite to replace it"
        ),
    )


# ------------------------------------------------------------------ unwritable and full
@pytest.mark.parametrize(
    ("code", "what", "todo"),
    [
        (errno.EROFS, "the file system is read-only", "choose another output folder"),
        (errno.EACCES, "permission denied", "get write permission or choose another output folder"),
    ],
)
def test_check_with_an_unwritable_output_folder(scenario, monkeypatch, code, what, todo):
    out = scenario.folder / "out"
    out.mkdir()
    _unwritable(monkeypatch, out, code)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=(
            "output.codebook, output.table, output.manifest: cannot write in out: "
            f"{what} ({os.strerror(code)}); {todo}"
        ),
    )


def test_run_with_a_read_only_output_folder_stops_before_computing(scenario, monkeypatch):
    out = scenario.folder / "out"
    out.mkdir()
    _unwritable(monkeypatch, out, errno.EROFS)
    scenario.expect(
        ["run", scenario.recipe],
        code=1,
        message=(
            "error: output.codebook, output.table, output.manifest: cannot write in out: the "
            "file system is read-only (Read-only file system); choose another output folder"
        ),
    )
    assert not (scenario.folder / ".covextract-state").exists()  # nothing was computed


def test_not_enough_free_space_is_found_before_computing(scenario, monkeypatch):
    import shutil

    real = shutil.disk_usage
    monkeypatch.setattr(shutil, "disk_usage", lambda p: real(p)._replace(free=1000))
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=(
            # a first run: 40 rows x 47 columns (9 of the study table, 38 new) x 24 bytes
            "not enough free space in . for the outputs: they need about 45 kB, 1 kB is "
            "free; free space or choose another output folder"
        ),
    )


@pytest.mark.parametrize(
    ("code", "what", "todo"),
    [
        (errno.ENOSPC, "the disk is full", "free space or choose another output folder"),
        (errno.EDQUOT, "the disk quota is used up", "free space or choose another output folder"),
        (errno.EACCES, "permission denied", "get write permission or choose another output folder"),
        (errno.EROFS, "the file system is read-only", "choose another output folder"),
    ],
)
def test_write_failure_at_the_outputs_leaves_the_previous_outputs(
    scenario, monkeypatch, code, what, todo
):
    scenario.expect(["run", scenario.recipe, "-q"], code=0, message="", changed=True)
    before = _outside_state(scenario.folder)
    out = scenario.folder / "out"
    monkeypatch.setattr(os, "fsync", _fsync_failing_under(out, code))
    result = scenario.expect(
        ["run", scenario.recipe, "-q"],
        code=1,
        message=(
            f"error: cannot write out/codebook.csv: {what} ({os.strerror(code)}); {todo}; "
            "the previous outputs are intact"
        ),
        changed=True,  # the state folder may hold the new (recomputable) pieces
    )
    assert result.exit_code == 1
    assert _outside_state(scenario.folder) == before
    assert not [p for p in out.iterdir() if ".tmp" in p.name]


def test_disk_full_at_the_state_folder(scenario, monkeypatch):
    _refresh_scenario(scenario)
    before = snapshot(scenario.folder)
    state = scenario.folder / ".covextract-state"
    monkeypatch.setattr(os, "replace", _only_under(state, os.replace, errno.ENOSPC))
    result = scenario.expect(
        ["refresh", scenario.recipe, "-q"],
        code=1,
        message=(
            "error: cannot write the state folder .covextract-state: the disk is full (No space "
            "left on device); free space or choose another state folder (output.state); the "
            "previous outputs are intact"
        ),
        changed=True,  # the state folder and its ledger are created
    )
    assert result.exit_code == 1
    after = snapshot(scenario.folder)
    assert {k: v for k, v in after.items() if not k.startswith(".covextract-state")} == before


# ------------------------------------------------------------------ a mixed set
def _mix(scenario) -> None:
    """A complete run, then one output replaced by another run's (older) content."""
    scenario.expect(["run", scenario.recipe, "-q"], code=0, message="", changed=True)
    codebook = scenario.folder / "out" / "codebook.csv"
    codebook.write_text(codebook.read_text(encoding="utf-8") + "\n", encoding="utf-8")


def test_status_reports_a_mixed_output_set(scenario):
    _mix(scenario)
    scenario.expect(
        ["status", scenario.recipe],
        code=0,
        message=(
            "outputs: a mixed set, not the one their manifest describes (out/codebook.csv has "
            "changed since the run); the next refresh writes them all again"
        ),
    )


@pytest.mark.filterwarnings("default::covextract.outputs.manifest.MixedOutputsWarning")
def test_check_warns_about_a_mixed_output_set(scenario):
    _mix(scenario)
    scenario.expect(
        ["check", scenario.recipe],
        code=1,
        message=(
            "warning (MixedOutputsWarning): the outputs are a mixed set, not the one their "
            "manifest describes (out/codebook.csv has changed since the run); the next refresh "
            "writes them all again"
        ),
    )
