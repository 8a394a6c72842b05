"""Statistic names as a recipe spells them, parsed into registered statistics.

Continuous layers take the statistics of the ``continuous`` family of
:mod:`covextract.stats.registry` (``count``, ``valid_share``, ``sum``,
``density_total``, ``area_km2``, ``mean``, ``std``, ``cv``, ``min``, ``max``,
``median``, ``qNN`` for any percentile 0-100, ``area_above``,
``share_above``); point units (``at_point``) take ``value`` and
``valid_share``. A percentile with decimals may be written ``q2.5`` or
``q2p5``; its column part is always ``q2p5`` (a legal identifier).
"""

from __future__ import annotations

from covextract.stats import registry
from covextract.stats.registry import Statistic

__all__ = [
    "CONTINUOUS_STATS",
    "POINT_STATS",
    "THRESHOLD_STATS",
    "CATEGORICAL_STATS",
    "parse_stat",
    "known_stat_names",
]

#: Statistics of continuous layers, in the order they are documented.
CONTINUOUS_STATS = tuple(s.name for s in registry.family("continuous") if s.kind != "percentile")
#: Statistics that need ``threshold:`` on the covariate.
THRESHOLD_STATS = tuple(s.name for s in registry.family("continuous") if s.needs_threshold)
#: Statistics of point units (value under the point).
POINT_STATS = tuple(s.name for s in registry.family("point"))
#: Statistics of categorical layers.
CATEGORICAL_STATS = tuple(s.name for s in registry.family("categorical"))


def parse_stat(name: str, *, point: bool = False) -> Statistic:
    """The registered statistic a recipe name means; ``ValueError`` lists the valid choices.

    Examples
    --------
    >>> parse_stat("q90").q
    90.0
    >>> parse_stat("q2.5").column
    'q2p5'
    """
    if not isinstance(name, str):
        raise ValueError(f"a statistic name must be text, got {name!r}")
    if point:
        try:
            return registry.get(name, "point")
        except KeyError:
            raise ValueError(
                f"unknown statistic {name!r} for point units; point units give "
                f"one value per record: use one of {', '.join(POINT_STATS)}"
            ) from None
    try:
        return registry.get(name, "continuous")
    except KeyError as exc:
        if exc.args and str(exc.args[0]).startswith("percentile"):
            raise ValueError(exc.args[0]) from None
    raise ValueError(
        f"unknown statistic {name!r}; valid: {', '.join(CONTINUOUS_STATS)}, "
        "or qNN for a percentile (q10, q90, q2.5)"
    )


def known_stat_names() -> list[str]:
    """Every fixed statistic name (for "did you mean" hints)."""
    return list(CONTINUOUS_STATS) + list(POINT_STATS[:1]) + ["q10", "q25", "q75", "q90"]
