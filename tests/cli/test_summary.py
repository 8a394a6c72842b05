"""The summary after a run: counts in the right number, lines that agree with each other."""

from __future__ import annotations

import io
from types import SimpleNamespace

import pandas as pd
import pytest
from rich.console import Console

from covextract.cli.common import counted
from covextract.cli.summary import columns_text, preview_text, print_summary, weights_text


def printed(result, **kw) -> list[str]:
    buf = io.StringIO()
    print_summary(result, console=Console(file=buf, width=300, color_system=None), **kw)
    return buf.getvalue().splitlines()


def fake_result(n_units, values, qa, *, layers=("rain",), drop=(), summary=None):
    """A run result as print_summary reads it; the codebook marks QA columns."""
    frame = pd.DataFrame({"site": [f"S{i}" for i in range(n_units)]})
    for j, c in enumerate(values + qa):
        frame[c] = [float(i + j) for i in range(n_units)] if c in values else [""] * n_units
    codebook = [{"column": c, "statistic": "mean"} for c in values]
    codebook += [{"column": c, "statistic": "qa"} for c in qa]
    s = {
        "units": n_units,
        "layers": list(layers),
        "columns": values + qa,
        "units_without_values": {},
        "qa_counts": {},
        "weights_built": 1,
        "weights_loaded": 0,
        "weights_reused": 0,
    }
    s.update(summary or {})
    return SimpleNamespace(
        table=frame.drop(columns=list(drop)),
        columns=values + qa,
        codebook=codebook,
        outputs={"table": "/data/out/sites.csv"},
        summary=s,
    )


@pytest.mark.parametrize(
    "n, singular, text",
    [(0, "layer", "0 layers"), (1, "layer", "1 layer"), (2, "layer", "2 layers"),
     (1, "unit", "1 unit"), (3, "unit", "3 units")],
)  # fmt: skip
def test_counted(n, singular, text):
    assert counted(n, singular) == text


def test_one_of_everything_is_singular():
    lines = printed(fake_result(1, ["rain_sum"], ["rain_qa"]))
    assert lines[0] == "1 unit, 1 layer (rain), 2 new columns: 1 value column and 1 QA column"
    assert lines[1] == "weight sets: 1 built, 0 loaded from the state folder, not reused"
    assert "all 1 row" in lines[2]
    assert "shown above: 1 of 1 value column; not shown: 1 QA column" in lines
    assert lines[-1] == "table: /data/out/sites.csv"


def test_many_columns_the_counts_add_up():
    values = [f"v{i}" for i in range(40)]
    qa = [f"q{i}_qa" for i in range(7)]
    lines = printed(fake_result(12, values, qa, layers=("ndvi", "rain")))
    assert (
        lines[0]
        == "12 units, 2 layers (ndvi, rain), 47 new columns: 40 value columns and 7 QA columns"
    )
    assert "first 8 rows" in lines[2]
    # 6 shown + 34 not shown = 40 value columns; the 7 QA columns are named apart
    assert (
        "shown above: 6 of 40 value columns; not shown: 34 value columns and 7 QA columns" in lines
    )
    header = next(line for line in lines if "site" in line)
    assert all(f" v{i} " in header for i in range(6)) and " v6 " not in header


def test_dropped_columns_are_counted_apart():
    values = ["a", "b", "c"]
    lines = printed(fake_result(3, values, ["a_qa"], drop=["b"]))
    assert (
        "shown above: 2 of 3 value columns; not shown: 1 QA column; 1 value column dropped by output: drop"
        in lines
    )


def test_every_value_column_shown_and_no_qa():
    assert preview_text(4, 4, 0) == "shown above: 4 of 4 value columns"
    assert columns_text(["a"], []) == "1 new column: 1 value column and 0 QA columns"


@pytest.mark.parametrize(
    "counts, text",
    [
        # a brand-new state folder: one set built, then taken from memory for each other use
        ({"weights_built": 1, "weights_loaded": 0, "weights_reused": 107},
         "weight sets: 1 built, 0 loaded from the state folder, reused 107 times within this run"),
        # the second run: the sets come from the files of the first
        ({"weights_built": 0, "weights_loaded": 4, "weights_reused": 4},
         "weight sets: 0 built, 4 loaded from the state folder, reused 4 times within this run"),
        ({"weights_built": 2, "weights_loaded": 0, "weights_reused": 1},
         "weight sets: 2 built, 0 loaded from the state folder, reused 1 time within this run"),
        # a run layer that only reports the sum of loads and reuses says no more than that
        ({"weights_built": 4, "weights_from_cache": 4},
         "weight sets: 4 built; taken from the state folder or from memory 4 times"),
    ],
)  # fmt: skip
def test_weights_line(counts, text):
    assert weights_text(counts) == text


def test_qa_codes_missing_units_and_markup_are_printed_as_is():
    result = fake_result(
        2,
        ["rain_sum"],
        ["rain_qa"],
        summary={"units_without_values": {"rain": 1, "ndvi": 0}, "qa_counts": {"[b]x": 2}},
    )
    lines = printed(result)
    assert "units without values: rain: 1" in lines
    assert "QA codes: [b]x x2" in lines
