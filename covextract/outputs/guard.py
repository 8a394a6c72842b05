"""One guard for every path covextract writes: never an input, never a file of the user's.

:func:`guard_outputs` checks each output path (the writers' own paths, see
:meth:`covextract.outputs.write.Writer.targets`, plus the manifest and the
state folder) before anything is computed:

- a path that resolves (through symlinks) to an input file of the recipe, or
  lies inside a folder that is itself an input (a series template's folder),
  is refused; the recipe's own folder is not an input folder;
- a panel folder that holds inputs or other outputs is refused (it is
  replaced whole at every run);
- two outputs that are the same file are refused;
- an existing file is replaced only when covextract wrote it: its SHA-256 is
  in the previous manifest's ``outputs`` (or in a pending commit journal).
  Otherwise ``overwrite=True`` (``--overwrite``) is needed; this holds inside
  and outside the recipe folder alike, so deleting the state folder stays
  safe.

:func:`check_room` then checks that each output folder (its nearest existing
parent) is writable and has room for the expected size.
"""

from __future__ import annotations

import errno
import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path, PurePath

from covextract.io.paths import file_sha256
from covextract.io.writers import disk_reason, read_journal

__all__ = ["Target", "targets", "guard_outputs", "check_room", "shown_path", "BYTES_PER_CELL"]

#: Bytes per table cell assumed for a first run's size estimate (CSV text of a float
#: with its separator, rounded up; common practice for a margin, not a measurement).
BYTES_PER_CELL = 24

# temporaries of atomic writes and staged folders: covextract's own, removed by the next run
_TEMPORARY = re.compile(r"^\..+\.[A-Za-z0-9_]{8}\.(tmp(\.[A-Za-z0-9]+)?|old)$")


@dataclass(frozen=True)
class Target:
    """One path covextract writes.

    Attributes
    ----------
    key : str
        The recipe key that sets it (``output.table``), for line numbers.
    label : str
        How messages name it (``output.codebook's Markdown copy``).
    path : Path
        Absolute, symlinks not followed.
    kind : str
        ``file``, ``folder`` (replaced whole: the panel) or ``state`` (a
        folder covextract writes its own files into).
    suffixes : tuple of str
        Allowed file suffixes (empty: any).
    """

    key: str
    label: str
    path: Path
    kind: str = "file"
    suffixes: tuple = ()


def targets(paths: dict) -> list[Target]:
    """Every path written for these output paths: each writer's, then the manifest and state."""
    from covextract.outputs.write import WRITERS, WriteContext

    ctx = WriteContext(paths)
    out = []
    for writer in WRITERS:
        if writer.wanted(ctx):
            out += writer.targets(paths)
    out.append(
        Target("output.manifest", "output.manifest", Path(paths["manifest"]), "file", (".json",))
    )
    out.append(Target("output.state", "output.state", Path(paths["state"]), "state"))
    return out


def shown_path(path, base_dir) -> str:
    """``path`` relative to the recipe's folder when inside it, else absolute (links kept)."""
    path, base = Path(os.path.abspath(path)), Path(os.path.abspath(base_dir))
    try:
        rel = path.relative_to(base)
    except ValueError:
        return str(path)
    return rel.as_posix() if str(rel) != "." else "."


def _role_text(role: str) -> str:
    if role == "recipe":
        return "the recipe"
    if role == "study_table":
        return "the study table"
    if role == "boundaries":
        return "the boundaries file"
    kind, _, rest = role.partition(":")
    if kind == "layer":
        name = re.split(r"[:.]", rest, maxsplit=1)[0]
        return f"a file of layer {name}"
    if kind in ("zones", "totals"):
        return f"the {kind} file of {rest}"
    return f"an input ({role})"


@dataclass
class _Inputs:
    files: dict  # resolved path -> role text
    folders: dict  # resolved folder -> description


def _resolved(path) -> Path:
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError):  # a symlink loop: compare as written
        return Path(os.path.abspath(path))


