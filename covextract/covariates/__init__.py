"""Covariate kinds: one class per kind, found through one registry.

To add a kind, write a module with a :class:`~covextract.covariates.base.Covariate`
subclass and add it to :data:`KINDS`; the run, the codebook, the refresh and
the naming rule need no change.
"""

from __future__ import annotations

from covextract.covariates.base import (
    Column,
    ComputeContext,
    Covariate,
    Outcome,
    PlanContext,
)
from covextract.covariates.change import ChangeCovariate
from covextract.covariates.landcover import LandCoverCovariate
from covextract.covariates.proxies import CalibrateCovariate, ReallocateCovariate
from covextract.covariates.series import PeriodsCovariate
from covextract.covariates.trend import TrendCovariate
from covextract.covariates.window import WindowCovariate
from covextract.covariates.zonal import ZonalCovariate

__all__ = [
    "KINDS",
    "kind_for",
    "Column",
    "ComputeContext",
    "Covariate",
    "Outcome",
    "PlanContext",
]

#: Every covariate kind, in the order they are tried: the first that matches wins.
KINDS: list[type[Covariate]] = [
    ReallocateCovariate,
    CalibrateCovariate,
    ChangeCovariate,
    TrendCovariate,
    WindowCovariate,
    PeriodsCovariate,
    LandCoverCovariate,
    ZonalCovariate,
]


def kind_for(spec, layer) -> type[Covariate] | None:
    """The covariate kind of a recipe entry on its layer, or None when no kind takes it."""
    for kind in KINDS:
        if kind.matches(spec, layer):
            return kind
    return None
