"""Mutated recipes through ``check``: only covextract's own errors may come out.

Each example starts from the demo recipe and applies a few mutations at
keys drawn from the recipe as it stands: a value replaced by one of another
type (nothing, yes/no, whole numbers, huge numbers, NaN, infinity, text,
lists, mappings, empty containers), a key deleted, an unknown key added, a
list item duplicated. The recipe is written as YAML and given to
:func:`covextract.run.check_recipe`, which must return problems or raise a
:class:`~covextract.errors.CovextractError`; any other exception fails.

The default run is bounded (about 30 s, derandomized so a failure repeats).
``test_fuzz_recipes_long`` is marked ``slow`` and deselected by default; run
it with ``pytest -m slow tests/reliability/test_fuzz_recipes.py``
(``COVEXTRACT_FUZZ_EXAMPLES`` sets its number of examples, default 3000).
"""

from __future__ import annotations

import copy
import os
import warnings
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from covextract.demo import demo_data_folder, lay_out_demo
from covextract.errors import CovextractError
from covextract.run import check_recipe

DEMO = yaml.safe_load((demo_data_folder() / "recipe.yaml").read_text(encoding="utf-8"))

#: Values of every YAML type, including the awkward ones.
SCALARS = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**6), max_value=10**6),
    st.sampled_from([0, -1, 1, 2**63, -(2**63), 10**40, 255, 65536]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from(
        [
            "",
            " ",
            "mean",
            "cropland",
            "11: cropland",
            "1e9",
            "yes",
            "EPSG:4326",
            "no_such.tif",
            "../x.csv",
            "/",
            "{year}",
            "ndvi",
            "cover_2015",
            "a" * 300,
            "ü",
        ]
    ),
    st.text(max_size=12),
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4),
        st.dictionaries(st.one_of(st.text(max_size=8), st.integers(-5, 100)), inner, max_size=4),
    ),
    max_leaves=8,
)
UNKNOWN_KEYS = st.sampled_from(["statz", "extra", "classes", "groups", "since", "pairs", "x"])


def _paths(node, prefix=()):
    """Every key path of the data (keys of mappings, indices of lists)."""
    out = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            out += _paths(value, prefix + (key,))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            out += _paths(value, prefix + (i,))
    return out


def _parent(data, path):
    node = data
    for part in path[:-1]:
        node = node[part]
    return node


@st.composite
def mutated_recipes(draw):
    data = copy.deepcopy(DEMO)
    for _ in range(draw(st.integers(1, 3))):
        paths = _paths(data)[1:]  # never the whole recipe: that case is plain
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent = _parent(data, path)
        key = path[-1]
        action = draw(st.sampled_from(["replace", "replace", "replace", "delete", "add", "dup"]))
        if action == "replace":
            parent[key] = draw(VALUES)
        elif action == "delete":
            del parent[key]
        elif action == "add":
            target = parent[key]
            if isinstance(target, dict):
                target[draw(UNKNOWN_KEYS)] = draw(VALUES)
            elif isinstance(target, list):
                target.append(draw(VALUES))
            else:
                parent[key] = {draw(UNKNOWN_KEYS): target}
        else:
            target = parent[key]
            if isinstance(target, list) and target:
                target.append(copy.deepcopy(target[draw(st.integers(0, len(target) - 1))]))
            elif isinstance(parent, list):
                parent.append(copy.deepcopy(target))
    return data


_FOLDER: dict[str, Path] = {}


def _demo_folder(tmp_path_factory) -> Path:
    # One copy of the demo for all examples: check never writes (the
    # reliability catalogue asserts that), and each example writes its own
    # recipe file over the last.
    if "demo" not in _FOLDER:
        _FOLDER["demo"] = lay_out_demo(tmp_path_factory.mktemp("fuzz") / "demo")
    return _FOLDER["demo"]


def _check(folder: Path, data) -> None:
    recipe = folder / "fuzzed.yaml"
    recipe.write_text(yaml.safe_dump(data, sort_keys=False, allow_unicode=True), encoding="utf-8")
    with warnings.catch_warnings():
        # A mutated recipe may rightly warn (codes outside the class table);
        # only exceptions are under test here.
        warnings.simplefilter("ignore")
        try:
            problems = check_recipe(recipe)
        except CovextractError:
            return
    assert isinstance(problems, list)
    for p in problems:
        assert str(p)  # every problem renders to a message


@settings(
    max_examples=400,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(data=mutated_recipes())
def test_fuzzed_recipes_raise_only_covextract_errors(tmp_path_factory, data):
    _check(_demo_folder(tmp_path_factory), data)


@pytest.mark.slow
@settings(
    max_examples=int(os.environ.get("COVEXTRACT_FUZZ_EXAMPLES", "3000")),
    deadline=None,
    derandomize=False,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(data=mutated_recipes())
def test_fuzz_recipes_long(tmp_path_factory, data):
    _check(_demo_folder(tmp_path_factory), data)
