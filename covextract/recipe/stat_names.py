"""The statistic names a recipe may ask for: the recipe's one door to the statistics.

Every use of :mod:`covextract.stats.names` and of the categorical names of
:mod:`covextract.stats.names` (``CATEGORICAL_STATS``) by the recipe package goes through this
module, so moving them to another source of statistic names touches this
file only.
"""

from __future__ import annotations

import re
from typing import Any

from covextract.recipe.common import hint
from covextract.stats.names import POINT_STATS, THRESHOLD_STATS, known_stat_names, parse_stat

__all__ = [
    "CHANGE_STATS",
    "THRESHOLD_STATS",
    "PROXY_STATS",
    "categorical_stats",
    "stat_problem",
]

#: Categorical statistics that compare with an earlier layer (``since:``).
CHANGE_STATS = ("transition", "net_change")
#: Statistics of population proxies, by the covariate key that asks for them.
PROXY_STATS = {"reallocate": ("allocated",), "calibrate": ("predicted",)}


def categorical_stats() -> tuple[str, ...]:
    """Statistics of categorical layers (``share`` gives one column per class or group)."""
    # Imported when first needed: the categorical statistics bring numpy, which
    # reading a recipe does not need otherwise (``covextract check`` starts faster).
    from covextract.stats.names import CATEGORICAL_STATS as CATEGORICAL_STAT_NAMES

    return tuple(CATEGORICAL_STAT_NAMES)


def __getattr__(name: str) -> Any:
    # ``CATEGORICAL_STATS`` stays a module attribute, computed on first use.
    if name == "CATEGORICAL_STATS":
        return categorical_stats()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def stat_problem(stat: str, kind: str, point: bool) -> str | None:
    """Why ``stat`` cannot be asked of a layer of ``kind``, or None.

    Parameters
    ----------
    stat : str
        The statistic name as written in the recipe.
    kind : {"continuous", "categorical"}
        The layer's kind.
    point : bool
        Whether the units are points (``units.at_point``, no buffer on the
        covariate).

    Returns
    -------
    str or None
        A final message naming the valid choices and, where one is close,
        the name the user probably meant; None when the name is valid.
    """
    if kind == "categorical" and not point:
        names = categorical_stats()
        if stat in names:
            return None
        message = f"unknown statistic {stat!r} for a categorical layer; valid: " + ", ".join(names)
        candidates: list[str] = list(names)
        try:
            parse_stat(stat)
            message += f"; {stat} is a statistic of continuous layers"
        except ValueError:
            pass
    else:
        try:
            parse_stat(stat, point=point)
            return None
        except ValueError as exc:
            message = str(exc)
        candidates = []
        for candidate in known_stat_names():
            try:
                parse_stat(candidate, point=point)
                candidates.append(candidate)
            except ValueError:
                pass
        if not point and stat in POINT_STATS:
            message += f"; {stat} is the value under each point and needs units.at_point"
    # A percentile name is close to every other percentile: no hint for it.
    if not re.match(r"^q\d", stat):
        message += hint(stat, candidates)
    return message
