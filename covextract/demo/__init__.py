"""The shipped demo scenario: an invented district, invented villages, invented rasters."""

from __future__ import annotations

import shutil
from importlib import resources
from pathlib import Path

from covextract.errors import OutputError

__all__ = ["demo_data_folder", "lay_out_demo"]


def demo_data_folder() -> Path:
    """Folder of the packaged demo files."""
    return Path(str(resources.files("covextract.demo") / "data"))


def lay_out_demo(out=None) -> Path:
    """Copy the demo scenario into ``out`` (default: a new ``covextract-demo`` folder here).

    Refuses to write into a non-empty folder that is not an earlier demo.
    """
    src = demo_data_folder()
    if out is None:
        base = Path.cwd() / "covextract-demo"
        out = base
        n = 1
        while out.exists():
            n += 1
            out = Path(f"{base}-{n}")
    out = Path(out)
    if out.exists() and any(out.iterdir()) and not (out / "recipe.yaml").exists():
        raise OutputError(
            f"{out} is not empty and holds no earlier demo; choose another folder with --out"
        )
    out.mkdir(parents=True, exist_ok=True)
    for item in src.iterdir():
        if item.name.startswith(("__", ".")):
            continue
        target = out / item.name
        if item.is_dir():
            shutil.copytree(item, target, dirs_exist_ok=True)
        else:
            shutil.copy2(item, target)
    return out
