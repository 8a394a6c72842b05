"""The codebook: one row per new column, saying exactly what it holds.

Written as CSV (for machines) and Markdown (for reading), with the cautions
that travel with the numbers.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from covextract.io.writers import atomic_write_text

__all__ = ["CODEBOOK_FIELDS", "STAT_DEFINITIONS", "CAUTIONS", "write_codebook"]

CODEBOOK_FIELDS = [
    "column",
    "layer",
    "statistic",
    "definition",
    "unit_of_measure",
    "pixel_rule",
    "area_weighting",
    "unit_shape",
    "nodata_handling",
    "source_file",
    "source",
    "version",
    "citation",
    "license",
    "qa_codes",
]

STAT_DEFINITIONS = {
    "count": "number of pixels with coverage >= 1e-10 and a valid value",
    "valid_share": (
        "share of the unit's (weighted) area with valid pixels; the part of the unit "
        "outside the raster counts as invalid"
    ),
    "sum": "sum over pixels of coverage x value (right for per-pixel counts)",
    "density_total": (
        "sum over pixels of coverage x value x pixel ground area in km2 (right for "
        "densities such as people per km2 or radiance)"
    ),
    "area_km2": "area of the unit on the raster grid, km2 (coverage x true pixel area)",
    "mean": (
        "weighted mean of valid pixels (weight = coverage x true pixel area when area "
        "weighting is on)"
    ),
    "std": "weighted standard deviation of valid pixels, ddof = 0 (weights are areas)",
    "min": "smallest valid pixel value among covered pixels",
    "max": "largest valid pixel value among covered pixels",
    "median": "weighted median (weighted generalisation of numpy's linear percentile)",
    "percentile": "weighted {q}th percentile (weighted generalisation of numpy's linear method)",
    "area_above": (
        "area, km2, of valid pixels with value > {threshold} (coverage x true pixel area)"
    ),
    "share_above": "share of the valid (weighted) area with value > {threshold}",
    "relchange": (
        "relative change: the unit's mean per-pixel change divided by its mean earlier value "
        "on the same pixels (missing where that mean is 0)"
    ),
    "value": "value of the raster at the point ({method}); missing when that pixel is nodata",
}

CATEGORICAL_DEFINITIONS = {
    "share": "share of the unit's valid area in class or group {label} (nodata excluded)",
    "dominant": "class with the largest share of the valid area; a tie goes to the lowest code",
    "classes_present": "number of classes with a positive share ('other' counts as one)",
    "shannon": "Shannon diversity -sum p ln p over the class shares (Shannon 1948)",
    "valid_share": "share of the unit's area with a valid class code",
    "transition": (
        "share of the unit's area that was {pair} between layer {since} and this layer "
        "('any' = any class other than the target), on pixels valid in both"
    ),
    "net_change": "share of class {label} in this layer minus its share in layer {since}, "
    "on pixels valid in both",
}

RULE_TEXT = {
    "overlap": "overlap: each pixel weighted by the exact fraction of its area inside the unit",
    "center": "center: pixels whose centre lies inside the unit, weight 1",
    "touched": "touched: every pixel the unit touches, weight 1",
    "nearest": "nearest: the pixel containing the point",
    "bilinear": "bilinear: interpolated between the four nearest pixel centres",
}

CAUTIONS = [
    "Covariates describe the environment of a unit; in a model they show association, not cause.",
    "Values are aggregated over an area: they do not describe any individual living there.",
    "Proxies (night lights, vegetation) are not counts or measurements of people or health.",
    "Exact household and cluster locations are confidential: keep the inputs, the weights "
    "cache and any table holding coordinates on this machine; covextract sends nothing anywhere.",
    "Local data-protection rules, ethics approvals and the study's epidemiologists have the "
    "last word on how these columns are used and shared.",
]


def write_codebook(rows: list[dict], csv_path, *, markdown_path=None, title: str = "Codebook"):
    """Write the codebook as CSV and, when ``markdown_path`` is given, Markdown.

    Parameters
    ----------
    rows : list of dict
        One dict per column with the keys of :data:`CODEBOOK_FIELDS`.
    csv_path, markdown_path : path
        Destinations (written atomically).
    """
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CODEBOOK_FIELDS, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: row.get(k, "") for k in CODEBOOK_FIELDS})
    atomic_write_text(csv_path, buf.getvalue())
    if markdown_path is not None:
        atomic_write_text(markdown_path, codebook_markdown(rows, title=title))
    return Path(csv_path)


def _md_cell(text) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def codebook_markdown(rows: list[dict], *, title: str = "Codebook") -> str:
    """The codebook as a Markdown document."""
    lines = [f"# {title}", "", "## Cautions", ""]
    lines += [f"- {c}" for c in CAUTIONS]
    lines += ["", "## Columns", ""]
    for row in rows:
        lines.append(f"### `{row['column']}`")
        lines.append("")
        for key in CODEBOOK_FIELDS[1:]:
            val = row.get(key, "")
            if val not in ("", None):
                lines.append(f"- **{key.replace('_', ' ')}**: {_md_cell(val)}")
        lines.append("")
    return "\n".join(lines) + "\n"