def _template_folder(recipe, text: str) -> Path | None:
    """The folder of a series template (``rain/`` of ``rain/rain_{year}.tif``), or None."""
    parts = PurePath(text).parts
    fixed = []
    for part in parts:
        if "{" in part:
            break
        fixed.append(part)
    if len(fixed) == len(parts):
        return None
    folder = recipe.resolve(PurePath(*fixed)) if fixed else recipe.base_dir
    return folder


def recipe_inputs(recipe, extra=None) -> _Inputs:
    """Every input file and input folder of a recipe, plus ``extra`` ``{"role", "path"}`` items."""
    files: dict = {}
    folders: dict = {}

    def add(role, path):
        if path is None:
            return
        p = _resolved(path)
        if p.is_dir():
            folders.setdefault(p, f"{_role_text(role)} (an input folder)")
        else:
            files.setdefault(p, _role_text(role))

    if recipe.source_file:
        add("recipe", recipe.source_file)
    add("study_table", recipe.resolve(recipe.study.table))
    units = getattr(recipe, "units", None)
    if units is not None and getattr(units, "boundaries", None) is not None:
        add("boundaries", recipe.resolve(units.boundaries.file))
    base = _resolved(recipe.base_dir)
    for name, layer in recipe.layers.items():
        texts = [layer.file] if layer.file else []
        texts += [b.file for b in (layer.bands or {}).values()]
        for text in texts:
            folder = _template_folder(recipe, str(text))
            if folder is None:
                add(f"layer:{name}", recipe.resolve(text))
            elif _resolved(folder) != base:  # the recipe's own folder is not an input folder
                folders.setdefault(
                    _resolved(folder), f"the folder of layer {name}'s series (an input)"
                )
    for spec in recipe.covariates:
        re_spec = getattr(spec, "reallocate", None)
        if re_spec is not None:
            label = spec.name or spec.layer
            add(f"zones:{label}", recipe.resolve(re_spec.zones.file))
            add(f"totals:{label}", recipe.resolve(re_spec.totals.file))
    for item in extra or []:
        add(item["role"], item["path"])
    return _Inputs(files, folders)


# ------------------------------------------------------------------ ownership
class _Owned:
    """The files covextract wrote: fingerprints of the previous manifest and a pending commit."""

    def __init__(self, recipe, paths) -> None:
        from covextract.outputs.manifest import read_manifest

        self.inside: dict = {}
        self.outside: set = set()
        base = _resolved(recipe.base_dir)
        doc = read_manifest(paths["manifest"]) or {}
        for item in doc.get("outputs", []):
            sha, where = item.get("sha256"), str(item.get("path", ""))
            if item.get("outside_recipe_folder"):
                self.outside.add((where.split(" (sha256", 1)[0], sha))
            else:
                self.inside.setdefault(_resolved(base / where), set()).add(sha)
        journal = read_journal(paths["state"]) or {}
        for item in journal.get("owned", []):
            self.inside.setdefault(_resolved(item["path"]), set()).add(item["sha256"])
        self._hashes: dict = {}

    def __contains__(self, path) -> bool:
        p = _resolved(path)
        if p not in self.inside and not any(n == p.name for n, _ in self.outside):
            return False
        if p not in self._hashes:
            try:
                self._hashes[p] = file_sha256(p)
            except OSError:
                return False
        sha = self._hashes[p]
        return sha in self.inside.get(p, ()) or (p.name, sha) in self.outside


# ------------------------------------------------------------------ the guard
_NEVER = "covextract never writes over an input: choose another path"


def _nearest_existing(path: Path) -> Path:
    p = path
    while not os.path.lexists(p) and p.parent != p:
        p = p.parent
    return p


