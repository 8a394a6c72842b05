"""Monthly refresh: only what is new or changed is computed, and the result equals a full run.

The scenario is the invented demo district (36 monthly rainfall and NDVI
rasters). "Equals a full run" is checked byte for byte on the written table,
codebook and panel files, against :func:`covextract.run.run` on a
separate copy of the same inputs with its own state folder.
"""

from __future__ import annotations

import copy
import hashlib
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio

from covextract.ops.refresh import LedgerRebuiltWarning, refresh, refresh_status
from covextract.run import run
from covextract.state.ledger import LEDGER_NAME, Ledger
from covextract.state.lock import EXIT_CODES
from covextract.state.pieces import PIECES_DIR, PieceWarning

#: pieces of the recipe: 36 months of the rain mean (shared by two covariates), 24 of the
#: NDVI mean, 36 of the rain maximum, and one for the static NDVI covariate
N_PIECES = 36 + 24 + 36 + 1


@pytest.fixture
def scene(tmp_path, demo_dir, write_recipe, refresh_recipe):
    """The demo folder with the refresh recipe; returns ``(folder, recipe path)``."""
    return demo_dir, write_recipe(demo_dir, refresh_recipe)


def _full_run(folder: Path, tmp_path: Path, write_recipe, recipe: dict) -> Path:
    """A full run on a separate copy of ``folder``'s inputs; returns the copy."""
    other = tmp_path / f"full-{len(list(tmp_path.glob('full-*')))}"
    shutil.copytree(folder, other, ignore=shutil.ignore_patterns("out", ".covextract-state"))
    run(write_recipe(other, recipe))
    return other


def _outputs(folder: Path) -> dict:
    out = folder / "out"
    files = {p.relative_to(out): p.read_bytes() for p in sorted(out.rglob("*")) if p.is_file()}
    # the manifest records times, absolute paths and the refresh fingerprint: not compared
    return {k: v for k, v in files.items() if k.name != "table_manifest.json"}


def _n_computed(result) -> int:
    return sum(len(v) for v in result.computed.values())


def _move_out(folder: Path, rel: str, store: Path) -> Path:
    store.mkdir(exist_ok=True)
    target = store / Path(rel).name
    shutil.move(folder / rel, target)
    return target


def test_first_refresh_computes_everything_and_equals_a_full_run(
    refresh_recipe, scene, tmp_path, write_recipe
):
    folder, recipe = scene
    result = refresh(recipe)
    assert result.status == "success" and result.exit_code == 0
    # 36 months of the rain mean (shared by two covariates), 24 of NDVI, 36 of the rain
    # maximum (a periods: covariate keeps every period's statistics; the panel shows 2021)
    assert len(result.computed["rain"]) == 36
    assert "wet_months" not in result.computed  # same per-period statistics: shared pieces
    assert len(result.computed["ndvi_m"]) == 24
    assert len(result.computed["rain_month"]) == 36
    assert result.computed["ndvi"] == ["all"]
    full = _full_run(folder, tmp_path, write_recipe, refresh_recipe)
    assert _outputs(folder) == _outputs(full)
    # the panel follows the recipe: only the periods: covariate's selection (2021), once
    panel = sorted(p.name for p in (folder / "out" / "panel").iterdir())
    assert len(panel) == 12 and panel[0] == "2021-01-01.parquet"


def test_second_refresh_with_nothing_new_does_nothing(scene):
    folder, recipe = scene
    refresh(recipe)
    before = {p: p.stat().st_mtime_ns for p in (folder / "out").rglob("*")}
    again = refresh(recipe)
    assert again.status == "nothing_to_do" and again.exit_code == EXIT_CODES["nothing_to_do"]
    assert again.computed == {} and not again.outputs_written
    assert {p: p.stat().st_mtime_ns for p in (folder / "out").rglob("*")} == before


def test_after_a_run_status_shows_everything_computed_and_refresh_does_nothing(scene):
    from covextract.ops.refresh import refresh_status

    folder, recipe = scene
    run(recipe)
    status = refresh_status(recipe)
    assert status.layers["rain"] and {s for _, s in status.layers["rain"]} == {"computed"}
    before = {p: p.stat().st_mtime_ns for p in (folder / "out").rglob("*")}
    again = refresh(recipe)
    assert again.status == "nothing_to_do" and again.exit_code == EXIT_CODES["nothing_to_do"]
    assert {p: p.stat().st_mtime_ns for p in (folder / "out").rglob("*")} == before


