"""``covextract demo``: lay out the invented demo scenario and run it."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, cli_errors


def demo_command(
    out: Path = typer.Option(
        None, "--out", help="Folder for the scenario and its outputs (default: a new folder here)."
    ),
    spi: bool = typer.Option(
        True,
        "--spi/--no-spi",
        help="Also generate a 31-year invented rainfall series and compute SPI-3 before visits.",
    ),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Copy the invented demo scenario to a folder, run its recipe and show the result."""
    with cli_errors(debug):
        from covextract.cli.summary import print_summary
        from covextract.demo import lay_out_demo
        from covextract.run import run

        folder = lay_out_demo(out)
        typer.echo(f"demo scenario (invented data) laid out in {folder}")
        from covextract.cli.progress import make_progress

        result = run(folder / "recipe.yaml", write=True, progress=make_progress(quiet=False))
        print_summary(result)
        if spi:
            from covextract.demo.spi import SPI_RECIPE, write_spi_series

            write_spi_series(folder)
            (folder / "recipe_spi.yaml").write_text(SPI_RECIPE, encoding="utf-8")
            typer.echo(
                "\nSPI example: 372 invented monthly rainfall rasters generated in "
                f"{folder / 'spi_rain'}; running recipe_spi.yaml"
            )
            spi_result = run(folder / "recipe_spi.yaml", write=True, progress=None)
            cats = spi_result.table["spi3_mean_cat"].value_counts()
            typer.echo(
                "SPI-3 of the month before each visit, villages per WMO category: "
                + ", ".join(f"{k} {v}" for k, v in cats.items())
            )
            typer.echo(f"table: {spi_result.outputs['table']}")
