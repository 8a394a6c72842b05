"""Names of the statistics a recipe may ask for, and how they are parsed.

Continuous layers: ``count``, ``valid_share``, ``sum``, ``density_total``,
``area_km2``, ``mean``, ``std``, ``min``, ``max``, ``median``, ``qNN``
(any percentile 0–100, e.g. ``q10``, ``q90``, ``q2.5``), ``area_above`` and
``share_above`` (these two need ``threshold:``). Point units (``at_point``)
take ``value``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

__all__ = [
    "CONTINUOUS_STATS",
    "POINT_STATS",
    "THRESHOLD_STATS",
    "StatName",
    "parse_stat",
    "known_stat_names",
]

#: Statistics of continuous layers, in the order they are documented.
CONTINUOUS_STATS = (
    "count",
    "valid_share",
    "sum",
    "density_total",
    "area_km2",
    "mean",
    "std",
    "min",
    "max",
    "median",
    "area_above",
    "share_above",
)
#: Statistics that need ``threshold:`` on the covariate.
THRESHOLD_STATS = ("area_above", "share_above")
#: Statistics of point units (value under the point).
POINT_STATS = ("value", "valid_share")

_PERCENTILE = re.compile(r"^q(\d{1,3}(?:\.\d+)?)$")


@dataclass(frozen=True)
class StatName:
    """A parsed statistic name.

    ``kind`` is the base statistic (``"percentile"`` for ``qNN``), ``q`` the
    percentile in [0, 100] for percentiles and the median (50).
    """

    name: str
    kind: str
    q: float | None = None

    @property
    def needs_distribution(self) -> bool:
        """True when the statistic needs every (value, weight) pair of a unit."""
        return self.kind in ("median", "percentile")


def parse_stat(name: str, *, point: bool = False) -> StatName:
    """Parse a statistic name; raise ``ValueError`` with the valid choices.

    Examples
    --------
    >>> parse_stat("q90")
    StatName(name='q90', kind='percentile', q=90.0)
    >>> parse_stat("median").q
    50.0
    """
    if not isinstance(name, str):
        raise ValueError(f"a statistic name must be text, got {name!r}")
    if point:
        if name in POINT_STATS:
            return StatName(name, name)
        raise ValueError(
            f"unknown statistic {name!r} for point units; point units give "
            f"one value per record: use one of {', '.join(POINT_STATS)}"
        )
    if name in CONTINUOUS_STATS:
        return StatName(name, name, 50.0 if name == "median" else None)
    m = _PERCENTILE.match(name)
    if m:
        q = float(m.group(1))
        if 0.0 <= q <= 100.0:
            return StatName(name, "percentile", q)
        raise ValueError(f"percentile {name!r} is out of range: use q0 to q100")
    raise ValueError(
        f"unknown statistic {name!r}; valid: {', '.join(CONTINUOUS_STATS)}, "
        "or qNN for a percentile (q10, q90)"
    )


def known_stat_names() -> list[str]:
    """Every fixed statistic name (for "did you mean" hints)."""
    return list(CONTINUOUS_STATS) + ["value", "q10", "q25", "q75", "q90"]
