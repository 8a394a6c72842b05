"""The refresh ledger: which covariate periods are computed, from which inputs, in SQLite.

The ledger lives at ``<state folder>/ledger.sqlite`` (stdlib :mod:`sqlite3`,
default rollback journal). A refresh asks :meth:`Ledger.todo` which periods are
new or stale, computes them, renames their outputs into place and only then
calls :meth:`Ledger.record`, so a row never describes an output that is not on
disk. A run killed before the commit leaves the rows out; the next run sees
those periods as still to do and computes them again.

Conventions
-----------
- Periods are keyed by their first day as ISO 8601 text (``"2021-03-01"``);
  :class:`covextract.core.periods.Period` objects, :class:`datetime.date` and
  strings are all accepted where a period is expected.
- Times (``computed_at``, ``started``, ``finished``) are UTC, ISO 8601 with
  seconds and an explicit ``+00:00``.
- Fingerprints are opaque text; :func:`fingerprint` makes one from any
  JSON-like object.
- The connection runs with ``isolation_level=None`` (autocommit) and every
  write goes through :meth:`Ledger.transaction` (``BEGIN IMMEDIATE`` ...
  ``COMMIT``), so the write lock is taken at the start of the transaction,
  not half-way through it.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import json
import os
import sqlite3
import tempfile
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import asdict, dataclass, fields
from pathlib import Path

from covextract.errors import CovextractError, OutputError

__all__ = [
    "LEDGER_NAME",
    "SCHEMA_VERSION",
    "Ledger",
    "LedgerCorruptError",
    "LedgerVersionError",
    "LedgerRow",
    "Run",
    "fingerprint",
    "period_start_key",
]

LEDGER_NAME = "ledger.sqlite"
"""File name of the ledger inside the state folder."""

SCHEMA_VERSION = 3
"""Layout version stored in ``PRAGMA user_version``; bump it when the tables or pieces change.

Version 3 (covextract 0.2): covariate fingerprints and pieces of the redesigned
covariate kinds. A state folder of version 2 is refused with a message saying
how to move on; its pieces are never reused under the new column names.
"""

_SCHEMA = """
CREATE TABLE computed (
    covariate_fingerprint TEXT NOT NULL,
    period_start TEXT NOT NULL,
    period_end TEXT NOT NULL,
    inputs_fingerprint TEXT NOT NULL,
    units_fingerprint TEXT NOT NULL,
    output_file TEXT NOT NULL,
    computed_at TEXT NOT NULL,
    PRIMARY KEY (covariate_fingerprint, period_start)
);
CREATE TABLE runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    started TEXT NOT NULL,
    finished TEXT,
    result TEXT,
    summary TEXT
);
CREATE TABLE files (
    path TEXT PRIMARY KEY,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    sha256 TEXT NOT NULL
);
"""

_TABLES = {
    "computed": [
        "covariate_fingerprint",
        "period_start",
        "period_end",
        "inputs_fingerprint",
        "units_fingerprint",
        "output_file",
        "computed_at",
    ],
    "runs": ["id", "started", "finished", "result", "summary"],
    "files": ["path", "size", "mtime_ns", "sha256"],
}


class LedgerCorruptError(CovextractError, ValueError):
    """The ledger file is not a SQLite database, fails its integrity check, or has the wrong tables.

    Attributes
    ----------
    path : pathlib.Path
        The ledger file.
    """

    def __init__(self, message: str, *, path: Path) -> None:
        super().__init__(message)
        self.path = path


class LedgerVersionError(LedgerCorruptError):
    """The ledger was written with another schema version (for instance by a newer covextract)."""


def fingerprint(obj) -> str:
    """Return the SHA-256 hex digest of ``obj`` as canonical JSON.

    Canonical: keys sorted, no whitespace (``separators=(",", ":")``), UTF-8,
    and anything JSON cannot hold turned into ``str`` (dates, paths).

    Parameters
    ----------
    obj : object
        Any JSON-like structure.

    Returns
    -------
    str
        64 lowercase hex digits.

    Examples
    --------
    >>> fingerprint({"b": 1, "a": [1, 2]}) == fingerprint({"a": [1, 2], "b": 1})
    True
    """
    text = json.dumps(obj, sort_keys=True, separators=(",", ":"), default=str, ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")


def _day(value) -> str:
    if isinstance(value, str):
        return value
    if isinstance(value, dt.date):
        return value.isoformat()
    raise TypeError(f"expected a date or an ISO date string, got {value!r}")


def period_start_key(period) -> str:
    """ISO text of a period's first day: ``period.start`` if it has one, else the value itself."""
    return _day(getattr(period, "start", period))


