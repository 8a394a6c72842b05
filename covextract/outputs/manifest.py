"""The manifest: what went in, what came out, with which versions. Written last.

A manifest whose output fingerprints match the files on disk means the set
of outputs is complete and belongs together.
"""

from __future__ import annotations

import hashlib
import json
import platform
from datetime import datetime, timezone
from pathlib import Path

from covextract.io.writers import atomic_write_text

__all__ = ["file_sha256", "package_versions", "write_manifest", "verify_manifest"]

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


def file_sha256(path, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (for a folder: of its files, sorted by name)."""
    path = Path(path)
    h = hashlib.sha256()
    files = sorted(p for p in path.rglob("*") if p.is_file()) if path.is_dir() else [path]
    for f in files:
        if path.is_dir():
            h.update(str(f.relative_to(path)).encode())
        with open(f, "rb") as fh:
            while block := fh.read(chunk):
                h.update(block)
    return h.hexdigest()


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
    extra: dict | None = None,
):
    """Write the manifest JSON (call after every other output is in place).

    Parameters
    ----------
    inputs : list of dict
        ``{"role", "path"}`` for every input file; fingerprints are added here
        unless an item already carries its ``"sha256"``.
    outputs : list of path
        Files written by the run; their fingerprints are recorded.
    layers : dict
        ``layer name -> {"crs": ..., "grid": ...}``.
    """
    finished = datetime.now(timezone.utc)
    doc = {
        "manifest_version": 1,
        "recipe": {
            "file": str(recipe_file) if recipe_file else None,
            "fingerprint": recipe_fingerprint,
        },
        "inputs": [
            {
                **item,
                "path": str(item["path"]),
                "sha256": item.get("sha256") or file_sha256(item["path"]),
                "bytes": Path(item["path"]).stat().st_size,
            }
            for item in inputs
        ],
        "outputs": [{"path": str(p), "sha256": file_sha256(p)} for p in outputs],
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


def verify_manifest(path) -> list[str]:
    """Problems found when comparing a manifest with the files on disk (empty: all match)."""
    doc = json.loads(Path(path).read_text())
    problems = []
    for item in doc.get("inputs", []) + doc.get("outputs", []):
        p = Path(item["path"])
        if not p.exists():
            problems.append(f"{p} is missing")
        elif file_sha256(p) != item["sha256"]:
            problems.append(f"{p} has changed since the run")
    return problems
