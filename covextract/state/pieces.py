"""Pieces: the per-covariate, per-period results a refresh keeps in its state folder.

A *piece* holds what one covariate's engine pass produced for one period of a
series (its per-unit statistics and QA codes) or, for a covariate without
periods, its finished columns. Pieces live at
``<state folder>/pieces/<fingerprint[:24]>/<period start or "static">.parquet``;
each is written atomically and carries its own description in the Parquet
schema metadata (key ``covextract``), so the ledger can be rebuilt from the
pieces alone (:func:`ledger_rows_from_pieces`).

Pieces describe where the units are (one row per unit, with the unit id) and
so belong with the confidential inputs, like the weights cache.

Conventions
-----------
- Rows follow the unit order of the unit set the piece was computed on
  (recorded by its fingerprint); ``unit_id`` is kept as text for a check.
- Period pieces: ``stat:<name>`` float64 columns and ``qa`` (engine codes
  joined by ``;``). Static pieces: ``column:<name>`` columns as computed,
  ``qa`` and ``valid_share``; the proxy fit and dark zones go into the
  metadata.
- Values go through Parquet unchanged: float64 stays float64 bit for bit,
  so a table assembled from pieces equals one computed in a single run.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from covextract.errors import CovextractError, CovextractWarning

__all__ = [
    "PIECES_DIR",
    "PIECE_FORMAT",
    "STATIC",
    "PieceError",
    "PieceWarning",
    "piece_path",
    "write_period_piece",
    "read_period_piece",
    "write_static_piece",
    "read_static_piece",
    "read_piece_meta",
    "ledger_rows_from_pieces",
]

PIECES_DIR = "pieces"
"""Folder of the pieces inside the state folder."""

PIECE_FORMAT = 2
"""Layout version written into every piece's metadata."""

STATIC = "static"
"""Period key of a covariate without periods (one piece)."""

_META_KEY = b"covextract"


class PieceError(CovextractError, ValueError):
    """A piece file is unreadable or does not describe what the ledger says it holds."""


class PieceWarning(CovextractWarning):
    """A piece file was unreadable and is computed again."""


@dataclass(frozen=True)
class PieceMeta:
    """What a piece says about itself (its ledger row)."""

    covariate_fingerprint: str
    period_start: str
    period_end: str
    inputs_fingerprint: str
    units_fingerprint: str
    kind: str


def piece_path(state_folder, covariate_fp: str, period_start: str) -> Path:
    """Where the piece of ``(covariate_fp, period_start)`` lives."""
    return Path(state_folder) / PIECES_DIR / covariate_fp[:24] / f"{period_start}.parquet"


def _write(path: Path, frame, meta: dict) -> Path:
    """Write a piece (a DataFrame or an Arrow table) with its description.

    Pieces are not fsynced: a piece is a recomputable cache, checked when it
    is read (an unreadable piece is computed again), so a power loss can cost
    a recomputation but never a wrong value. The outputs and the ledger are
    durable.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    from covextract.io.writers import atomic_write_bytes

    table = (
        frame if isinstance(frame, pa.Table) else pa.Table.from_pandas(frame, preserve_index=False)
    )
    merged = dict(table.schema.metadata or {})
    merged[_META_KEY] = json.dumps({"format": PIECE_FORMAT, **meta}, sort_keys=True).encode()
    table = table.replace_schema_metadata(merged)
    buffer = io.BytesIO()
    pq.write_table(table, buffer)
    return atomic_write_bytes(path, buffer.getvalue(), durable=False)


def _read(path: Path):
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
        raw = (table.schema.metadata or {}).get(_META_KEY)
        meta = json.loads(raw) if raw else None
    except (OSError, ValueError) as exc:
        raise PieceError(f"the piece {path} is unreadable ({exc})") from exc
    if not isinstance(meta, dict) or meta.get("format") != PIECE_FORMAT:
        raise PieceError(f"the piece {path} lacks covextract's piece description")
    return table.to_pandas(), meta


def _check(path, meta, expected: dict, ids) -> None:
    for key, value in expected.items():
        if meta.get(key) != value:
            raise PieceError(
                f"the piece {path} holds {key} {meta.get(key)!r}, the ledger expects {value!r}"
            )


def _meta_of(covariate_fp, period_start, period_end, inputs_fp, units_fp, kind, extra=None) -> dict:
    return {
        "covariate_fingerprint": covariate_fp,
        "period_start": period_start,
        "period_end": period_end,
        "inputs_fingerprint": inputs_fp,
        "units_fingerprint": units_fp,
        "kind": kind,
        **(extra or {}),
    }


def _qa_text(codes) -> list[str]:
    return [";".join(c) for c in codes]


def _qa_lists(column) -> list[list[str]]:
    return [[c for c in str(text).split(";") if c] for text in column]


def write_period_piece(
    state_folder,
    *,
    covariate_fp: str,
    period_start: str,
    period_end: str,
    inputs_fp: str,
    units_fp: str,
    ids,
    values: dict,
    qa: list,
) -> Path:
    """Write one period's per-unit statistics (``values``: stat name → array) and QA codes."""
    import pyarrow as pa

    columns = {"unit_id": pa.array([str(u) for u in ids], type=pa.string())}
    for name, array in values.items():
        columns[f"stat:{name}"] = pa.array(np.asarray(array, dtype=np.float64))
    columns["qa"] = pa.array(list(_qa_text(qa)), type=pa.string())
    frame = pa.table(columns)
    path = piece_path(state_folder, covariate_fp, period_start)
    meta = _meta_of(covariate_fp, period_start, period_end, inputs_fp, units_fp, "period")
    return _write(path, frame, meta)


