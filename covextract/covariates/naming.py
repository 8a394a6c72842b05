"""The naming rule of output columns: legal, systematic, at most 32 characters, never colliding.

==================  ==============================================  ========================
covariate           unnamed columns                                 with ``name: x``
==================  ==============================================  ========================
zonal, point        ``<layer>_<stat>``                              ``x_<stat>``
land cover          ``<layer>_share_<class>``, ``_dominant``,       ``x_share_<class>``, ...
                    ``_net_<class>``, ``_<from>_to_<to>``
window              ``<layer>_<stat>[_<tag>]_<combine><N>m_lag<k>`` ``x_<stat>``
trend               ``<layer>_<stat>_trend_ols|sen|p``              ``x_<stat>_ols|sen|p``
change              ``<layer>_<stat>_change_<from>_<to>``           ``x_<stat>``
periods (panel)     ``<layer>_<stat>[_<tag>]``                      ``x_<stat>``
proxies             ``<layer>_allocated``, ``_predicted``...        ``x_allocated``, ...
QA                  ``<layer>[_<tag>][_<window>]_qa``               ``x_qa``
==================  ==============================================  ========================

``<tag>`` is the anomaly (``anom``, ``pct``, ``z``, ``spi3``); percentiles
with decimals are spelled ``q2p5``. When two covariates would share a QA
column, each takes ``<its first column>_qa`` instead.
"""

from __future__ import annotations

import re

from covextract.errors import ColumnCollisionError

__all__ = ["MAX_LENGTH", "LEGAL", "ordinal", "entry_label", "qa_stem", "assign_names"]

#: The longest column name common statistics packages accept.
MAX_LENGTH = 32
#: A legal column name: letters, digits and underscores, starting with a letter.
LEGAL = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


def ordinal(n: int) -> str:
    """``1st``, ``2nd``, ``3rd``, ``11th``, ``22nd``: how messages count recipe entries.

    A problem's key is the YAML path, counted from 0 (``covariates[2]``); the
    words after it count as people do, from 1, and say so by being ordinals
    (``the 3rd covariate``), so the two numbers in one line cannot be mixed up.
    """
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def entry_label(index: int, layer_name: str) -> str:
    """How messages name a covariate entry: ``the 3rd covariate (layer 'rain')`` for index 2."""
    return f"the {ordinal(index + 1)} covariate (layer {layer_name!r})"


def qa_stem(cov) -> str:
    """The QA column's stem of a covariate: its prefix and what tells its kind apart."""
    if cov.named:
        return cov.prefix
    parts = [cov.prefix]
    tag = getattr(cov, "tag", None)
    if tag:
        parts.append(tag)
    suffix = getattr(cov, "suffix", None)
    if suffix:
        parts.append(suffix)
    return "_".join(parts)


def assign_names(covariates, existing, problem) -> None:
    """Give each covariate its QA column and check every name.

    Problems (reported through ``problem(exc, key)``): a column that is not a
    legal identifier or longer than :data:`MAX_LENGTH`, a column the study
    table already has, two covariates writing the same column. Messages name
    entries by ordinals counted from 1 (:func:`entry_label`); the key given
    with each problem is the YAML path, counted from 0.
    """
    stems = {}
    for cov in covariates:
        stems.setdefault(qa_stem(cov), []).append(cov)
    for cov in covariates:
        shared = len(stems[qa_stem(cov)]) > 1
        has_table_columns = any(c.where == "table" for c in cov.columns)
        if not has_table_columns:
            cov.qa_column = ""
        elif shared:
            first = next(c.name for c in cov.columns if c.where == "table")
            cov.qa_column = f"{first}_qa"
        else:
            cov.qa_column = f"{qa_stem(cov)}_qa"
    owner: dict[str, object] = {}
    existing = set(map(str, existing))
    for cov in covariates:
        names = [c.name for c in cov.columns] + ([cov.qa_column] if cov.qa_column else [])
        for col in names:
            error = _name_problem(cov, col, names)
            if error is None and col in existing:
                error = ColumnCollisionError(
                    f"{cov.label()} would write column {col!r}, which the study table already "
                    f"has. Add name: to this covariate (for example name: {cov.prefix}_env) to "
                    "change its columns."
                )
            if error is None and col in owner:
                other = owner[col]
                # Name the entry the problem's key points at first, so "covariates[2]:"
                # is followed by "the 3rd covariate", never by another entry's number.
                error = ColumnCollisionError(
                    f"{cov.label()} would write column {col!r}, which the "
                    f"{ordinal(other.index + 1)} covariate already writes. Add a distinct "
                    f"name: to the {ordinal(cov.index + 1)} covariate (for example name: "
                    f"{cov.layer_name}_{cov.index + 1})."
                )
            if error is not None:
                problem(error, cov.where("name" if cov.named else ""))
                break
        for col in names:
            owner.setdefault(col, cov)


def _name_problem(cov, col: str, names) -> str | None:
    """The text of what is wrong with a column name (a plain string: the plan adds the line)."""
    if not LEGAL.match(col):
        return (
            f"{cov.label()}: column {col!r} is not a legal variable name (letters, digits and "
            "underscores, starting with a letter); rename the class, layer or name: it comes from"
        )
    if len(col) > MAX_LENGTH:
        if cov.named:
            room = MAX_LENGTH - (max(len(n) for n in names) - len(cov.prefix))
            how = f"shorten its name: to at most {room} characters"
        else:
            how = (
                "give it a short name: (named columns are <name>_<statistic>, see the naming "
                "table in the README)"
            )
        return (
            f"{cov.label()}: column {col!r} is {len(col)} characters long; statistics packages "
            f"accept at most {MAX_LENGTH}. To fix it, {how}."
        )
    return None