@dataclass(frozen=True)
class LedgerRow:
    """One computed covariate period.

    Parameters
    ----------
    covariate_fingerprint : str
        Fingerprint of the covariate's recipe entry and layer definition.
    period_start, period_end : str
        First and last day of the period (inclusive), ISO 8601 dates.
    inputs_fingerprint : str
        Fingerprint of the input files the period was computed from.
    units_fingerprint : str
        Fingerprint of the unit set.
    output_file : str
        The file holding the period's values (already in place).
    computed_at : str
        When it was computed, UTC ISO 8601; :meth:`Ledger.record` fills it
        with the current time when left empty.
    """

    covariate_fingerprint: str
    period_start: str
    period_end: str
    inputs_fingerprint: str
    units_fingerprint: str
    output_file: str
    computed_at: str = ""


@dataclass(frozen=True)
class Run:
    """One refresh run as the ``runs`` table holds it.

    ``finished``, ``result`` and ``summary`` are None while the run is going
    or if it died; ``summary`` is the decoded JSON.
    """

    id: int
    started: str
    finished: str | None
    result: str | None
    summary: object


def _as_row(item) -> LedgerRow:
    if isinstance(item, LedgerRow):
        row = item
    elif isinstance(item, Mapping):
        names = {f.name for f in fields(LedgerRow)}
        unknown = set(item) - names
        if unknown:
            raise ValueError(
                f"ledger row has unknown keys {sorted(unknown)}; known: {sorted(names)}"
            )
        row = LedgerRow(**item)
    else:
        raise TypeError(f"a ledger row is a LedgerRow or a mapping, got {type(item).__name__}")
    values = asdict(row)
    values["period_start"] = _day(values["period_start"])
    values["period_end"] = _day(values["period_end"])
    values["output_file"] = str(values["output_file"])
    values["computed_at"] = values["computed_at"] or _now()
    return LedgerRow(**values)