def _check_one(t: Target, recipe, inputs: _Inputs, owned: _Owned, overwrite: bool):
    base = recipe.base_dir
    shown = shown_path(t.path, base)
    head = f"{t.label} is {shown}"
    # a parent that is a file
    for parent in t.path.parents:
        if os.path.lexists(parent):
            if not parent.is_dir():
                return (
                    f"{head}, but {shown_path(parent, base)} is a file, not a folder: "
                    "choose another path"
                )
            break
    real = _resolved(t.path)
    via = (
        ""
        if real == Path(os.path.abspath(t.path))
        else f", which leads to {shown_path(real, base)}"
    )
    if real in inputs.files:
        return f"{head}{via}, {inputs.files[real]} (an input); {_NEVER}"
    for folder, what in inputs.folders.items():
        if real == folder or folder in real.parents:
            where = "" if real == folder else f"inside {shown_path(folder, base)}, "
            return (
                f"{head}{via}, {where}{what}; covextract never writes into an input folder: "
                "choose another path"
            )
    if t.kind == "folder":
        held = sorted(f for f in inputs.files if real in f.parents)
        if held:
            names = ", ".join(shown_path(f, base) for f in held[:3]) + (
                ", ..." if len(held) > 3 else ""
            )
            return (
                f"{head}{via}, a folder that holds inputs ({names}); covextract replaces the "
                "panel folder whole at every run: choose a folder of its own"
            )
    if t.suffixes and t.path.suffix.lower() not in t.suffixes:
        what = {".csv": "CSV", ".json": "JSON"}.get(t.suffixes[0], t.suffixes[0])
        return f"{head}; it is written as {what}: give a name ending in {t.suffixes[0]}"
    if not os.path.lexists(t.path):
        return None
    if t.kind == "file" and real.is_dir():
        return f"{head}, which is a folder; give a file name"
    if t.kind in ("folder", "state") and not real.is_dir():
        return f"{head}, which is a file; {t.label} is a folder: give a folder name"
    if overwrite or t.kind == "state":
        return None
    if t.kind == "folder":
        foreign = [
            f.name
            for f in sorted(real.iterdir())
            if not _TEMPORARY.match(f.name) and not (f.is_file() and f in owned)
        ]
        if foreign:
            names = ", ".join(foreign[:3]) + (", ..." if len(foreign) > 3 else "")
            return (
                f"{head}, a folder holding files covextract did not write ({names}); the panel "
                "folder is replaced whole at every run: choose another path, or pass "
                "--overwrite to replace it"
            )
        return None
    if t.key == "output.manifest":
        from covextract.outputs.manifest import read_manifest

        if read_manifest(real) is not None:
            return None
    if real not in owned:
        return (
            f"{head}, an existing file covextract did not write (the last run's manifest does "
            "not list it); covextract replaces only its own outputs: choose another path, or "
            "pass --overwrite to replace it"
        )
    return None


def guard_outputs(recipe, paths: dict, *, inputs=None, overwrite: bool = False) -> list:
    """Problems with the output paths, as ``(recipe key, message)``; empty when all may be written.

    Parameters
    ----------
    recipe : Recipe
    paths : dict
        The output paths by role (:func:`covextract.run.plan.output_paths`).
    inputs : list of dict, optional
        ``{"role", "path"}`` of the inputs found while planning (every
        period of a series: :func:`covextract.run.plan.input_files`).
    overwrite : bool
        Replace existing files covextract did not write (``--overwrite``).
    """
    inputs = recipe_inputs(recipe, inputs)
    owned = _Owned(recipe, paths)
    problems = []
    seen: dict = {}
    panel = None
    all_targets = targets(paths)
    for t in all_targets:
        msg = _check_one(t, recipe, inputs, owned, overwrite)
        if msg is not None:
            problems.append((t.key, msg))
            continue
        real = _resolved(t.path)
        if real in seen:
            problems.append(
                (
                    t.key,
                    f"{t.label} is {shown_path(t.path, recipe.base_dir)}, the same file as "
                    f"{seen[real].label}; give each output its own path",
                )
            )
            continue
        seen[real] = t
        if t.kind == "folder":
            panel = (t, real)
    if panel is not None:
        for t in all_targets:
            if t is not panel[0] and panel[1] in _resolved(t.path).parents:
                problems.append(
                    (
                        t.key,
                        f"{t.label} is {shown_path(t.path, recipe.base_dir)}, inside "
                        f"{panel[0].label} (the panel folder is replaced whole at every run): "
                        "choose another path",
                    )
                )
    return problems


