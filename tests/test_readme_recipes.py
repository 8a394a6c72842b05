"""Every complete recipe in README.md runs as written on the demo data and gives the columns it names.

How a block of README.md is read:

- Only fenced blocks opened with ```` ```yaml ```` are recipes or parts of one.
- A block is **complete** when its top level has ``version:``, ``study:`` and
  ``covariates:``. A complete recipe is written into a fresh copy of the demo
  folder (``covextract.demo.lay_out_demo``), exactly as it stands in the
  README, and must check clean (``check_recipe`` returns ``[]``) and run
  (``run(..., write=True)`` into that copy) without a warning.
- A block with ``study:`` and ``covariates:`` looks like a whole recipe, so it
  must be complete; a block with ``version:`` must have the rest. Any other
  yaml block (``layers:`` or ``covariates:`` alone) is a fragment that
  illustrates one feature and is not run.
- Columns a complete recipe documents are read from its ``# -> a, b, c``
  comments: the comma-separated legal names right after the arrow (the list
  ends at the first word that is not followed by a comma). When the rest of
  that comment line mentions the panel, the names are values of the long
  panel's ``column``; otherwise they are table columns. When every covariate
  entry carries such a comment, the new table columns must be exactly the
  documented ones, in order; otherwise each documented column must exist and
  every covariate must produce a column.
- ``output.panel:``'s comment lists the panel's own columns after its last
  colon (continuing on the comment-only lines below it).

The README also may not use a column spelling retired by the redesign
(CHANGELOG 0.1.0, "Column names changed").
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import pytest
import yaml

from covextract.demo import lay_out_demo
from covextract.run import check_recipe, run

REPO = Path(__file__).resolve().parents[1]
README = REPO / "README.md"
NAME = r"[A-Za-z][A-Za-z0-9_]*"
ARROW = re.compile(rf"#\s*->\s*({NAME}(?:,\s*{NAME})*)(.*)$")


@dataclass
class Block:
    line: int  # 1-based line of the block's first YAML line in README.md
    text: str

    @property
    def data(self):
        return yaml.safe_load(self.text)

    @property
    def complete(self) -> bool:
        return _is_mapping(self.data) and {"version", "study", "covariates"} <= set(self.data)

    def __str__(self) -> str:
        return f"README.md:{self.line}"


def _is_mapping(data) -> bool:
    return isinstance(data, dict)


def yaml_blocks(text: str) -> list[Block]:
    """The ```` ```yaml ```` blocks of a Markdown text, with the line each starts on."""
    blocks, current, start = [], None, 0
    for number, line in enumerate(text.splitlines(), start=1):
        if current is None:
            if line.strip() == "```yaml":
                current, start = [], number + 1
        elif line.strip() == "```":
            blocks.append(Block(start, "\n".join(current) + "\n"))
            current = None
        else:
            current.append(line)
    assert current is None, "an unclosed ```yaml block in README.md"
    return blocks


def documented_columns(block: Block) -> tuple[list[str], list[str], int]:
    """Table columns and panel column values named by ``# ->`` comments, and how many comments."""
    table, panel, arrows = [], [], 0
    for line in block.text.splitlines():
        found = ARROW.search(line)
        if found is None:
            continue
        arrows += 1
        names = [n.strip() for n in found.group(1).split(",")]
        (panel if "panel" in found.group(2) else table).extend(names)
    return table, panel, arrows


def documented_panel_columns(block: Block) -> list[str] | None:
    """The panel's columns listed in the comment of ``panel:`` under ``output:``, if any."""
    lines = block.text.splitlines()
    for i, line in enumerate(lines):
        if re.match(r"\s+panel:", line) and "#" in line:
            comment = [line.split("#", 1)[1]]
            for more in lines[i + 1 :]:
                if not more.strip().startswith("#"):
                    break
                comment.append(more.strip()[1:])
            listed = " ".join(comment).rsplit(":", 1)[1]
            return [n.strip() for n in listed.split(",")]
    return None


BLOCKS = yaml_blocks(README.read_text(encoding="utf-8"))
COMPLETE = [b for b in BLOCKS if b.complete]


def test_readme_has_complete_recipes():
    # The line-by-line recipe and the rainfall example at least.
    assert len(COMPLETE) >= 2, [str(b) for b in BLOCKS]


@pytest.mark.parametrize("block", BLOCKS, ids=str)
def test_every_whole_looking_block_is_complete(block):
    data = block.data
    assert _is_mapping(data), f"{block}: a yaml block that is not a mapping"
    keys = set(data)
    if {"study", "covariates"} <= keys or "version" in keys:
        assert block.complete, f"{block}: a whole recipe needs version:, study: and covariates:"
        assert data["version"] == 1, f"{block}: recipes are version: 1"


@pytest.mark.parametrize("block", COMPLETE, ids=str)
def test_complete_recipe_runs_as_written_on_the_demo(block, tmp_path):
    folder = lay_out_demo(tmp_path / "demo")
    path = folder / f"readme_{block.line}.yaml"
    path.write_text(block.text, encoding="utf-8")
    assert [str(p) for p in check_recipe(path)] == []
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        result = run(path, write=True)

    table_cols, panel_values, arrows = documented_columns(block)
    assert table_cols or panel_values, f"{block}: no '# ->' comment names its columns"
    n_covariates = len(block.data["covariates"])
    if arrows == n_covariates:
        assert result.columns == table_cols
    else:
        assert set(table_cols) <= set(result.columns)
        assert result.columns
    assert list(result.table.columns[-len(result.columns) :]) == result.columns
    # The study table comes back whole, minus output.drop.
    dropped = set(block.data.get("output", {}).get("drop", []))
    assert not dropped & set(result.table.columns)
    assert result.table.shape[0] == 40  # the demo's 40 villages
    for col in result.columns:
        if not col.endswith(("_qa", "_dominant")):
            assert result.table[col].notna().any(), f"{block}: {col} is wholly missing"

    written = result.outputs["table"]
    assert Path(written).is_file()
    assert Path(written).resolve().is_relative_to(folder.resolve())

    panel_columns = documented_panel_columns(block)
    if panel_values or panel_columns is not None:
        assert result.panel is not None and not result.panel.empty
        assert sorted(result.panel["column"].unique()) == sorted(panel_values)
        assert list(result.panel.columns) == panel_columns
        # The panel is keyed by the study's own id column.
        assert panel_columns[0] == block.data["study"]["id"]
        assert list(Path(folder, block.data["output"]["panel"]).glob("*.parquet"))
    else:
        assert result.panel is None or result.panel.empty


# Spellings the redesign retired (CHANGELOG 0.1.0): windows rain_mean_sum_3m_lag1,
# land-cover x_transition_a_to_b and x_net_change_c, SPI _category, the panel's unit_id.
RETIRED = {
    "window with an underscore before the month count": re.compile(r"_(?:sum|mean|min|max)_\d+m_"),
    "land-cover transition column": re.compile(r"_transition_"),
    "land-cover net change column": re.compile(r"_net_change_"),
    "SPI class column": re.compile(r"_category\b"),
    "panel id column": re.compile(r"\bunit_id\b"),
}


@pytest.mark.parametrize(
    "path", [README, *sorted((REPO / "recipes").glob("*.yaml"))], ids=lambda p: p.name
)
def test_no_retired_column_spelling(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    hits = [
        f"{path.name}:{number}: retired {what}: {line.strip()}"
        for what, pattern in RETIRED.items()
        for number, line in enumerate(lines, start=1)
        if pattern.search(line)
    ]
    assert hits == []