def read_period_piece(path, *, covariate_fp: str, period_start: str, ids, stats):
    """``(values, qa)`` of a period piece, checked against what the caller expects.

    Raises
    ------
    PieceError
        Unreadable, or for another covariate, period or unit list.
    """
    path = Path(path)
    frame, meta = _read(path)
    _check(path, meta, {"covariate_fingerprint": covariate_fp, "period_start": period_start}, ids)
    if list(frame["unit_id"]) != [str(u) for u in ids]:
        raise PieceError(f"the piece {path} holds another list of units")
    try:
        values = {s: frame[f"stat:{s}"].to_numpy(dtype=np.float64) for s in stats}
    except KeyError as exc:
        raise PieceError(f"the piece {path} lacks the statistic {exc.args[0]!r}") from exc
    return values, _qa_lists(frame["qa"])


def write_static_piece(
    state_folder,
    *,
    covariate_fp: str,
    inputs_fp: str,
    units_fp: str,
    ids,
    outcome,
) -> Path:
    """Write a covariate without periods: its columns, QA codes, valid shares and fit."""
    frame = pd.DataFrame({"unit_id": [str(u) for u in ids]})
    dtypes = {}
    for name, array in outcome.values.items():
        arr = np.asarray(array)
        dtypes[name] = str(arr.dtype)
        frame[f"column:{name}"] = arr
    frame["qa"] = _qa_text(outcome.qa)
    frame["valid_share"] = np.asarray(outcome.valid_share, dtype=np.float64)
    extra = {
        "dtypes": dtypes,
        "learnt": outcome.learnt,
        "unknown_codes": [float(c) for c in outcome.unknown_codes],
    }
    path = piece_path(state_folder, covariate_fp, STATIC)
    meta = _meta_of(covariate_fp, STATIC, STATIC, inputs_fp, units_fp, "static", extra)
    return _write(path, frame, meta)


def read_static_piece(path, *, covariate_fp: str, ids):
    """The fields of the outcome stored in a static piece, as a dict.

    Keys: ``values``, ``qa``, ``valid_share``, ``unknown_codes``, ``learnt``
    (the fields of :class:`covextract.covariates.Outcome`).
    """
    path = Path(path)
    frame, meta = _read(path)
    _check(path, meta, {"covariate_fingerprint": covariate_fp, "period_start": STATIC}, ids)
    if list(frame["unit_id"]) != [str(u) for u in ids]:
        raise PieceError(f"the piece {path} holds another list of units")
    columns = {}
    for name, dtype in meta["dtypes"].items():
        col = frame[f"column:{name}"]
        if dtype == "object":
            # Parquet gives None for a missing text cell; the engine writes NaN
            columns[name] = np.array([np.nan if v is None else v for v in col], dtype=object)
        else:
            columns[name] = col.to_numpy(dtype=np.dtype(dtype))
    return dict(
        values=columns,
        qa=_qa_lists(frame["qa"]),
        valid_share=frame["valid_share"].to_numpy(dtype=np.float64),
        unknown_codes=list(meta.get("unknown_codes") or []),
        learnt=dict(meta.get("learnt") or {}),
    )


def read_piece_meta(path) -> PieceMeta:
    """The description a piece carries (reads only the Parquet footer)."""
    import pyarrow.parquet as pq

    path = Path(path)
    try:
        raw = (pq.read_schema(path).metadata or {}).get(_META_KEY)
        meta = json.loads(raw) if raw else None
    except (OSError, ValueError) as exc:
        raise PieceError(f"the piece {path} is unreadable ({exc})") from exc
    if not isinstance(meta, dict) or meta.get("format") != PIECE_FORMAT:
        raise PieceError(f"the piece {path} lacks covextract's piece description")
    return PieceMeta(**{k: meta[k] for k in PieceMeta.__dataclass_fields__})


def ledger_rows_from_pieces(state_folder) -> tuple[list[dict], list[str]]:
    """Ledger rows for every readable piece, and the pieces that could not be read.

    Pieces are only ever written complete (atomic rename), so each readable
    piece is a true record of a computation; the refresh that rebuilds a
    ledger from them still rewrites the outputs when they do not match.
    """
    import datetime as dt

    folder = Path(state_folder) / PIECES_DIR
    rows, bad = [], []
    if not folder.is_dir():
        return rows, bad
    for path in sorted(folder.glob("*/*.parquet")):
        try:
            meta = read_piece_meta(path)
        except PieceError as exc:
            bad.append(str(exc))
            continue
        if piece_path(state_folder, meta.covariate_fingerprint, meta.period_start) != path:
            bad.append(f"the piece {path} is not where its description puts it")
            continue
        stamp = dt.datetime.fromtimestamp(path.stat().st_mtime, dt.timezone.utc)
        rows.append(
            {
                "covariate_fingerprint": meta.covariate_fingerprint,
                "period_start": meta.period_start,
                "period_end": meta.period_end,
                "inputs_fingerprint": meta.inputs_fingerprint,
                "units_fingerprint": meta.units_fingerprint,
                "output_file": str(path.relative_to(Path(state_folder))),
                "computed_at": stamp.isoformat(timespec="seconds"),
            }
        )
    return rows, bad
