"""Units of a place-based trial: street segments or parcels, validated and in metres.

:class:`UnitSet` reads a segment or parcel layer (GeoPackage, GeoJSON,
Shapefile) or takes a GeoDataFrame, checks ids and geometry, brings the layer
to a projected CRS (see ``geoexp.units._crs`` for the policy) and keys every
unit by the user's id. Its eligibility methods (:meth:`UnitSet.select`,
:meth:`UnitSet.top`, :meth:`UnitSet.exclude`, :meth:`UnitSet.subset`) return
new UnitSets whose ``notes`` record each step in plain words. Attribute rules
are written in a small language of their own (:func:`parse_rule`), so a rule
can compare columns but never run code.
"""

from geoexp.units._crs import (
    Planar,
    describe_crs,
    is_planar,
    parse_crs,
    planar_crs,
    require_geographic_reference,
)
from geoexp.units._read import database_source, read_layer
from geoexp.units._rules import Rule, parse_rule
from geoexp.units._unitset import ROW_ID, UnitSet, numbered

__all__ = [
    "ROW_ID",
    "Planar",
    "Rule",
    "UnitSet",
    "database_source",
    "describe_crs",
    "is_planar",
    "numbered",
    "parse_crs",
    "parse_rule",
    "planar_crs",
    "read_layer",
    "require_geographic_reference",
]