def test_adding_one_month_computes_only_that_month(refresh_recipe, scene, tmp_path, write_recipe):
    folder, recipe = scene
    held = [
        _move_out(folder, f"{rel}_202112.tif", tmp_path / "later")
        for rel in ("rain/rain", "ndvi_monthly/ndvi")
    ]
    first = refresh(recipe)
    assert len(first.computed["rain"]) == 35 and first.next_expected["rain"] == "2021-12"
    panel_before = {
        p.name: p.stat().st_mtime_ns for p in (folder / "out" / "panel").glob("*.parquet")
    }
    shutil.move(held[0], folder / "rain" / "rain_202112.tif")
    shutil.move(held[1], folder / "ndvi_monthly" / "ndvi_202112.tif")
    second = refresh(recipe)
    assert second.status == "success"
    # exactly one new period per distinct per-period statistic
    assert second.computed == {
        "rain": ["2021-12"],
        "ndvi_m": ["2021-12"],
        "rain_month": ["2021-12"],
    }
    assert _n_computed(second) == 3
    assert second.reused == {
        "rain": 35,
        "wet_months": 36,
        "ndvi_m": 23,
        "rain_month": 35,
        "ndvi": 1,
    }
    # earlier panel files were not rewritten, the new month is a new file
    panel_after = {
        p.name: p.stat().st_mtime_ns for p in (folder / "out" / "panel").glob("*.parquet")
    }
    assert set(panel_after) - set(panel_before) == {"2021-12-01.parquet"}
    assert all(panel_after[k] == v for k, v in panel_before.items())
    full = _full_run(folder, tmp_path, write_recipe, refresh_recipe)
    assert _outputs(folder) == _outputs(full)


