"""Spherical geometry for ADQL 2.1 §4.2, as plain Python functions SQLite can call.

Why its own module: SQLite knows nothing of the sky, so POINT, CIRCLE, BOX, POLYGON, CONTAINS,
INTERSECTS, DISTANCE, COORD1/2, AREA and CENTROID are registered on each connection as
user-defined functions.  Everything is in degrees on the unit sphere; positions become unit
vectors, so the poles and RA = 0/360 need no special cases.

A geometry value travels through SQL as text (``"circle 10.0 -30.0 0.5"``); :func:`dali_values`
turns it into the DALI 1.1 double array (``point``, ``circle``, ``polygon``) a result column
carries.  Polygons are simple polygons with great-circle edges that fit in an open hemisphere;
their inside is the smaller of the two regions whatever the vertex order.  BOX follows STC 1.30
(which ADQL 2.0 defers to): the centre's two coordinate-axis arms, half the width and height
long, end on the midpoints of four great-circle sides, so a BOX is a four-vertex POLYGON.
"""

from __future__ import annotations

import math
import sqlite3
from dataclasses import dataclass
from functools import lru_cache

Vec = tuple[float, float, float]

RAD = math.pi / 180.0
DEG = 180.0 / math.pi
SQDEG_PER_SR = DEG * DEG


class GeometryError(ValueError):
    """A geometry argument is out of range or a combination is not supported."""


# --- vectors ------------------------------------------------------------------------------------


def unit(ra: float, dec: float) -> Vec:
    a, d = ra * RAD, dec * RAD
    cd = math.cos(d)
    return (cd * math.cos(a), cd * math.sin(a), math.sin(d))


def radec(v: Vec) -> tuple[float, float]:
    x, y, z = v
    ra = math.atan2(y, x) * DEG % 360.0
    dec = math.atan2(z, math.hypot(x, y)) * DEG
    return (0.0 if ra == 360.0 else ra), dec


def _dot(a: Vec, b: Vec) -> float:
    return a[0] * b[0] + a[1] * b[1] + a[2] * b[2]


def _cross(a: Vec, b: Vec) -> Vec:
    return (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])


def _norm(a: Vec) -> float:
    return math.sqrt(_dot(a, a))


def _normalize(a: Vec) -> Vec:
    n = _norm(a)
    return (a[0] / n, a[1] / n, a[2] / n)


def _neg(a: Vec) -> Vec:
    return (-a[0], -a[1], -a[2])


def angle(a: Vec, b: Vec) -> float:
    """Angle between unit vectors in degrees; atan2 form, accurate at every scale."""
    return math.atan2(_norm(_cross(a, b)), _dot(a, b)) * DEG


def separation(ra1: float, dec1: float, ra2: float, dec2: float) -> float:
    """Great-circle distance in degrees (Vincenty's formula, as astropy uses)."""
    l1, b1, l2, b2 = ra1 * RAD, dec1 * RAD, ra2 * RAD, dec2 * RAD
    sdl, cdl = math.sin(l2 - l1), math.cos(l2 - l1)
    sb1, cb1, sb2, cb2 = math.sin(b1), math.cos(b1), math.sin(b2), math.cos(b2)
    num1 = cb2 * sdl
    num2 = cb1 * sb2 - sb1 * cb2 * cdl
    return math.atan2(math.hypot(num1, num2), sb1 * sb2 + cb1 * cb2 * cdl) * DEG


# --- shapes -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Point:
    ra: float
    dec: float

    @property
    def vec(self) -> Vec:
        return unit(self.ra, self.dec)

    def text(self) -> str:
        return f"point {self.ra!r} {self.dec!r}"

    def values(self) -> tuple[float, ...]:
        return (self.ra, self.dec)


@dataclass(frozen=True)
class Circle:
    ra: float
    dec: float
    radius: float

    @property
    def vec(self) -> Vec:
        return unit(self.ra, self.dec)

    def text(self) -> str:
        return f"circle {self.ra!r} {self.dec!r} {self.radius!r}"

    def values(self) -> tuple[float, ...]:
        return (self.ra, self.dec, self.radius)

    def contains_vec(self, v: Vec) -> bool:
        return angle(self.vec, v) <= self.radius


