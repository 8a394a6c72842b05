"""The refresh ledger: records, what is still to do, transactions, corruption, rebuild, runs.

SQLite facts relied on here are from the SQLite documentation (common
practice): a database file starts with the 16-byte header
``"SQLite format 3\\0"``, the page size is stored big-endian at byte offset
16, and ``PRAGMA integrity_check`` returns the single row ``ok`` for an
intact file.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import sqlite3

import pytest

from covextract.core.periods import Period
from covextract.errors import CovextractError, OutputError
from covextract.state.ledger import (
    SCHEMA_VERSION,
    Ledger,
    LedgerCorruptError,
    LedgerRow,
    LedgerVersionError,
    fingerprint,
)

COV = "cov-rain-total"
UNITS = "units-v1"


def _month(year, month):
    start = dt.date(year, month, 1)
    nxt = dt.date(year + month // 12, month % 12 + 1, 1)
    return Period(start, nxt - dt.timedelta(days=1), f"{year}-{month:02d}")


PERIODS = [_month(2031, m) for m in (1, 2, 3)]


def _row(period, inputs="in-a", units=UNITS, cov=COV, computed_at="2031-04-02T01:00:00+00:00"):
    return LedgerRow(
        covariate_fingerprint=cov,
        period_start=period.start.isoformat(),
        period_end=period.end.isoformat(),
        inputs_fingerprint=inputs,
        units_fingerprint=units,
        output_file=f"panel/period={period.label}/part.parquet",
        computed_at=computed_at,
    )


@pytest.fixture
def ledger(tmp_path):
    with Ledger(tmp_path / "state") as opened:
        yield opened


def test_fingerprint_is_sha256_of_canonical_json():
    # canonical form written out by hand: sorted keys, no spaces, dates via str()
    expected = hashlib.sha256(b'{"a":[1,2],"b":{"c":"2031-01-01","d":null}}').hexdigest()
    assert fingerprint({"b": {"d": None, "c": dt.date(2031, 1, 1)}, "a": [1, 2]}) == expected
    assert fingerprint({"a": 1}) != fingerprint({"a": 2})
    assert len(fingerprint([])) == 64


def test_new_ledger_has_schema(tmp_path):
    with Ledger(tmp_path / "state" / "deep") as ledger:
        assert ledger.path == tmp_path / "state" / "deep" / "ledger.sqlite"
        ledger.check()
        assert ledger.rows() == []
        assert ledger.last_run() is None
    conn = sqlite3.connect(tmp_path / "state" / "deep" / "ledger.sqlite")
    assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    conn.close()


def test_record_then_done(ledger):
    assert ledger.done(COV, PERIODS[0]) is None
    assert ledger.record([_row(p) for p in PERIODS[:2]]) == 2
    got = ledger.done(COV, PERIODS[0])
    assert got == _row(PERIODS[0])
    # the same period given as a date or as ISO text
    assert ledger.done(COV, dt.date(2031, 2, 1)) == _row(PERIODS[1])
    assert ledger.done(COV, "2031-02-01") == _row(PERIODS[1])
    assert ledger.done("another-covariate", PERIODS[0]) is None
    assert ledger.done(COV, PERIODS[2]) is None


def test_record_accepts_mappings_and_fills_computed_at(ledger):
    before = dt.datetime.now(dt.timezone.utc).replace(microsecond=0)
    ledger.record(
        [
            {
                "covariate_fingerprint": COV,
                "period_start": dt.date(2031, 1, 1),
                "period_end": dt.date(2031, 1, 31),
                "inputs_fingerprint": "in-a",
                "units_fingerprint": UNITS,
                "output_file": "panel/a.parquet",
            }
        ]
    )
    got = ledger.done(COV, "2031-01-01")
    assert got.period_end == "2031-01-31"
    stamp = dt.datetime.fromisoformat(got.computed_at)
    assert stamp.utcoffset() == dt.timedelta(0)
    assert before <= stamp <= dt.datetime.now(dt.timezone.utc)
    with pytest.raises(ValueError, match="unknown keys"):
        ledger.record([{"covariate": COV}])


def test_record_replaces_same_key(ledger):
    ledger.record([_row(PERIODS[0], inputs="in-a")])
    ledger.record([_row(PERIODS[0], inputs="in-b")])
    assert [r.inputs_fingerprint for r in ledger.rows(COV)] == ["in-b"]


def test_todo_new_changed_inputs_changed_units(ledger):
    inputs = {p.label: "in-a" for p in PERIODS}

    def inputs_fp_of(period):
        return inputs[period.label]

    # nothing recorded: every period is due, in the given order, as the given objects
    assert ledger.todo(COV, PERIODS, inputs_fp_of, UNITS) == PERIODS
    ledger.record([_row(p) for p in PERIODS[:2]])
    # one new month
    assert ledger.todo(COV, PERIODS, inputs_fp_of, UNITS) == [PERIODS[2]]
    ledger.record([_row(PERIODS[2])])
    assert ledger.todo(COV, PERIODS, inputs_fp_of, UNITS) == []
    # one month's input file changed: only that month
    inputs["2031-02"] = "in-b"
    assert ledger.todo(COV, PERIODS, inputs_fp_of, UNITS) == [PERIODS[1]]
    inputs["2031-02"] = "in-a"
    # new unit set: everything
    assert ledger.todo(COV, PERIODS, inputs_fp_of, "units-v2") == PERIODS
    # a changed covariate definition is a new fingerprint: everything
    assert ledger.todo("cov-rain-total-v2", PERIODS, inputs_fp_of, UNITS) == PERIODS


def test_exception_inside_transaction_records_nothing(ledger):
    ledger.record([_row(PERIODS[0])])
    with pytest.raises(RuntimeError, match="crash before commit"):
        with ledger.transaction():
            ledger.record([_row(PERIODS[1])])
            ledger.record([_row(PERIODS[0], inputs="in-b")])
            assert ledger.done(COV, PERIODS[1]) is not None  # visible inside
            raise RuntimeError("crash before commit")
    assert ledger.done(COV, PERIODS[1]) is None
    assert ledger.done(COV, PERIODS[0]).inputs_fingerprint == "in-a"
    # a bad row in a batch leaves none of the batch
    with pytest.raises(TypeError):
        ledger.record([_row(PERIODS[1]), 42])
    assert ledger.done(COV, PERIODS[1]) is None


def test_committed_transaction_is_seen_by_another_connection(ledger):
    with ledger.transaction():
        ledger.record([_row(PERIODS[0])])
        ledger.record([_row(PERIODS[1])])
    with Ledger(ledger.folder) as other:
        assert [r.period_start for r in other.rows(COV)] == ["2031-01-01", "2031-02-01"]


def test_garbage_file_is_reported(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    (state / "ledger.sqlite").write_bytes(b"this is not a database, just bytes \x00\xff" * 50)
    with pytest.raises(LedgerCorruptError) as info:
        Ledger(state)
    assert isinstance(info.value, CovextractError)
    assert isinstance(info.value, ValueError)
    assert info.value.path == state / "ledger.sqlite"
    assert str(state / "ledger.sqlite") in str(info.value)
    assert "rebuild" in str(info.value)


def test_overwritten_pages_are_reported_by_check(tmp_path):
    state = tmp_path / "state"
    with Ledger(state) as ledger:
        ledger.record(
            [
                _row(_month(2000 + i // 12, i % 12 + 1), inputs="x" * 200, cov=f"cov-{i % 7}")
                for i in range(600)
            ]
        )
    path = state / "ledger.sqlite"
    data = bytearray(path.read_bytes())
    assert data[:16] == b"SQLite format 3\x00"
    page = int.from_bytes(data[16:18], "big")
    assert len(data) > 6 * page
    # overwrite pages 3 to 5 (past the schema page) with a repeating pattern
    data[2 * page : 5 * page] = bytes([0x5A, 0x01, 0xC3, 0x7F]) * (3 * page // 4)
    path.write_bytes(bytes(data))
    with pytest.raises(LedgerCorruptError, match="not an intact SQLite database"):
        with Ledger(state) as damaged:
            damaged.check()


def test_inconsistent_index_fails_integrity_check(tmp_path):
    """A key changed inside the primary-key index: SQLite opens it but integrity_check lists it.

    B-tree page type 0x0A is an index leaf (SQLite file-format documentation).
    """
    state = tmp_path / "state"
    with Ledger(state) as ledger:
        ledger.record(
            [_row(_month(2000 + i // 12, i % 12 + 1), cov=f"cov-{i % 7}") for i in range(100)]
        )
    path = state / "ledger.sqlite"
    data = bytearray(path.read_bytes())
    page = int.from_bytes(data[16:18], "big")
    leaves = [i for i in range(1, len(data) // page) if data[i * page] == 0x0A]
    assert leaves, "no index leaf page found"
    start = leaves[0] * page
    at = data.rfind(b"cov-3", start, start + page)
    assert at > 0
    data[at + 4] = ord("9")  # the index now names cov-9 where the table row says cov-3
    path.write_bytes(bytes(data))
    with Ledger(state) as damaged:  # the schema is intact, so opening works
        with pytest.raises(LedgerCorruptError, match="fails SQLite's integrity check") as info:
            damaged.check()
    assert "missing from index" in str(info.value)
    # rebuilding from what the outputs show gives an intact ledger again
    Ledger.rebuild(path, [_row(PERIODS[0])])
    with Ledger(state) as rebuilt:
        rebuilt.check()
        assert rebuilt.rows() == [_row(PERIODS[0])]


def test_foreign_database_and_other_version_are_reported(tmp_path):
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    conn = sqlite3.connect(foreign / "ledger.sqlite")
    conn.execute("CREATE TABLE notes (x TEXT)")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerVersionError, match="ledger schema 0"):
        Ledger(foreign)

    newer = tmp_path / "newer"
    Ledger(newer).close()
    conn = sqlite3.connect(newer / "ledger.sqlite")
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerVersionError, match=f"ledger schema {SCHEMA_VERSION + 1}"):
        Ledger(newer)

    wrong_columns = tmp_path / "wrong"
    Ledger(wrong_columns).close()
    conn = sqlite3.connect(wrong_columns / "ledger.sqlite")
    conn.execute("ALTER TABLE computed ADD COLUMN extra TEXT")
    conn.commit()
    conn.close()
    with pytest.raises(LedgerCorruptError, match="'computed' with columns"):
        Ledger(wrong_columns)


def test_rebuild_replaces_a_corrupt_file(tmp_path):
    state = tmp_path / "state"
    state.mkdir()
    path = state / "ledger.sqlite"
    path.write_bytes(b"\xde\xad\xbe\xef" * 1024)
    rows = [_row(p) for p in PERIODS]
    assert Ledger.rebuild(path, rows) == path
    with Ledger(state) as ledger:
        ledger.check()
        assert ledger.rows(COV) == rows
        assert ledger.last_run() is None
    # no temporary files left next to it
    assert sorted(p.name for p in state.iterdir()) == ["ledger.sqlite"]


def test_rebuild_failure_keeps_the_old_file(tmp_path):
    state = tmp_path / "state"
    with Ledger(state) as ledger:
        ledger.record([_row(PERIODS[0])])
    with pytest.raises(TypeError):
        Ledger.rebuild(state / "ledger.sqlite", [_row(PERIODS[1]), "not a row"])
    with Ledger(state) as ledger:
        assert ledger.rows() == [_row(PERIODS[0])]
    assert sorted(p.name for p in state.iterdir()) == ["ledger.sqlite"]


def test_runs_table(ledger):
    first = ledger.start_run()
    running = ledger.last_run()
    assert running.id == first
    assert running.finished is None and running.result is None and running.summary is None
    ledger.finish_run(first, "success", {"computed": ["2031-01"], "skipped": [], "missing": []})
    second = ledger.start_run()
    assert second > first
    ledger.finish_run(second, "nothing_to_do", {"computed": [], "when": dt.date(2031, 2, 3)})
    last = ledger.last_run()
    assert last.id == second
    assert last.result == "nothing_to_do"
    assert last.summary == {"computed": [], "when": "2031-02-03"}
    assert dt.datetime.fromisoformat(last.started) <= dt.datetime.fromisoformat(last.finished)
    with pytest.raises(KeyError, match="no run with id 999"):
        ledger.finish_run(999, "error", {})


def test_file_hash_reads_a_file_again_only_when_it_changed(tmp_path, monkeypatch):
    import hashlib
    import os

    import covextract.io.paths as manifest

    data = tmp_path / "rain_2021-03.tif"
    data.write_bytes(b"first content")
    calls = []
    real = manifest.file_sha256
    monkeypatch.setattr(manifest, "file_sha256", lambda p: calls.append(p) or real(p))
    with Ledger(tmp_path / "state") as ledger:
        # Reference: hashlib's SHA-256 of the bytes.
        assert ledger.file_hash(data) == hashlib.sha256(b"first content").hexdigest()
        assert ledger.file_hash(data) == hashlib.sha256(b"first content").hexdigest()
        assert len(calls) == 1  # the second call trusted size and modification time
        data.write_bytes(b"other content, longer")
        assert ledger.file_hash(data) == hashlib.sha256(b"other content, longer").hexdigest()
        assert len(calls) == 2
        # same size, new modification time: read again
        st = data.stat()
        data.write_bytes(b"OTHER content, longer")
        os.utime(data, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000))
        assert ledger.file_hash(data) == hashlib.sha256(b"OTHER content, longer").hexdigest()
        assert len(calls) == 3
    with Ledger(tmp_path / "state") as again:  # the hashes persist across runs
        assert again.file_hash(data) == hashlib.sha256(b"OTHER content, longer").hexdigest()
        assert len(calls) == 3


def test_file_hash_of_a_missing_file_says_which(tmp_path):
    with Ledger(tmp_path / "state") as ledger:
        with pytest.raises(OutputError, match="cannot read the input file .*gone.tif"):
            ledger.file_hash(tmp_path / "gone.tif")