def test_changing_one_month_file_recomputes_only_that_month(
    refresh_recipe, scene, tmp_path, write_recipe
):
    folder, recipe = scene
    refresh(recipe)
    path = folder / "ndvi_monthly" / "ndvi_202006.tif"
    with rasterio.open(path, "r+") as ds:
        data = ds.read(1)
        ds.write(np.where(data == -3000, data, data // 2).astype(data.dtype), 1)
    result = refresh(recipe)
    assert result.computed == {"ndvi_m": ["2020-06"]}
    full = _full_run(folder, tmp_path, write_recipe, refresh_recipe)
    assert _outputs(folder) == _outputs(full)


def test_touching_a_file_without_changing_it_recomputes_nothing(scene):
    folder, recipe = scene
    refresh(recipe)
    path = folder / "rain" / "rain_202003.tif"
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    result = refresh(recipe)
    # the content hash is the same: nothing to compute, outputs already current
    assert result.status == "nothing_to_do"


def test_deleting_the_state_folder_rebuilds_the_same_result(scene):
    folder, recipe = scene
    refresh(recipe)
    first = _outputs(folder)
    shutil.rmtree(folder / ".covextract-state")
    again = refresh(recipe)
    assert len(again.computed["rain"]) == 36
    assert _outputs(folder) == first


def test_a_new_covariate_computes_only_that_covariate(
    refresh_recipe, scene, tmp_path, write_recipe
):
    folder, recipe = scene
    refresh(recipe)
    extra = {
        "layer": "rain",
        "name": "rain_low",
        "stats": ["min"],
        "before": {"months": 1, "lag_months": 1},
    }
    changed = {**refresh_recipe, "covariates": [*refresh_recipe["covariates"], extra]}
    result = refresh(write_recipe(folder, changed))
    assert list(result.computed) == ["rain_low"] and len(result.computed["rain_low"]) == 36
    full = _full_run(folder, tmp_path, write_recipe, changed)
    assert _outputs(folder) == _outputs(full)


def test_a_changed_window_recomputes_no_pixel_but_rewrites_the_table(
    refresh_recipe, scene, tmp_path, write_recipe
):
    folder, recipe = scene
    refresh(recipe)
    changed = copy.deepcopy(refresh_recipe)
    changed["covariates"][0]["before"] = {"months": 4, "lag_months": 0}
    with pytest.warns(Warning, match="lag 0"):
        result = refresh(write_recipe(folder, changed))
    assert result.computed == {} and result.outputs_written and result.status == "success"
    with pytest.warns(Warning, match="lag 0"):
        full = _full_run(folder, tmp_path, write_recipe, changed)
    assert _outputs(folder) == _outputs(full)


def test_new_units_recompute_every_piece_of_their_unit_set(
    refresh_recipe, scene, tmp_path, write_recipe
):
    folder, recipe = scene
    refresh(recipe)
    table = folder / "villages.csv"
    lines = table.read_text(encoding="utf-8").splitlines()
    table.write_text("\n".join(lines[:-1]) + "\n", encoding="utf-8")  # one village fewer
    result = refresh(recipe)
    assert len(result.computed["rain"]) == 36 and result.computed["ndvi"] == ["all"]
    full = _full_run(folder, tmp_path, write_recipe, refresh_recipe)
    assert _outputs(folder) == _outputs(full)


def test_a_gap_in_a_series_gives_partial(scene, tmp_path):
    folder, recipe = scene
    _move_out(folder, "rain/rain_202007.tif", tmp_path / "away")
    result = refresh(recipe)
    assert result.status == "partial" and result.exit_code == EXIT_CODES["partial"]
    assert result.missing == {"rain": ["2020-07"]}
    again = refresh(recipe)  # nothing new: the gap is reported, nothing is recomputed
    assert again.status == "nothing_to_do" and again.missing == {"rain": ["2020-07"]}


def test_status_shows_periods_last_run_newer_inputs_and_next_period(scene, tmp_path):
    folder, recipe = scene
    never = refresh_status(recipe)
    assert never.last_run is None
    assert {s for _, s in never.layers["rain"]} == {"due"}
    held = _move_out(folder, "rain/rain_202112.tif", tmp_path / "later")
    refresh(recipe)
    shutil.move(held, folder / "rain" / "rain_202112.tif")
    os.utime(folder / "rain" / "rain_202112.tif")  # delivered after the last refresh
    status = refresh_status(recipe)
    rain = dict(status.layers["rain"])
    assert rain["2021-12"] == "due" and rain["2021-11"] == "computed" and len(rain) == 36
    assert dict(status.layers["ndvi"]) == {"all": "computed"}
    assert status.last_run.result == "success"
    assert str(folder / "rain" / "rain_202112.tif") in status.newer_inputs
    assert status.next_expected == {"rain": "2022-01", "ndvi_m": "2022-01"}
    refresh(recipe)
    # a piece deleted by hand shows as missing on disk and is computed again
    piece = next((folder / ".covextract-state" / PIECES_DIR).glob("*/2019-05-01.parquet"))
    piece.unlink()
    layer_states = {name: dict(v) for name, v in refresh_status(recipe).layers.items()}
    assert "missing_on_disk" in {v.get("2019-05") for v in layer_states.values()}
    redo = refresh(recipe)
    assert sorted(redo.computed.values()) == [["2019-05"]]


def test_a_corrupt_ledger_is_rebuilt_from_the_pieces(refresh_recipe, scene, tmp_path, write_recipe):
    folder, recipe = scene
    refresh(recipe)
    state = folder / ".covextract-state"
    (state / LEDGER_NAME).write_bytes(b"this is not a database" * 100)
    with pytest.warns(LedgerRebuiltWarning, match=f"rebuilt from {N_PIECES} piece"):
        result = refresh(recipe)
    # the rebuilt ledger knows every piece: nothing is computed again
    assert result.computed == {}
    assert list(state.glob(f"{LEDGER_NAME}.broken-*"))  # the broken file is kept
    with Ledger(state) as ledger:
        ledger.check()
        assert len(ledger.rows()) == N_PIECES
    full = _full_run(folder, tmp_path, write_recipe, refresh_recipe)
    assert _outputs(folder) == _outputs(full)


def test_an_unreadable_piece_is_computed_again_with_a_warning(scene):
    folder, recipe = scene
    refresh(recipe)
    first = _outputs(folder)
    piece = next((folder / ".covextract-state" / PIECES_DIR).glob("*/2020-02-01.parquet"))
    piece.write_bytes(piece.read_bytes()[:100])
    (folder / "out" / "table.csv").unlink()  # make the outputs stale too
    with pytest.warns(PieceWarning, match="unreadable"):
        result = refresh(recipe)
    assert _n_computed(result) == 1
    assert _outputs(folder) == first


def test_ledger_rows_never_describe_a_missing_piece(scene):
    folder, recipe = scene
    refresh(recipe)
    state = folder / ".covextract-state"
    with Ledger(state) as ledger:
        rows = ledger.rows()
    assert len(rows) == N_PIECES
    assert all((state / row.output_file).is_file() for row in rows)
    # Reference: hashlib's SHA-256 of the input's bytes.
    with Ledger(state) as ledger:
        rain = folder / "rain" / "rain_201901.tif"
        assert ledger.recorded_hash(rain) == hashlib.sha256(rain.read_bytes()).hexdigest()


def test_command_line_exit_codes_and_summary(scene, tmp_path):
    from typer.testing import CliRunner

    from covextract.cli.app import app

    folder, recipe = scene
    runner = CliRunner()
    _move_out(folder, "rain/rain_202007.tif", tmp_path / "away")
    first = runner.invoke(app, ["refresh", str(recipe), "-q"])
    assert first.exit_code == EXIT_CODES["partial"] == 4, first.output
    assert "missing inputs of layer rain (gaps): 2020-07" in first.output
    shutil.move(tmp_path / "away" / "rain_202007.tif", folder / "rain" / "rain_202007.tif")
    second = runner.invoke(app, ["refresh", str(recipe), "-q"])
    assert second.exit_code == EXIT_CODES["success"] == 0, second.output
    assert "computed 2 piece(s): rain 2020-07; rain_month 2020-07" in second.output
    third = runner.invoke(app, ["refresh", str(recipe), "-q"])
    assert third.exit_code == EXIT_CODES["nothing_to_do"] == 3, third.output
    assert "computed nothing new" in third.output and "outputs unchanged" in third.output
    status = runner.invoke(app, ["status", str(recipe)])
    assert status.exit_code == 0, status.output
    assert "computed                         2019-01..2021-12 (36)" in status.output
    assert "result nothing_to_do" in status.output


def test_a_failing_refresh_keeps_the_outputs_and_records_the_error(scene, monkeypatch):
    import covextract.run.execute as execute
    from covextract.cli.refresh import status_lines
    from covextract.errors import CovextractError, OutputError

    folder, recipe = scene
    refresh(recipe)
    before = _outputs(folder)
    # an input that no longer opens: a clear error before anything is started
    bad = folder / "rain" / "rain_202105.tif"
    good = bad.read_bytes()
    bad.write_bytes(b"not a GeoTIFF any more")
    with pytest.raises(CovextractError, match="rain_202105.tif"):
        refresh(recipe)
    assert _outputs(folder) == before
    bad.write_bytes(good)
    # a failure half-way (here: the disk fills up while computing)
    shutil.rmtree(folder / ".covextract-state" / PIECES_DIR)

    def disk_full(*args, **kwargs):
        raise OutputError("cannot write the piece: [Errno 28] No space left on device")

    monkeypatch.setattr(execute, "compute_covariate", disk_full)
    with pytest.raises(OutputError, match="No space left"):
        refresh(recipe)
    assert _outputs(folder) == before
    with Ledger(folder / ".covextract-state") as ledger:
        last = ledger.last_run()
    assert last.result == "error" and "No space left" in last.summary["error"]
    monkeypatch.undo()
    assert any("result error" in line for line in status_lines(refresh_status(recipe)))
    done = refresh(recipe)
    assert done.status == "success" and _outputs(folder) == before


def test_status_reports_an_unreadable_ledger_without_touching_it(scene):
    folder, recipe = scene
    refresh(recipe)
    ledger = folder / ".covextract-state" / LEDGER_NAME
    ledger.write_bytes(b"garbage" * 50)
    status = refresh_status(recipe)
    assert status.ledger_problem and "unreadable" in status.ledger_problem
    assert status.last_run is None
    assert ledger.read_bytes() == b"garbage" * 50


def test_recompute_computes_every_piece_again_with_the_same_result(scene):
    folder, recipe = scene
    refresh(recipe)
    first = _outputs(folder)
    again = refresh(recipe, recompute=True)
    assert _n_computed(again) == N_PIECES
    assert again.status == "success" and _outputs(folder) == first