class Polygon:
    """A simple spherical polygon with great-circle edges, stored counter-clockwise."""

    def __init__(self, coords: list[tuple[float, float]]):
        if len(coords) < 3:
            raise GeometryError("POLYGON needs at least three vertices")
        vecs = [unit(ra, dec) for ra, dec in coords]
        area_vec = (0.0, 0.0, 0.0)
        for i, v in enumerate(vecs):
            c = _cross(v, vecs[(i + 1) % len(vecs)])
            area_vec = (area_vec[0] + c[0], area_vec[1] + c[1], area_vec[2] + c[2])
        if _norm(area_vec) < 1e-15:
            raise GeometryError("POLYGON has no area (its vertices are collinear or repeat)")
        centre = _normalize(area_vec)
        sides = [_dot(v, centre) for v in vecs]
        if all(s < 0 for s in sides):
            # clockwise: the vector area points away from the small region; turn it round
            coords, vecs, centre = coords[::-1], vecs[::-1], _neg(centre)
            sides = [-s for s in sides]
        if not all(s > 1e-12 for s in sides):
            raise GeometryError("POLYGON must fit in a hemisphere and not cross itself "
                                "(only such polygons are supported)")
        self.coords = [(float(ra), float(dec)) for ra, dec in coords]
        self.vecs = vecs
        self.centre = centre
        self.edges = [(vecs[i], vecs[(i + 1) % len(vecs)]) for i in range(len(vecs))]
        # gnomonic projection about the centre: great circles become straight lines, so the
        # planar even-odd rule decides containment exactly
        self._east, self._north = _tangent_axes(centre)
        self._flat = [self._project(v) for v in vecs]
        # a cap around the centre that holds the whole polygon (arcs stay in a cap <= 90 deg)
        self.cap_radius = max(angle(centre, v) for v in vecs)

    def _project(self, v: Vec) -> tuple[float, float]:
        w = _dot(v, self.centre)
        return _dot(v, self._east) / w, _dot(v, self._north) / w

    def text(self) -> str:
        return "polygon " + " ".join(f"{ra!r} {dec!r}" for ra, dec in self.coords)

    def values(self) -> tuple[float, ...]:
        return tuple(x for pair in self.coords for x in pair)

    def contains_vec(self, p: Vec) -> bool:
        if _dot(p, self.centre) <= 0.0:
            return False
        x, y = self._project(p)
        inside = False
        flat = self._flat
        j = len(flat) - 1
        for i in range(len(flat)):
            xi, yi = flat[i]
            xj, yj = flat[j]
            if (yi > y) != (yj > y) and x < (xj - xi) * (y - yi) / (yj - yi) + xi:
                inside = not inside
            j = i
        return inside

    def area_sr(self) -> float:
        """Area in steradians: sum of signed triangles fanned from the first vertex."""
        total = 0.0
        a = self.vecs[0]
        for b, c in zip(self.vecs[1:-1], self.vecs[2:]):
            num = _dot(a, _cross(b, c))
            den = 1.0 + _dot(a, b) + _dot(b, c) + _dot(c, a)
            total += 2.0 * math.atan2(num, den)
        return abs(total)


def _tangent_axes(c: Vec) -> tuple[Vec, Vec]:
    """Two unit vectors spanning the tangent plane at c (east and north where defined)."""
    east = _cross((0.0, 0.0, 1.0), c)
    if _norm(east) < 1e-12:  # at a pole any axis will do
        east = (0.0, 1.0, 0.0) if c[2] > 0 else (0.0, -1.0, 0.0)
    east = _normalize(east)
    return east, _cross(c, east)


Shape = Point | Circle | Polygon


def box_polygon(ra: float, dec: float, width: float, height: float) -> Polygon:
    """STC 1.30 box: arms along the coordinate axes at the centre end on great-circle sides."""
    if not (0 < width < 180 and 0 < height < 180):
        raise GeometryError("BOX width and height must be between 0 and 180 degrees")
    c = unit(ra, dec)
    east, north = _tangent_axes(c)
    hw, hh = width / 2 * RAD, height / 2 * RAD

    def along(axis: Vec, a: float) -> Vec:
        return tuple(c[k] * math.cos(a) + axis[k] * math.sin(a) for k in range(3))  # type: ignore

    # each side is the great circle through an arm's end, perpendicular to that arm;
    # its pole is the arm's end crossed with the other axis
    poles = [_cross(along(east, hw), north), _cross(north, along(east, -hw)),
             _cross(along(north, hh), east), _cross(east, along(north, -hh))]
    e_pole, w_pole, n_pole, s_pole = (_normalize(p) for p in poles)

    def corner(p1: Vec, p2: Vec) -> Vec:
        v = _normalize(_cross(p1, p2))
        return v if _dot(v, c) > 0 else _neg(v)

    corners = [corner(e_pole, n_pole), corner(n_pole, w_pole),
               corner(w_pole, s_pole), corner(s_pole, e_pole)]
    return Polygon([radec(v) for v in corners])


