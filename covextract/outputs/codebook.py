"""The codebook: one row per new column, saying exactly what it holds.

Written as CSV (for machines) and Markdown (for reading), with the cautions
that travel with the numbers.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from covextract.io.writers import atomic_write_text

__all__ = [
    "CODEBOOK_FIELDS",
    "CAUTIONS",
    "write_codebook",
    "codebook_markdown",
    "methods_paragraph",
]

CODEBOOK_FIELDS = [
    "column",
    "output",
    "layer",
    "statistic",
    "definition",
    "unit_of_measure",
    "method",
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

CAUTIONS = [
    "Covariates describe the environment of a unit; in a model they show association, not cause.",
    "Values are aggregated over an area: they do not describe any individual living there.",
    "Proxies (night lights, vegetation) are not counts or measurements of people or health.",
    "Exact household and cluster locations are confidential: keep the inputs, the weights "
    "cache and any table holding coordinates on this machine; covextract sends nothing anywhere.",
    "Local data-protection rules, ethics approvals and the study's epidemiologists have the "
    "last word on how these columns are used and shared.",
]


def write_codebook(result, csv_path, *, markdown_path=None, title: str | None = None):
    """Write the codebook of a run as CSV and, when ``markdown_path`` is given, Markdown.

    Parameters
    ----------
    result : RunResult
        Its ``codebook`` rows (keys of :data:`CODEBOOK_FIELDS`), table, panel
        and layers.
    csv_path, markdown_path : path
        Destinations (written atomically).
    """
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=CODEBOOK_FIELDS, lineterminator="\n")
    writer.writeheader()
    for row in result.codebook:
        writer.writerow({k: row.get(k, "") for k in CODEBOOK_FIELDS})
    atomic_write_text(csv_path, buf.getvalue())
    if markdown_path is not None:
        title = title or f"Codebook for {Path(csv_path).name.replace('_codebook.csv', '')}"
        atomic_write_text(markdown_path, codebook_markdown(result, title=title))
    return Path(csv_path)


def _md_cell(text) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


#: Published methods, cited in the methods paragraph when a run uses them.
REFERENCES = {
    "buffer": "Karney CFF (2013). Algorithms for geodesics. J. Geodesy 87:43-55.",
    "ndvi": "Rouse JW et al. (1974). Monitoring vegetation systems in the Great Plains with ERTS.",
    "evi": "Huete A et al. (2002). Remote Sensing of Environment 83:195-213.",
    "spi": "McKee TB, Doesken NJ, Kleist J (1993). The relationship of drought frequency and "
    "duration to time scales. 8th Conference on Applied Climatology; World Meteorological "
    "Organization (2012). Standardized Precipitation Index User Guide, WMO-No. 1090.",
    "sen": "Sen PK (1968). Estimates of the regression coefficient based on Kendall's tau. "
    "JASA 63:1379-1389.",
    "shannon": "Shannon CE (1948). A mathematical theory of communication. Bell System "
    "Technical Journal 27:379-423.",
    "allocated": "Tobler WR (1979). Smooth pycnophylactic interpolation for geographical "
    "regions. JASA 74:519-530 (the volume-preserving property).",
    "predicted": "Duan N (1983). Smearing estimate: a nonparametric retransformation method. "
    "JASA 78:605-610.",
}


def methods_paragraph(result) -> tuple[str, list[str]]:
    """A methods paragraph a study can adapt, and the references it cites.

    Built from the codebook rows (pixel rules, unit shapes, each covariate's
    method) and the run's layer metadata; the references are those of the
    published methods the run used, found from each row's statistic and
    series transform (``cites``) and each layer's band-math index, not from
    the wording of any text.
    """
    from covextract.core.version import __version__

    rows = [r for r in result.codebook if r.get("statistic") != "qa"]
    layers = list(dict.fromkeys([*result.layers, *(r["layer"] for r in rows)]))
    shapes = sorted({r["unit_shape"] for r in rows})
    rules = sorted({r["pixel_rule"] for r in rows})
    weighting = sorted({r["area_weighting"] for r in rows})
    text = (
        f"Environmental covariates were extracted with covextract {__version__} from "
        f"{len(layers)} raster layer{'s' if len(layers) != 1 else ''} ({', '.join(layers)}) "
        f"for {result.summary.get('units', '?')} study units ({'; '.join(shapes)}). Rasters were "
        "not resampled: each unit was projected to the raster's grid, and pixels were counted "
        f"by the rule {'; '.join(rules)}. Area weighting by each pixel's true ground area on "
        f"the WGS84 ellipsoid: {'; '.join(weighting)}. Nodata and declared fill values were "
        "excluded before any statistic; units with few or no valid pixels are flagged in "
        "their covariate's QA column."
    )
    cites = set()
    if any("buffer" in s for s in shapes):
        text += " Buffers are geodesic circles drawn on the ellipsoid."
        cites.add("buffer")
    # one sentence per covariate (two covariates with the same name and method: one)
    details = {}
    for r in rows:
        cites.update(r.get("cites", ()))
        if r.get("method"):
            details.setdefault((r.get("covariate") or r["layer"], r["method"]), None)
    for name, method in details:
        text += f" Covariate {name}: {method.rstrip('.')}."
    for name in layers:
        index = result.layers.get(name, {}).get("index")
        if index in REFERENCES:
            cites.add(index)
    return text, [ref for key, ref in REFERENCES.items() if key in cites]


def _column_summary(result, row) -> str:
    """Missing count and min / median / max (numbers) or counts of each value (text)."""
    import numpy as np
    import pandas as pd

    name = row["column"]
    if row.get("output") == "long panel":
        panel = result.panel
        if panel is None or panel.empty:
            return "no rows"
        if row.get("statistic") == "qa":
            values = panel.loc[panel["column"].isin(row.get("panel_columns", ())), "qa"]
        else:
            values = panel.loc[panel["column"] == name, "value"]
    elif name in result.table.columns:
        values = result.table[name]
    else:
        return "not written (removed by output.drop)"
    numeric = pd.to_numeric(values, errors="coerce")
    text_cells = values.notna() & numeric.isna() & (values.astype(str) != "")
    if text_cells.any() or row.get("statistic") in ("qa", "dominant", "category"):
        cells = values.fillna("").astype(str)
        missing = int((cells == "").sum())
        counts = cells[cells != ""].value_counts().sort_index()
        parts = [f"{k}: {v}" for k, v in counts.items()][:12]
        more = f", ... ({len(counts) - 12} more values)" if len(counts) > 12 else ""
        return f"{missing} empty; " + (", ".join(parts) + more if parts else "no values")
    finite = numeric[np.isfinite(numeric)]
    missing = int(len(numeric) - len(finite))
    if finite.empty:
        return f"{missing} missing of {len(numeric)}; no values"
    return (
        f"{missing} missing of {len(numeric)}; min {finite.min():.6g}, median "
        f"{finite.median():.6g}, max {finite.max():.6g}"
    )


def codebook_markdown(result, *, title: str = "Codebook") -> str:
    """The codebook as a Markdown document: cautions, layers, methods, then every column."""
    lines = [f"# {title}", "", "## Cautions", ""]
    lines += [f"- {c}" for c in CAUTIONS]
    lines += ["", "## Layers", ""]
    by_layer: dict = {}
    for row in result.codebook:
        by_layer.setdefault(row["layer"], row)
    for name in dict.fromkeys([*by_layer, *result.layers]):
        meta = result.layers.get(name, {})
        cols = [r["column"] for r in result.codebook if r["layer"] == name]
        reads = meta.get("reads") or by_layer.get(name, {}).get("source_file", "")
        parts = [f"**{name}**: {reads}"]
        if meta.get("unit"):
            parts.append(f"unit {meta['unit']}")
        if meta.get("crs"):
            parts.append(f"grid {meta['width']} x {meta['height']} pixels in {meta['crs']}")
        for key in ("source", "version", "citation", "license"):
            if meta.get(key):
                parts.append(f"{key} {meta[key]}")
        if cols:
            parts.append(f"{len(cols)} column{'s' if len(cols) != 1 else ''}")
        else:
            users = {
                f"{r.get('covariate') or r['layer']} as {r['reads'][name]}": None
                for r in result.codebook
                if name in (r.get("reads") or {})
            }
            parts.append("no columns of its own; read by " + (", ".join(users) or "a covariate"))
        lines.append("- " + "; ".join(_md_cell(p) for p in parts))
    text, refs = methods_paragraph(result)
    lines += ["", "## Methods (a paragraph to adapt)", "", text, ""]
    if refs:
        lines += ["References:", ""] + [f"- {r}" for r in refs] + [""]
    lines += ["## Columns", ""]
    for row in result.codebook:
        lines.append(f"### `{row['column']}`")
        lines.append("")
        for key in CODEBOOK_FIELDS[1:]:
            val = row.get(key, "")
            if val not in ("", None):
                lines.append(f"- **{key.replace('_', ' ')}**: {_md_cell(val)}")
        lines.append(f"- **values in this run**: {_column_summary(result, row)}")
        lines.append("")
    return "\n".join(lines) + "\n"
