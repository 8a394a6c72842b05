"""The package's folders import in one direction only (parsed with ast, so it stays true).

Each folder of ``covextract/`` has a rank; a module may import (at the top or
inside a function) only from folders of a lower rank, so there are no
cycles, the library never imports the command line, and no module reaches
into another folder's private names.
"""

import ast
from pathlib import Path

import covextract

PACKAGE = Path(covextract.__file__).parent

#: The data flow of DEVELOPERS.md, bottom up.
RANK = {
    "errors": 0,
    "core": 1,
    "crashpoints": 1,
    "demo": 1,
    "engine": 2,
    "stats": 3,
    "io": 3,
    "sources": 4,
    "units": 4,
    "derive": 5,
    "state": 5,
    "outputs": 5,
    "recipe": 5,
    "covariates": 6,
    "run": 7,
    "ops": 8,
    "api": 8,
    "cli": 9,
    "__init__": 10,
    "__main__": 10,
}


def _folder_of(path: Path) -> str:
    rel = path.relative_to(PACKAGE)
    return rel.parts[0] if len(rel.parts) > 1 else rel.stem


def _imports(path: Path):
    """``(imported module, imported names)`` of every covextract import in a file."""
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            if node.module.startswith("covextract"):
                yield node.module, [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("covextract"):
                    yield alias.name, []


def _target(module: str, names) -> list[str]:
    parts = module.split(".")
    if len(parts) > 1:
        return [parts[1]]
    # ``from covextract import x``: the top-level package itself
    return ["__init__"]


def _edges():
    for path in sorted(PACKAGE.rglob("*.py")):
        src = _folder_of(path)
        for module, names in _imports(path):
            for dst in _target(module, names):
                if dst != src:
                    yield path, src, dst, module, names


def test_every_folder_has_a_rank():
    folders = {_folder_of(p) for p in PACKAGE.rglob("*.py")}
    assert folders <= set(RANK), sorted(folders - set(RANK))


def test_imports_run_one_way():
    wrong = [
        f"{path.relative_to(PACKAGE)}: {src} imports {module} ({dst})"
        for path, src, dst, module, _ in _edges()
        if RANK[dst] >= RANK[src]
    ]
    assert wrong == []


def test_no_module_imports_another_folders_private_names():
    wrong = [
        f"{path.relative_to(PACKAGE)}: {name} from {module}"
        for path, _, _, module, names in _edges()
        for name in names
        if name.startswith("_") and not name.startswith("__")
    ]
    wrong += [
        f"{path.relative_to(PACKAGE)}: {module}"
        for path, _, _, module, _ in _edges()
        if any(part.startswith("_") and not part.startswith("__") for part in module.split("."))
    ]
    assert wrong == []


def test_nothing_below_the_command_line_imports_it():
    assert [
        str(path.relative_to(PACKAGE))
        for path, src, dst, _, _ in _edges()
        if dst == "cli" and src != "__main__"
    ] == []
