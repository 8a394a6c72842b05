"""Study records to unit geometries: boundary join, geodesic buffers, points."""

from covextract.units.buffers import MAX_RADIUS_M, geodesic_buffers
from covextract.units.build import AT_POINT_METHODS, QA_CODES, UnitSet, build_units

__all__ = [
    "AT_POINT_METHODS",
    "MAX_RADIUS_M",
    "QA_CODES",
    "UnitSet",
    "build_units",
    "geodesic_buffers",
]
