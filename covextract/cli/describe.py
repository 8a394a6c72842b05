"""``covextract describe FILE``: what a raster or vector file holds."""

from __future__ import annotations

from pathlib import Path

import typer

from covextract.cli.common import DEBUG_HELP, cli_errors

VECTOR_EXTENSIONS = {".gpkg", ".geojson", ".json", ".shp", ".fgb", ".csv", ".parquet"}


def describe_command(
    path: Path = typer.Argument(
        ..., metavar="FILE", help="A raster (GeoTIFF...) or vector/table file."
    ),
    debug: bool = typer.Option(False, "--debug", help=DEBUG_HELP),
) -> None:
    """Describe FILE: CRS, grid, bounds, type, nodata, scale; or columns and geometry types."""
    with cli_errors(debug):
        if path.suffix.lower() in VECTOR_EXTENSIONS:
            from covextract.io.tables import describe_vector

            info = describe_vector(path)
        else:
            from covextract.io.rasters import describe_raster

            info = describe_raster(path)
        _print(info)


def _print(info: dict, indent: int = 0) -> None:
    pad = "  " * indent
    for key, value in info.items():
        if isinstance(value, dict):
            typer.echo(f"{pad}{key}:")
            _print(value, indent + 1)
        else:
            typer.echo(f"{pad}{key}: {value}")
