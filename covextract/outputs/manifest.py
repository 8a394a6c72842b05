"""The manifest: what went in, what came out, with which versions. Written last.

A manifest whose output fingerprints match the files on disk means the set
of outputs is complete and belongs together.
"""

from __future__ import annotations

import json
import platform
from datetime import datetime, timezone
from pathlib import Path

from covextract.errors import CovextractWarning
from covextract.io.paths import file_sha256, inside, shareable_path
from covextract.io.writers import atomic_write_text

__all__ = [
    "MixedOutputsWarning",
    "file_sha256",
    "package_versions",
    "read_manifest",
    "write_manifest",
    "verify_manifest",
    "verify_outputs",
]


class MixedOutputsWarning(CovextractWarning):
    """The outputs on disk do not all belong to the run their manifest describes."""


_PACKAGES = (
    "covextract",
    "numpy",
    "scipy",
    "pandas",
    "rasterio",
    "geopandas",
    "pyogrio",
    "shapely",
    "pyproj",
    "pyarrow",
    "pydantic",
    "dask",
)


def package_versions() -> dict:
    """Versions of covextract, its main dependencies, GDAL and PROJ."""
    from importlib import metadata

    out = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            try:
                mod = __import__(name)
                out[name] = getattr(mod, "__version__", "unknown")
            except ImportError:
                out[name] = "not installed"
    try:
        import rasterio

        out["gdal"] = rasterio.__gdal_version__
    except ImportError:  # pragma: no cover
        pass
    try:
        import pyproj

        out["proj"] = pyproj.proj_version_str
    except ImportError:  # pragma: no cover
        pass
    return out


def write_manifest(
    path,
    *,
    recipe_fingerprint: str,
    recipe_file,
    inputs: list[dict],
    outputs: list,
    layers: dict,
    started: datetime,
    base_dir,
    extra: dict | None = None,
):
    """Write the manifest JSON (call after every other output is in place).

    Paths are written relative to ``base_dir`` (the recipe's folder); a file
    outside it is named by its file name and content hash, so the manifest
    can be shared without revealing local folder names.

    Parameters
    ----------
    inputs : list of dict
        ``{"role", "path"}`` for every input file; fingerprints are added here
        unless an item already carries its ``"sha256"``.
    outputs : list of (role, path) or (role, path, staged path)
        Files written by the run; their fingerprints are recorded (taken from
        the staged file when given: the set is committed after the manifest
        is staged).
    layers : dict
        ``layer name -> {"crs": ..., "grid": ...}``.
    base_dir : path
        The recipe's folder.
    """
    finished = datetime.now(timezone.utc)
    entries = []
    for item in inputs:
        digest = item.get("sha256") or file_sha256(item["path"])
        entries.append(
            {
                **item,
                "path": shareable_path(item["path"], base_dir, sha256=digest),
                "outside_recipe_folder": not inside(item["path"], base_dir),
                "sha256": digest,
                "bytes": Path(item["path"]).stat().st_size,
            }
        )
    written = []
    for role, p, *staged in outputs:
        digest = file_sha256(staged[0] if staged else p)
        written.append(
            {
                "role": role,
                "path": shareable_path(p, base_dir, sha256=digest),
                "outside_recipe_folder": not inside(p, base_dir),
                "sha256": digest,
            }
        )
    doc = {
        "manifest_version": 2,
        "paths": "relative to the recipe's folder; files outside it by name and content hash",
        "recipe": {
            "file": shareable_path(recipe_file, base_dir) if recipe_file else None,
            "fingerprint": recipe_fingerprint,
        },
        "inputs": entries,
        "outputs": written,
        "layers": layers,
        "versions": package_versions(),
        "run": {
            "started": started.isoformat(timespec="seconds"),
            "finished": finished.isoformat(timespec="seconds"),
            "seconds": round((finished - started).total_seconds(), 3),
        },
    }
    if extra:
        doc.update(extra)
    atomic_write_text(path, json.dumps(doc, indent=2, sort_keys=False) + "\n")
    return Path(path)


def read_manifest(path) -> dict | None:
    """A manifest's content, or None when it is missing or not a covextract manifest."""
    try:
        doc = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or "manifest_version" not in doc:
        return None
    return doc


def verify_manifest(path, *, base_dir, which=("inputs", "outputs")) -> list[str]:
    """Problems found when comparing a manifest with the files on disk (empty: all match).

    ``base_dir`` is the recipe's folder, which the manifest's paths are
    relative to. Files recorded outside it (by name and hash) cannot be
    located and are reported as such. ``which`` chooses the entries checked.
    """
    doc = json.loads(Path(path).read_text())
    problems = []
    entries = [item for key in which for item in doc.get(key, [])]
    for item in entries:
        if item.get("outside_recipe_folder"):
            problems.append(f"{item['path']} lies outside the recipe folder; not checked")
            continue
        p = Path(base_dir) / item["path"]
        if not p.exists():
            problems.append(f"{item['path']} is missing")
        elif file_sha256(p) != item["sha256"]:
            problems.append(f"{item['path']} has changed since the run")
    return problems


def verify_outputs(manifest, *, base_dir, panel=None) -> list[str]:
    """Why the outputs on disk are not the complete set the manifest describes (empty: they are).

    Only output entries are compared (inputs change between refreshes by
    design). Outputs outside the recipe folder are recorded by name and hash
    and cannot be located, so they are not compared. ``panel``, the panel
    folder, is also checked for period files the manifest does not list.
    """
    from covextract.outputs.panel import panel_files

    if not Path(manifest).is_file():
        return []
    try:
        problems = verify_manifest(manifest, base_dir=base_dir, which=("outputs",))
        doc = json.loads(Path(manifest).read_text())
    except (OSError, ValueError) as exc:
        return [f"the manifest {Path(manifest).name} is unreadable ({exc.__class__.__name__})"]
    problems = [p for p in problems if "outside the recipe folder" not in p]
    if panel is not None:
        listed = {
            (Path(base_dir) / item["path"]).resolve()
            for item in doc.get("outputs", [])
            if str(item.get("role", "")).startswith("panel:")
        }
        for f in panel_files(panel):
            if f.resolve() not in listed:
                problems.append(f"{shareable_path(f, base_dir)} is not in the manifest")
    return problems
