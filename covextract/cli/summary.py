"""The one-screen summary printed after a run."""

from __future__ import annotations


def print_summary(result, *, max_rows: int = 8) -> None:
    """Print where the outputs are and a short table of what was computed."""
    from rich.console import Console
    from rich.table import Table

    console = Console()
    s = result.summary
    console.print(
        f"[bold]{s['units']}[/bold] units, [bold]{len(s['layers'])}[/bold] layers "
        f"({', '.join(s['layers'])}), [bold]{len(s['columns'])}[/bold] new columns"
    )
    console.print(
        f"weights built: {s['weights_built']}, reused from cache: {s['weights_from_cache']}"
    )
    for name, fit in s.get("proxy_fits", {}).items():
        console.print(
            f"calibration {name}: log(count) = {fit['a']:.4g} + {fit['b']:.4g} log(light); "
            f"R2 {fit['r2']:.3f}, RMSE {fit['rmse']:.3g} (log scale), n {fit['n']}, "
            f"smearing {fit['smearing']:.4g}"
        )
    missing = {k: v for k, v in s["units_without_values"].items() if v}
    if missing:
        console.print("units without values: " + ", ".join(f"{k}: {v}" for k, v in missing.items()))
    if s["qa_counts"]:
        console.print(
            "QA codes: " + ", ".join(f"{k} x{v}" for k, v in sorted(s["qa_counts"].items()))
        )
    value_cols = [c for c in result.columns if not c.endswith("_qa")]
    table = Table(title=f"first {min(max_rows, len(result.table))} rows", show_lines=False)
    first = result.table.columns[0]
    table.add_column(str(first))
    shown = value_cols[:6]
    for c in shown:
        table.add_column(c, justify="right")
    for _, row in result.table.head(max_rows).iterrows():
        table.add_row(str(row[first]), *[_fmt(row[c]) for c in shown])
    console.print(table)
    if len(value_cols) > len(shown):
        console.print(f"... and {len(value_cols) - len(shown)} more columns")
    for name, path in result.outputs.items():
        # soft_wrap: a path is never broken across lines, even when stdout is a pipe
        # (rich would otherwise fold it at 80 columns).
        console.print(f"{name}: {path}", soft_wrap=True, markup=False, highlight=False)


def _fmt(v) -> str:
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if x != x:
        return "-"
    return f"{x:.4g}"