# ------------------------------------------------------------------ room
def _size(path: Path) -> int:
    try:
        if path.is_dir():
            return sum(f.stat().st_size for f in path.iterdir() if f.is_file())
        return path.stat().st_size
    except OSError:
        return 0


def _mb(n: int) -> str:
    if n < 1_000_000:
        return f"{max(n, 1) / 1e3:.0f} kB" if n >= 1000 else f"{n} bytes"
    return f"{n / 1e6:.1f} MB"


def _probe(folder: Path):
    """Why no file can be created in ``folder`` (an OSError), or None when it can.

    Asked of the system without writing anything (so a ``check`` or a
    refresh with nothing to do changes no folder): a read-only mount
    (``statvfs``), then the effective user's permission (``access``).
    """
    try:
        if os.statvfs(folder).f_flag & os.ST_RDONLY:
            return OSError(errno.EROFS, os.strerror(errno.EROFS), str(folder))
    except (OSError, AttributeError):  # no statvfs: the permission check still runs
        pass
    try:
        allowed = os.access(
            folder, os.W_OK | os.X_OK, effective_ids=os.access in os.supports_effective_ids
        )
    except OSError as exc:
        return exc
    if not allowed:
        return OSError(errno.EACCES, os.strerror(errno.EACCES), str(folder))
    return None


def check_room(recipe, paths: dict, *, rows: int, columns: int) -> list:
    """Writability and free space of the output folders, as ``(recipe key, message)``.

    Each output's nearest existing folder must accept a new file (not on a
    read-only mount, writable by the effective user; nothing is written to
    find out). The
    free space of each file system must hold the expected size: the present
    outputs' size, or ``rows × columns × BYTES_PER_CELL`` on a first run.
    """
    base = recipe.base_dir
    problems = []
    needed: dict = {}  # device -> [bytes, folder, key]
    existing = 0
    ts = targets(paths)
    for t in ts:
        if t.kind != "state" and os.path.lexists(t.path):
            existing += _size(_resolved(t.path))
    by_folder: dict = {}
    for t in ts:
        # the panel is staged beside its folder, the state's files go inside it
        folder = _nearest_existing(t.path if t.kind == "state" else t.path.parent)
        if not folder.is_dir():
            continue  # a file where a folder should be: the guard says so
        by_folder.setdefault(folder, []).append(t)
        if t.key == "output.table":
            try:
                dev = folder.stat().st_dev
            except OSError:
                continue
            size = existing if existing else rows * columns * BYTES_PER_CELL
            needed[dev] = [size, folder, t.key]
    for folder, group in by_folder.items():
        error = _probe(folder)
        if error is None:
            continue
        state = group[0].kind == "state"
        where = "state folder (output.state)" if state else "output folder"
        reason = disk_reason(error, where)
        what, todo = reason if reason else (str(error), f"choose another {where}")
        labels = ", ".join(dict.fromkeys(t.key for t in group))
        problems.append(
            (group[0].key, f"{labels}: cannot write in {shown_path(folder, base)}: {what}; {todo}")
        )
    for size, folder, key in needed.values():
        try:
            free = shutil.disk_usage(folder).free
        except OSError:
            continue
        if free < size:
            problems.append(
                (
                    key,
                    f"not enough free space in {shown_path(folder, base)} for the outputs: they "
                    f"need about {_mb(size)}, {_mb(free)} is free; free space or choose another "
                    "output folder",
                )
            )
    return problems
