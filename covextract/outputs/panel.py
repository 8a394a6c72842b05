"""The long panel: one Parquet file per period, rows keyed by the study's own id column."""

from __future__ import annotations

import io
import re
from pathlib import Path

import pandas as pd

from covextract.io.writers import atomic_write_bytes

__all__ = ["write_panel", "panel_files", "panel_parts", "PANEL_FILE"]

#: Names of the panel's period files (the period's first day).
PANEL_FILE = re.compile(r"^\d{4}-\d{2}-\d{2}\.parquet$")


def panel_files(folder) -> list[Path]:
    """The period files now in a panel folder, sorted by name."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.iterdir() if PANEL_FILE.match(p.name))


def panel_parts(panel: pd.DataFrame, *, id_column: str) -> list[tuple[str, bytes]]:
    """``(file name, Parquet bytes)`` of each period of the panel, in period order."""
    parts = []
    if panel.empty:
        return parts
    panel = panel.sort_values(["period_start", "column", id_column], kind="stable")
    for start, part in panel.groupby("period_start", sort=True):
        buffer = io.BytesIO()
        part.reset_index(drop=True).to_parquet(buffer, index=False, engine="pyarrow")
        parts.append((f"{pd.Timestamp(start).date().isoformat()}.parquet", buffer.getvalue()))
    return parts


def write_panel(folder, panel: pd.DataFrame, *, id_column: str) -> list:
    """Write the long panel as one Parquet file per period (atomically), return the files.

    Columns: ``<id_column>``, ``column`` (the codebook's name), ``period_start``,
    ``period_end``, ``value`` and ``qa``. Files are named after the period's
    first day (``2021-03-01.parquet``), so a new period is a new file. A file
    whose bytes would not change is left untouched (same modification time),
    and period files the panel no longer holds are removed, so the folder
    always shows exactly the panel of the last run.
    """
    folder = Path(folder)
    written = []
    for name, data in panel_parts(panel, id_column=id_column):
        path = folder / name
        if not (path.is_file() and path.read_bytes() == data):
            atomic_write_bytes(path, data)
        written.append(path)
    keep = {p.name for p in written}
    for old in panel_files(folder):
        if old.name not in keep:
            old.unlink()
    return written