# --- reading geometry values ------------------------------------------------------------------


@lru_cache(maxsize=256)
def parse(text: str) -> Shape:
    """Turn the text form back into a shape (cached: constant shapes are parsed once)."""
    kind, *nums = text.split()
    values = [float(x) for x in nums]
    if kind == "point":
        return Point(*values)
    if kind == "circle":
        return Circle(*values)
    if kind == "polygon":
        return Polygon(list(zip(values[::2], values[1::2])))
    raise GeometryError(f"not a geometry value: {text[:40]!r}")


def _shape(value: object, what: str) -> Shape:
    if not isinstance(value, str) or not value.startswith(("point ", "circle ", "polygon ")):
        raise GeometryError(f"{what} needs a geometry (POINT, CIRCLE, BOX or POLYGON), got {value!r}")
    return parse(value)


def is_geometry_text(value: object) -> bool:
    return isinstance(value, str) and value.startswith(("point ", "circle ", "polygon "))


def dali_values(text: str) -> tuple[float, ...]:
    """DALI 1.1 double-array form of a geometry value."""
    return parse(text).values()


def dali_xtype(text: str) -> str:
    return text.split(" ", 1)[0]


# --- constructors (ADQL 2.1 §4.2.x) -------------------------------------------------------------


def _strip_coordsys(args: tuple) -> list:
    """The coordinate-system argument is optional in ADQL 2.1 and ignored here (ICRS assumed)."""
    args = list(args)
    if args and isinstance(args[0], str) and not is_geometry_text(args[0]):
        args.pop(0)
    return args


