"""The one-screen summary printed after a run.

Every count is printed with its noun in the right number, and the lines
agree with each other: the column line says how many value and QA columns
the run made, and the line under the preview table says exactly which of
them the table leaves out.
"""

from __future__ import annotations

from covextract.cli.common import counted

#: Value columns shown in the preview table (the terminal is only so wide).
SHOWN_COLUMNS = 6


def split_columns(result) -> tuple[list[str], list[str]]:
    """``(value columns, QA columns)`` among the run's new columns, in their order.

    The codebook marks QA columns with the statistic ``qa``; a column the
    codebook does not describe counts as QA when its name ends in ``_qa``.
    """
    statistic = {row.get("column"): row.get("statistic") for row in (result.codebook or [])}
    values, qa = [], []
    for c in result.columns:
        st = statistic.get(c)
        (qa if st == "qa" or (st is None and str(c).endswith("_qa")) else values).append(c)
    return values, qa


def columns_text(values: list, qa: list) -> str:
    """``"47 new columns: 40 value columns and 7 QA columns"``."""
    return (
        f"{counted(len(values) + len(qa), 'new column')}: "
        f"{counted(len(values), 'value column')} and {counted(len(qa), 'QA column')}"
    )


def weights_text(s: dict) -> str:
    """The weight sets line, from the run summary's counters.

    ``"weight sets: 1 built, 0 loaded from the state folder, reused 107 times
    within this run"``.

    ``weights_built`` sets were computed; ``weights_loaded`` were read from
    the state folder (made by an earlier run); ``weights_reused`` counts the
    times a covariate took a set already in memory from earlier in this run.
    A summary without the last two (an older run layer) only has
    ``weights_from_cache``, which adds both; the line then says so.
    """
    built = s.get("weights_built", 0)
    if "weights_loaded" in s and "weights_reused" in s:
        reused = s["weights_reused"]
        again = f"reused {counted(reused, 'time')} within this run" if reused else "not reused"
        return (
            f"weight sets: {built} built, {s['weights_loaded']} loaded from the state folder, "
            + again
        )
    taken = counted(s.get("weights_from_cache", 0), "time")
    return f"weight sets: {built} built; taken from the state folder or from memory {taken}"


def print_summary(result, *, max_rows: int = 8, console=None) -> None:
    """Print what was computed, a short preview table and where the outputs are.

    Parameters
    ----------
    result : RunResult
        What the run returned (its ``summary``, ``columns``, ``codebook``,
        ``table`` and ``outputs``).
    max_rows : int
        Rows of the preview table.
    console : rich.console.Console, optional
        Where to print; standard output by default.
    """
    from rich.console import Console
    from rich.table import Table

    console = Console() if console is None else console
    s = result.summary
    layers = list(s["layers"])
    values, qa = split_columns(result)
    console.print(
        f"{counted(s['units'], 'unit')}, {counted(len(layers), 'layer')} "
        f"({', '.join(layers)}), {columns_text(values, qa)}",
        soft_wrap=True,
        markup=False,
        highlight=False,
    )
    console.print(weights_text(s), soft_wrap=True, markup=False, highlight=False)
    for name, fit in s.get("proxy_fits", {}).items():
        console.print(
            f"calibration {name}: log(count) = {fit['a']:.4g} + {fit['b']:.4g} log(light); "
            f"R2 {fit['r2']:.3f}, RMSE {fit['rmse']:.3g} (log scale), n {fit['n']}, "
            f"smearing {fit['smearing']:.4g}",
            soft_wrap=True,
            markup=False,
            highlight=False,
        )
    missing = {k: v for k, v in s["units_without_values"].items() if v}
    if missing:
        console.print(
            "units without values: " + ", ".join(f"{k}: {v}" for k, v in missing.items()),
            soft_wrap=True,
            markup=False,
            highlight=False,
        )
    if s["qa_counts"]:
        console.print(
            "QA codes: " + ", ".join(f"{k} x{v}" for k, v in sorted(s["qa_counts"].items())),
            soft_wrap=True,
            markup=False,
            highlight=False,
        )
    frame = result.table
    # ``output: drop:`` may remove new columns from the written table; only those left
    # can be previewed, and the line below says how many were dropped
    present = [c for c in values if c in frame.columns]
    shown = present[:SHOWN_COLUMNS]
    n_rows = min(max_rows, len(frame))
    title = f"all {counted(n_rows, 'row')}" if n_rows == len(frame) else f"first {n_rows} rows"
    table = Table(title=title, show_lines=False)
    first = frame.columns[0]
    table.add_column(str(first))
    for c in shown:
        table.add_column(c, justify="right")
    for _, row in frame.head(max_rows).iterrows():
        table.add_row(str(row[first]), *[_fmt(row[c]) for c in shown])
    console.print(table)
    console.print(
        preview_text(len(values), len(shown), len(qa), len(values) - len(present)),
        soft_wrap=True,
        markup=False,
        highlight=False,
    )
    for name, path in result.outputs.items():
        # soft_wrap: a path is never broken across lines, even when stdout is a pipe
        # (rich would otherwise fold it at 80 columns).
        console.print(f"{name}: {path}", soft_wrap=True, markup=False, highlight=False)


def preview_text(n_values: int, n_shown: int, n_qa: int, n_dropped: int = 0) -> str:
    """The line under the preview table: what it shows and exactly what it leaves out."""
    text = f"shown above: {n_shown} of {counted(n_values, 'value column')}"
    hidden = []
    if n_values - n_shown - n_dropped:
        hidden.append(counted(n_values - n_shown - n_dropped, "value column"))
    if n_qa:
        hidden.append(counted(n_qa, "QA column"))
    if hidden:
        text += "; not shown: " + " and ".join(hidden)
    if n_dropped:
        text += f"; {counted(n_dropped, 'value column')} dropped by output: drop"
    return text


def _fmt(v) -> str:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if x != x:
        return "-"
    return f"{x:.4g}"