class Ledger:
    """The ledger of a state folder.

    Opening creates ``<state_folder>/ledger.sqlite`` with the current schema
    when it is missing or empty, and otherwise checks its schema version (a
    cheap check; :meth:`check` adds SQLite's full integrity check).

    Parameters
    ----------
    state_folder : str or Path
        The folder; created if missing.

    Raises
    ------
    LedgerCorruptError
        The file is not a SQLite database or lacks the ledger's tables.
    LedgerVersionError
        The file has another schema version.

    Examples
    --------
    >>> with Ledger(state) as ledger:  # doctest: +SKIP
    ...     due = ledger.todo(cov_fp, periods, inputs_fp_of, units_fp)
    """

    def __init__(self, state_folder) -> None:
        self.folder = Path(state_folder)
        self.path = self.folder / LEDGER_NAME
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(
                f"cannot create the state folder {self.folder}: {exc}; "
                "check the path and its permissions"
            ) from exc
        self._conn = _connect(self.path)
        try:
            self._open_schema()
        except BaseException:
            self._conn.close()
            raise

    # ------------------------------------------------------------ open/close
    def _open_schema(self) -> None:
        try:
            version = self._conn.execute("PRAGMA user_version").fetchone()[0]
            tables = {
                r[0]
                for r in self._conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
            }
            if version == 0 and not tables:
                with self.transaction():
                    for statement in _SCHEMA.split(";"):
                        if statement.strip():
                            self._conn.execute(statement)
                    self._conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
                return
            self._check_schema(version)
        except sqlite3.DatabaseError as exc:
            raise self._corrupt(exc) from exc

    def _check_schema(self, version: int) -> None:
        if version != SCHEMA_VERSION:
            folder = self.path.parent
            older = version < SCHEMA_VERSION
            raise LedgerVersionError(
                f"the state folder {folder} was written by "
                + ("an earlier" if older else "a newer")
                + f" covextract (ledger schema {version}; this one reads schema "
                f"{SCHEMA_VERSION}"
                + (", and names some columns differently" if older else "")
                + "). Nothing was changed. To move on, rename that folder (for example to "
                f"{folder.name}.v{version}) and run the recipe again: every piece is computed "
                "anew and the outputs are replaced only when the new ones are complete"
                + ("" if older else "; or use the covextract that wrote it")
                + ".",
                path=self.path,
            )
        for table, expected in _TABLES.items():
            columns = [r[1] for r in self._conn.execute(f"PRAGMA table_info({table})")]
            if columns != expected:
                raise LedgerCorruptError(
                    f"the ledger {self.path} has table {table!r} with columns {columns}, "
                    f"expected {expected}; move the file away and let the next refresh "
                    "rebuild it from the outputs",
                    path=self.path,
                )

    def _corrupt(self, exc: Exception) -> LedgerCorruptError:
        return LedgerCorruptError(
            f"the ledger {self.path} is unreadable ({exc}): it is not an intact SQLite "
            "database. Nothing was changed; rebuild it from the outputs (Ledger.rebuild) "
            "or move it away and recompute everything",
            path=self.path,
        )

    def close(self) -> None:
        """Close the connection."""
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    # ---------------------------------------------------------- transactions
    @contextlib.contextmanager
    def transaction(self) -> Iterator[Ledger]:
        """``BEGIN IMMEDIATE`` ... ``COMMIT``; any exception rolls back and propagates.

        Nested use joins the outer transaction (only the outermost commits).
        """
        if self._conn.in_transaction:
            yield self
            return
        try:
            self._conn.execute("BEGIN IMMEDIATE")
        except sqlite3.DatabaseError as exc:
            raise self._corrupt(exc) from exc
        try:
            yield self
        except BaseException:
            self._conn.execute("ROLLBACK")
            raise
        try:
            self._conn.execute("COMMIT")
        except sqlite3.Error:
            # a failed COMMIT (disk full, I/O error) leaves the transaction open
            if self._conn.in_transaction:
                self._conn.execute("ROLLBACK")
            raise

    # -------------------------------------------------------------- computed
    def record(self, rows: Iterable[LedgerRow | Mapping]) -> int:
        """Record computed periods, all in one transaction; return how many.

        Call this only **after** the outputs the rows describe have been
        renamed into place: a row claims its output is complete on disk. An
        existing row with the same ``(covariate_fingerprint, period_start)``
        is replaced.

        Parameters
        ----------
        rows : iterable of LedgerRow or mapping
            Mappings take the :class:`LedgerRow` field names; dates may be
            :class:`datetime.date`; an empty ``computed_at`` becomes now.
        """
        prepared = [_as_row(item) for item in rows]
        with self.transaction():
            self._conn.executemany(
                "INSERT OR REPLACE INTO computed VALUES (?, ?, ?, ?, ?, ?, ?)",
                [tuple(asdict(row).values()) for row in prepared],
            )
        return len(prepared)

    def done(self, covariate_fp: str, period_start) -> LedgerRow | None:
        """The row of one covariate period, or None if it was never recorded.

        ``period_start`` is a date, an ISO string or a period with ``.start``.
        """
        cur = self._conn.execute(
            "SELECT * FROM computed WHERE covariate_fingerprint = ? AND period_start = ?",
            (covariate_fp, period_start_key(period_start)),
        )
        found = cur.fetchone()
        return LedgerRow(*found) if found is not None else None

    def rows(self, covariate_fp: str | None = None) -> list[LedgerRow]:
        """All rows (of one covariate if given), ordered by covariate then period start."""
        if covariate_fp is None:
            cur = self._conn.execute(
                "SELECT * FROM computed ORDER BY covariate_fingerprint, period_start"
            )
        else:
            cur = self._conn.execute(
                "SELECT * FROM computed WHERE covariate_fingerprint = ? ORDER BY period_start",
                (covariate_fp,),
            )
        return [LedgerRow(*r) for r in cur.fetchall()]

    def todo(
        self,
        covariate_fp: str,
        periods: Iterable,
        inputs_fp_of: Callable[[object], str],
        units_fp: str,
    ) -> list:
        """Periods that are new, or whose inputs or units changed since they were recorded.

        Parameters
        ----------
        covariate_fp : str
            The covariate's fingerprint. A changed recipe entry gives a new
            fingerprint, so every period of it is new.
        periods : iterable
            Candidate periods (objects with ``.start``, dates or ISO strings).
        inputs_fp_of : callable
            ``inputs_fp_of(period) -> str``, the current fingerprint of the
            period's input files.
        units_fp : str
            Current fingerprint of the unit set.

        Returns
        -------
        list
            The given period objects that must be computed, in input order.
        """
        due = []
        for period in periods:
            row = self.done(covariate_fp, period)
            if (
                row is None
                or row.inputs_fingerprint != inputs_fp_of(period)
                or row.units_fingerprint != units_fp
            ):
                due.append(period)
        return due

    # ------------------------------------------------------------------ runs
    def start_run(self) -> int:
        """Record the start of a run (now, UTC); return its id."""
        with self.transaction():
            cur = self._conn.execute("INSERT INTO runs (started) VALUES (?)", (_now(),))
        return int(cur.lastrowid)

    def finish_run(self, run_id: int, result: str, summary) -> None:
        """Record the end of run ``run_id``: its result and a JSON-able summary.

        Parameters
        ----------
        run_id : int
            As returned by :meth:`start_run`.
        result : str
            A key of :data:`covextract.state.lock.EXIT_CODES` (``"success"``...).
        summary : object
            Stored as JSON (sorted keys, ``str`` for dates and paths).

        Raises
        ------
        KeyError
            No run has that id.
        """
        text = json.dumps(summary, sort_keys=True, default=str)
        with self.transaction():
            cur = self._conn.execute(
                "UPDATE runs SET finished = ?, result = ?, summary = ? WHERE id = ?",
                (_now(), result, text, run_id),
            )
            if cur.rowcount != 1:
                raise KeyError(f"no run with id {run_id} in the ledger {self.path}")

    def last_run(self) -> Run | None:
        """The most recently started run, or None if there was none."""
        found = self._conn.execute("SELECT * FROM runs ORDER BY id DESC LIMIT 1").fetchone()
        if found is None:
            return None
        run_id, started, finished, result, summary = found
        return Run(
            id=run_id,
            started=started,
            finished=finished,
            result=result,
            summary=json.loads(summary) if summary is not None else None,
        )

    # ----------------------------------------------------------------- files
    def file_hash(self, path) -> str:
        """SHA-256 of a file's bytes, read again only when its size or modification time changed.

        The ``files`` table keeps ``(path, size, mtime_ns, sha256)``; a file
        whose size and modification time (nanoseconds) match its row is not
        read (the test of make and rsync, common practice). The row is
        written in its own transaction, so a hash survives a run that dies
        later.

        Parameters
        ----------
        path : str or Path
            A file (a folder is hashed over its files, see
            :func:`covextract.outputs.manifest.file_sha256`).
        """
        from covextract.io.paths import file_sha256

        path = Path(path)
        try:
            st = path.stat()
        except OSError as exc:
            raise OutputError(f"cannot read the input file {path}: {exc}") from exc
        known = self.recorded_hash(path)
        if known is not None:
            return known
        key = str(path.resolve())
        digest = file_sha256(path)
        with self.transaction():
            self._conn.execute(
                "INSERT OR REPLACE INTO files VALUES (?, ?, ?, ?)",
                (key, st.st_size, st.st_mtime_ns, digest),
            )
        return digest

    def recorded_hash(self, path) -> str | None:
        """The recorded SHA-256 if the file's size and modification time still match, else None.

        Never reads the file (``status`` uses it to stay cheap).
        """
        path = Path(path)
        try:
            st = path.stat()
        except OSError:
            return None
        found = self._conn.execute(
            "SELECT size, mtime_ns, sha256 FROM files WHERE path = ?", (str(path.resolve()),)
        ).fetchone()
        if found is not None and found[0] == st.st_size and found[1] == st.st_mtime_ns:
            return found[2]
        return None

    # ----------------------------------------------------------------- check
    def check(self) -> None:
        """Run ``PRAGMA integrity_check`` and the schema check.

        Raises
        ------
        LedgerCorruptError
            SQLite reports any problem, or the tables are not the ledger's.
        LedgerVersionError
            The schema version differs from :data:`SCHEMA_VERSION`.
        """
        try:
            problems = [r[0] for r in self._conn.execute("PRAGMA integrity_check")]
            if problems != ["ok"]:
                shown = "; ".join(problems[:5])
                raise LedgerCorruptError(
                    f"the ledger {self.path} fails SQLite's integrity check ({shown}); "
                    "rebuild it from the outputs (Ledger.rebuild) or move it away and "
                    "recompute everything",
                    path=self.path,
                )
            self._check_schema(self._conn.execute("PRAGMA user_version").fetchone()[0])
        except sqlite3.DatabaseError as exc:
            raise self._corrupt(exc) from exc

    # --------------------------------------------------------------- rebuild
    @classmethod
    def rebuild(cls, path, rows: Iterable[LedgerRow | Mapping]) -> Path:
        """Replace the ledger file at ``path`` by a new one holding ``rows``, atomically.

        The new database is written to a temporary file in the same folder,
        then moved over ``path`` with :func:`os.replace`, so a crash leaves
        either the old file or the complete new one. The ``runs`` and
        ``files`` tables start empty (file hashes are taken again). Close any
        open :class:`Ledger` on ``path`` first.

        Parameters
        ----------
        path : str or Path
            The ledger file (``<state folder>/ledger.sqlite``).
        rows : iterable of LedgerRow or mapping
            What the outputs on disk show as computed.

        Returns
        -------
        pathlib.Path
            ``path``.
        """
        path = Path(path)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create the state folder {path.parent}: {exc}") from exc
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        os.close(fd)
        tmp_path = Path(tmp)
        try:
            tmp_path.unlink()  # sqlite creates its schema in an empty path
            conn = _connect(tmp_path)
            try:
                conn.execute("BEGIN IMMEDIATE")
                for statement in _SCHEMA.split(";"):
                    if statement.strip():
                        conn.execute(statement)
                conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
                conn.executemany(
                    "INSERT OR REPLACE INTO computed VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [tuple(asdict(_as_row(item)).values()) for item in rows],
                )
                conn.execute("COMMIT")
            finally:
                conn.close()
            with open(tmp_path, "rb+") as fh:
                os.fsync(fh.fileno())
            # a leftover journal of the old file must not be applied to the new one
            for suffix in ("-journal", "-wal", "-shm"):
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(str(path) + suffix)
            os.replace(tmp_path, path)
        except BaseException:
            with contextlib.suppress(OSError):
                tmp_path.unlink()
            raise
        return path


def _connect(path: Path) -> sqlite3.Connection:
    try:
        return sqlite3.connect(path, isolation_level=None, timeout=30.0)
    except sqlite3.Error as exc:
        raise OutputError(f"cannot open the ledger {path}: {exc}") from exc
