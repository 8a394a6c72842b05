"""Recipe keys that were renamed, so ``check`` can say so instead of "unknown key".

When a later covextract renames a key, an old recipe still holds the old
name. The loader looks every unknown key up here before it guesses a
did-you-mean: a hit gives "key 'old' was renamed to 'new'; rename it in
your recipe", at the key's file and line.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = ["RENAMED_KEYS", "renamed_to"]

#: Renamed keys, by the recipe model that holds them: ``{model name: {old key:
#: new key}}``, e.g. ``{"Covariate": {"pixel_rule": "pixels"}}``. Keyed by model,
#: not by path, so a block used in two places (``Boundaries`` under ``units``
#: and under ``reallocate.zones``) needs one entry.
#: Empty on purpose: no key has been renamed in recipe version 1.
RENAMED_KEYS: dict[str, dict[str, str]] = {}


def renamed_to(models: Iterable[str], key: str, allowed: Iterable[str]) -> str | None:
    """The new name of ``key`` in a block read by one of ``models``, or None.

    Parameters
    ----------
    models : iterable of str
        Names of the recipe models that may read the block holding ``key``.
    key : str
        The key as written in the recipe.
    allowed : iterable of str
        The keys the block accepts today; a new name outside them is
        ignored, so a stale entry never sends a user to a key that no
        longer exists either.
    """
    allowed = set(allowed)
    for model in models:
        new = RENAMED_KEYS.get(model, {}).get(key)
        if new is not None and new in allowed:
            return new
    return None