def _number(value: object, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise GeometryError(f"{what} must be a number, got {value!r}")
    if not math.isfinite(value):
        raise GeometryError(f"{what} must be finite, got {value!r}")
    return float(value)


def _check_dec(dec: float) -> float:
    if not -90.0 <= dec <= 90.0:
        raise GeometryError(f"latitude {dec} is outside [-90, 90] degrees")
    return dec


def _position(args: list, what: str) -> tuple[tuple[float, float], list]:
    """Leading (ra, dec) pair or POINT of a constructor's arguments, and the rest."""
    if args and is_geometry_text(args[0]):
        p = parse(args[0])
        if not isinstance(p, Point):
            raise GeometryError(f"{what} centre must be a POINT")
        return (p.ra, p.dec), args[1:]
    if len(args) < 2:
        raise GeometryError(f"{what} needs a centre position")
    ra = _number(args[0], f"{what} longitude") % 360.0
    return (ra, _check_dec(_number(args[1], f"{what} latitude"))), args[2:]


def _nulls(args: tuple) -> bool:
    return any(a is None for a in args)


def make_point(*args):
    if _nulls(args):
        return None
    rest = _strip_coordsys(args)
    if len(rest) != 2:
        raise GeometryError("POINT takes (longitude, latitude), optionally after a coordinate system")
    (ra, dec), _ = _position(rest, "POINT")
    return Point(ra, dec).text()


def make_circle(*args):
    if _nulls(args):
        return None
    (ra, dec), rest = _position(_strip_coordsys(args), "CIRCLE")
    if len(rest) != 1:
        raise GeometryError("CIRCLE takes a centre and a radius")
    r = _number(rest[0], "CIRCLE radius")
    if not 0.0 <= r <= 180.0:
        raise GeometryError(f"CIRCLE radius {r} is outside [0, 180] degrees")
    return Circle(ra, dec, r).text()


def make_box(*args):
    if _nulls(args):
        return None
    (ra, dec), rest = _position(_strip_coordsys(args), "BOX")
    if len(rest) != 2:
        raise GeometryError("BOX takes a centre, a width and a height")
    return box_polygon(ra, dec, _number(rest[0], "BOX width"), _number(rest[1], "BOX height")).text()


def make_polygon(*args):
    if _nulls(args):
        return None
    rest = _strip_coordsys(args)
    coords: list[tuple[float, float]] = []
    if rest and all(is_geometry_text(a) for a in rest):
        for a in rest:
            p = parse(a)
            if not isinstance(p, Point):
                raise GeometryError("POLYGON vertices must be POINTs")
            coords.append((p.ra, p.dec))
    else:
        if len(rest) % 2:
            raise GeometryError("POLYGON takes pairs of (longitude, latitude)")
        for i in range(0, len(rest), 2):
            coords.append((_number(rest[i], "POLYGON longitude") % 360.0,
                           _check_dec(_number(rest[i + 1], "POLYGON latitude"))))
    return Polygon(coords).text()


# --- predicates ---------------------------------------------------------------------------------


def _arc_crosses(a1: Vec, a2: Vec, b1: Vec, b2: Vec) -> bool:
    """Do the great-circle arcs a1-a2 and b1-b2 (each shorter than 180 deg) intersect?"""
    n1, n2 = _cross(a1, a2), _cross(b1, b2)
    t = _cross(n1, n2)
    if _norm(t) < 1e-15:
        return False  # on one great circle: overlap is handled by the vertex tests
    t = _normalize(t)
    for x in (t, _neg(t)):
        if (_dot(_cross(a1, x), n1) >= 0 and _dot(_cross(x, a2), n1) >= 0
                and _dot(_cross(b1, x), n2) >= 0 and _dot(_cross(x, b2), n2) >= 0):
            return True
    return False


def _arc_distance(p: Vec, a: Vec, b: Vec) -> float:
    """Smallest angle in degrees from p to the great-circle arc a-b."""
    n = _normalize(_cross(a, b))
    off = _dot(p, n)
    q = (p[0] - off * n[0], p[1] - off * n[1], p[2] - off * n[2])
    if _norm(q) > 1e-15:
        q = _normalize(q)
        if _dot(_cross(a, q), n) >= 0 and _dot(_cross(q, b), n) >= 0:
            return angle(p, q)
    return min(angle(p, a), angle(p, b))


def _polygons_cross(a: Polygon, b: Polygon) -> bool:
    return any(_arc_crosses(e1[0], e1[1], e2[0], e2[1]) for e1 in a.edges for e2 in b.edges)


def contains_shapes(inner: Shape, outer: Shape) -> bool:
    """CONTAINS(inner, outer): is inner wholly within outer (ADQL 2.1 §4.2.7)."""
    if isinstance(inner, Point):
        if isinstance(outer, Point):
            return angle(inner.vec, outer.vec) == 0.0
        return outer.contains_vec(inner.vec)
    if isinstance(outer, Point):
        return False
    if isinstance(inner, Circle):
        if isinstance(outer, Circle):
            return angle(inner.vec, outer.vec) + inner.radius <= outer.radius
        return (outer.contains_vec(inner.vec)
                and all(_arc_distance(inner.vec, e[0], e[1]) >= inner.radius for e in outer.edges))
    # inner is a polygon
    if isinstance(outer, Circle):
        if outer.radius > 90.0:
            raise GeometryError("CONTAINS(POLYGON, CIRCLE) is supported for radii up to 90 degrees")
        return all(outer.contains_vec(v) for v in inner.vecs)
    return all(outer.contains_vec(v) for v in inner.vecs) and not _polygons_cross(inner, outer)


def intersects_shapes(a: Shape, b: Shape) -> bool:
    """INTERSECTS(a, b): do the regions share any point (ADQL 2.1 §4.2.10)."""
    if isinstance(a, Point):
        return contains_shapes(a, b)
    if isinstance(b, Point):
        return contains_shapes(b, a)
    if isinstance(a, Circle) and isinstance(b, Circle):
        return angle(a.vec, b.vec) <= a.radius + b.radius
    if isinstance(a, Polygon) and isinstance(b, Circle):
        a, b = b, a
    if isinstance(a, Circle):  # and b is a polygon
        return (b.contains_vec(a.vec)
                or any(_arc_distance(a.vec, e[0], e[1]) <= a.radius for e in b.edges))
    return (any(b.contains_vec(v) for v in a.vecs) or any(a.contains_vec(v) for v in b.vecs)
            or _polygons_cross(a, b))


# --- SQL functions ------------------------------------------------------------------------------


def sql_contains(a, b):
    if a is None or b is None:
        return None
    return int(contains_shapes(_shape(a, "CONTAINS"), _shape(b, "CONTAINS")))


def sql_intersects(a, b):
    if a is None or b is None:
        return None
    return int(intersects_shapes(_shape(a, "INTERSECTS"), _shape(b, "INTERSECTS")))


def sql_point_in(ra, dec, region):
    """CONTAINS(POINT(ra, dec), region) without building the point's text for every row."""
    if ra is None or dec is None or region is None:
        return None
    shape = _shape(region, "CONTAINS")
    if isinstance(shape, Circle):
        return int(separation(ra, dec, shape.ra, shape.dec) <= shape.radius)
    return int(contains_shapes(Point(float(ra) % 360.0, float(dec)), shape))


def _check_circle_numbers(dec, cdec, radius) -> None:
    if not (-90.0 <= dec <= 90.0 and -90.0 <= cdec <= 90.0):
        raise GeometryError(f"latitude {dec if not -90.0 <= dec <= 90.0 else cdec} is outside "
                            "[-90, 90] degrees")
    if not 0.0 <= radius <= 180.0:
        raise GeometryError(f"CIRCLE radius {radius} is outside [0, 180] degrees")


def sql_in_cone(ra, dec, cra, cdec, radius):
    """CONTAINS(POINT(ra, dec), CIRCLE(cra, cdec, radius)) with plain numbers (the cone search)."""
    if ra is None or dec is None or cra is None or cdec is None or radius is None:
        return None
    _check_circle_numbers(dec, cdec, radius)
    return int(separation(ra, dec, cra, cdec) <= radius)


def sql_circles(relation: str):
    """INTERSECTS or CONTAINS of two CIRCLEs given as numbers (no text built for every row)."""
    def test(ra1, dec1, r1, ra2, dec2, r2):
        if None in (ra1, dec1, r1, ra2, dec2, r2):
            return None
        _check_circle_numbers(dec1, dec2, r1)
        _check_circle_numbers(dec1, dec2, r2)
        d = separation(ra1, dec1, ra2, dec2)
        return int(d <= r1 + r2) if relation == "intersects" else int(d + r1 <= r2)
    return test


def sql_distance(*args):
    if _nulls(args):
        return None
    if len(args) == 4:
        nums = [_number(a, "DISTANCE argument") for a in args]
        return separation(*nums)
    if len(args) != 2:
        raise GeometryError("DISTANCE takes two POINTs or four numbers (ra1, dec1, ra2, dec2)")
    p1, p2 = _shape(args[0], "DISTANCE"), _shape(args[1], "DISTANCE")
    if not (isinstance(p1, Point) and isinstance(p2, Point)):
        raise GeometryError("DISTANCE is defined between two POINTs")
    return separation(p1.ra, p1.dec, p2.ra, p2.dec)


def sql_coord(index: int):
    def coord(value):
        if value is None:
            return None
        p = _shape(value, f"COORD{index}")
        if not isinstance(p, Point):
            raise GeometryError(f"COORD{index} needs a POINT")
        return p.ra if index == 1 else p.dec
    return coord


def sql_area(value):
    if value is None:
        return None
    s = _shape(value, "AREA")
    if isinstance(s, Point):
        return 0.0
    if isinstance(s, Circle):
        return 2.0 * math.pi * (1.0 - math.cos(s.radius * RAD)) * SQDEG_PER_SR
    return s.area_sr() * SQDEG_PER_SR


def sql_centroid(value):
    if value is None:
        return None
    s = _shape(value, "CENTROID")
    if isinstance(s, Point):
        return s.text()
    if isinstance(s, Circle):
        return Point(s.ra, s.dec).text()
    raise GeometryError("CENTROID of a POLYGON is not supported")


def _guarded(fn, errors: list[str]):
    """Wrap a function so its message survives SQLite (which reports only 'raised exception')."""
    def call(*args):
        try:
            return fn(*args)
        except GeometryError as exc:
            errors.append(str(exc))
            raise
        except (TypeError, ValueError, ZeroDivisionError) as exc:
            errors.append(f"{getattr(fn, '__name__', 'function')}: {exc}")
            raise
    return call


# ADQL-visible names; CONTAINS and friends keep their own names in the SQL we generate
SQL_FUNCTIONS: dict[str, tuple[int, object]] = {
    "point": (-1, make_point),
    "circle": (-1, make_circle),
    "box": (-1, make_box),
    "polygon": (-1, make_polygon),
    "contains": (2, sql_contains),
    "intersects": (2, sql_intersects),
    "distance": (-1, sql_distance),
    "coord1": (1, sql_coord(1)),
    "coord2": (1, sql_coord(2)),
    "area": (1, sql_area),
    "centroid": (1, sql_centroid),
    "adql_point_in": (3, sql_point_in),
    "adql_in_cone": (5, sql_in_cone),
    "adql_circles_intersect": (6, sql_circles("intersects")),
    "adql_circle_in_circle": (6, sql_circles("contains")),
}


def register(conn: sqlite3.Connection, errors: list[str]) -> None:
    """Make the geometry functions callable on ``conn``; messages of failures go to ``errors``."""
    for name, (nargs, fn) in SQL_FUNCTIONS.items():
        conn.create_function(name, nargs, _guarded(fn, errors), deterministic=True)

