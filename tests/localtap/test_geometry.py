"""ADQL geometry on the sky, checked against astropy (an independent implementation).

Truth for cones and DISTANCE is ``SkyCoord.separation``; truth for polygons is a test built on
astropy's ``SkyCoord.position_angle`` (a point is inside a convex spherical polygon when it lies on
the same side of every edge); truth for circle-polygon overlap samples the polygon's edges with
``SkyCoord.directional_offset_by``.  Every selection is run as ADQL through the real engine over
the real SQLite catalogue, and compared with astropy on the same rows.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from jobdesk.localtap import geometry
from jobdesk.localtap.engine import AdqlError, Engine


@pytest.fixture(scope="module")
def engine(tmp_path_factory):
    return Engine(tmp_path_factory.mktemp("geometry"), rows=20000, seed=4242)


@pytest.fixture(scope="module")
def sky(engine):
    """All catalogue positions, read through ADQL itself."""
    r = engine.execute("SELECT orrery_id, ra, dec FROM orrery.sources", maxrec=None)
    rows = list(r.rows)
    ids = np.array([x[0] for x in rows])
    coords = SkyCoord([x[1] for x in rows] * u.deg, [x[2] for x in rows] * u.deg, frame="icrs")
    return ids, coords


def ids_of(engine, adql: str) -> set[int]:
    return {row[0] for row in engine.execute(adql, maxrec=None).rows}


CONES = [
    (10.0, -30.0, 0.5),     # the dense patch
    (0.0, 0.0, 1.0),        # centred on RA = 0
    (359.8, 0.3, 0.7),      # straddling RA = 360 from the other side
    (123.0, 89.9, 0.5),     # over the north pole
    (300.0, -89.9, 0.4),    # over the south pole
    (0.0, 90.0, 0.3),       # centred on the pole itself
]


@pytest.mark.parametrize("ra, dec, radius", CONES)
def test_cone_equals_astropy_separation(engine, sky, ra, dec, radius):
    ids, coords = sky
    centre = SkyCoord(ra * u.deg, dec * u.deg)
    # truth: astropy SkyCoord.separation (Vincenty formula)
    sep = coords.separation(centre).deg
    truth = set(ids[sep <= radius].tolist())
    assert len(truth) > 5, "the catalogue plants sources at every test cone"
    got = ids_of(engine, f"SELECT orrery_id FROM orrery.sources WHERE "
                         f"1 = CONTAINS(POINT('ICRS', ra, dec), CIRCLE('ICRS', {ra}, {dec}, {radius}))")
    assert got == truth


@pytest.mark.parametrize("ra, dec, radius", [CONES[2], CONES[3]])
def test_distance_predicate_and_values_equal_astropy(engine, sky, ra, dec, radius):
    ids, coords = sky
    sep = coords.separation(SkyCoord(ra * u.deg, dec * u.deg)).deg  # truth: astropy
    r = engine.execute(f"SELECT orrery_id, DISTANCE(POINT(ra, dec), POINT({ra}, {dec})) AS d "
                       f"FROM orrery.sources WHERE DISTANCE(POINT(ra, dec), POINT({ra}, {dec})) < {radius}",
                       maxrec=None)
    rows = list(r.rows)
    assert {x[0] for x in rows} == set(ids[sep < radius].tolist())
    by_id = dict(zip(ids.tolist(), sep))
    assert max(abs(d - by_id[i]) for i, d in rows) < 1e-9
    # the four-number form of ADQL 2.1 gives the same values
    four = dict(engine.execute(f"SELECT orrery_id, DISTANCE(ra, dec, {ra}, {dec}) FROM orrery.sources "
                               f"WHERE DISTANCE(ra, dec, {ra}, {dec}) < {radius}", maxrec=None).rows)
    assert four == dict(rows)


def test_circle_circle_intersects_near_pole(engine, sky):
    ids, coords = sky
    sep = coords.separation(SkyCoord(0 * u.deg, 89.9 * u.deg)).deg  # truth: astropy
    got = ids_of(engine, "SELECT orrery_id FROM orrery.sources "
                         "WHERE 1 = INTERSECTS(CIRCLE(ra, dec, 0.1), CIRCLE(0, 89.9, 0.5))")
    assert got == set(ids[sep <= 0.6].tolist()) and got
    inside = ids_of(engine, "SELECT orrery_id FROM orrery.sources "
                            "WHERE 1 = CONTAINS(CIRCLE(ra, dec, 0.1), CIRCLE(0, 89.9, 0.5))")
    assert inside == set(ids[sep + 0.1 <= 0.5].tolist()) and inside


def _inside_convex_by_position_angles(coords: SkyCoord, vertices: list[tuple[float, float]]):
    """Independent truth: same side of every edge, judged by astropy position angles.

    For edge A->B, the sign of PA(A->P) - PA(A->B) (wrapped to +-180) says on which side of the
    great circle through A and B the point P lies.  Returns (inside mask, near-edge mask).
    """
    # a known inside point: the mean of the vertex vectors (inside any small convex polygon)
    corners = SkyCoord([v[0] for v in vertices] * u.deg, [v[1] for v in vertices] * u.deg)
    mean = corners.cartesian.xyz.value.mean(axis=1)
    reference = SkyCoord(x=mean[0], y=mean[1], z=mean[2], representation_type="cartesian",
                         frame="icrs")
    reference = SkyCoord(reference.spherical.lon, reference.spherical.lat)
    inside = np.ones(len(coords), dtype=bool)
    near = np.zeros(len(coords), dtype=bool)
    for (ra1, dec1), (ra2, dec2) in zip(vertices, vertices[1:] + vertices[:1]):
        a = SkyCoord(ra1 * u.deg, dec1 * u.deg)
        b = SkyCoord(ra2 * u.deg, dec2 * u.deg)
        edge_pa = a.position_angle(b).deg

        def side(c):
            return (a.position_angle(c).deg - edge_pa + 180.0) % 360.0 - 180.0

        diff = side(coords)
        near |= np.abs(diff) < 1e-6
        inside &= np.sign(diff) == np.sign(side(reference))
    return inside, near


POLYGONS = [
    [(10.0, -31.0), (11.0, -31.0), (11.0, -29.0), (10.0, -29.0)],        # in the dense patch
    [(359.0, -1.5), (1.0, -1.0), (1.5, 1.0), (359.5, 1.5)],              # across RA = 0/360
    [(0.0, 89.5), (90.0, 89.5), (180.0, 89.5), (270.0, 89.5)],           # around the north pole
    [(200.0, -89.2), (80.0, -89.6), (320.0, -89.4)],                     # around the south pole
]


@pytest.mark.parametrize("vertices", POLYGONS)
@pytest.mark.parametrize("reverse", [False, True])
def test_point_in_polygon_matches_position_angle_truth(engine, sky, vertices, reverse):
    ids, coords = sky
    verts = vertices[::-1] if reverse else vertices  # vertex order must not matter
    inside, near = _inside_convex_by_position_angles(coords, verts)
    args = ", ".join(f"{ra}, {dec}" for ra, dec in verts)
    got = ids_of(engine, f"SELECT orrery_id FROM orrery.sources "
                         f"WHERE 1 = CONTAINS(POINT(ra, dec), POLYGON('ICRS', {args}))")
    truth = set(ids[inside & ~near].tolist())
    undecided = set(ids[near].tolist())
    assert truth and got - undecided == truth


def test_concave_polygon_is_the_union_of_its_convex_parts(engine, sky):
    ids, coords = sky
    # a concave hexagon near the south pole, made of two convex quadrilaterals that share the
    # whole edge B-C, so every outer edge is the same great-circle arc in the parts and the whole
    a, b, c, d = (0.0, -86.0), (0.0, -88.0), (20.0, -88.0), (20.0, -86.0)
    g, h = (0.0, -89.5), (80.0, -89.5)
    part1, part2 = [a, b, c, d], [b, g, h, c]
    l_shape = [a, b, g, h, c, d]  # reflex angle at c
    in1, near1 = _inside_convex_by_position_angles(coords, part1)
    in2, near2 = _inside_convex_by_position_angles(coords, part2)
    truth_mask = in1 | in2
    undecided = set(ids[near1 | near2].tolist())
    args = ", ".join(f"{ra}, {dec}" for ra, dec in l_shape)
    got = ids_of(engine, f"SELECT orrery_id FROM orrery.sources "
                         f"WHERE 1 = CONTAINS(POINT(ra, dec), POLYGON({args}))")
    truth = set(ids[truth_mask].tolist()) - undecided
    assert truth and got - undecided == truth


def test_circle_polygon_intersects_matches_sampled_edges(engine, sky):
    ids, coords = sky
    poly = POLYGONS[2]  # around the north pole
    radius = 0.15
    inside, near = _inside_convex_by_position_angles(coords, poly)
    # distance to the boundary from densely sampled great-circle edges (astropy offsets)
    samples = []
    for (ra1, dec1), (ra2, dec2) in zip(poly, poly[1:] + poly[:1]):
        a, b = SkyCoord(ra1 * u.deg, dec1 * u.deg), SkyCoord(ra2 * u.deg, dec2 * u.deg)
        steps = np.linspace(0.0, 1.0, 400)
        samples.append(a.directional_offset_by(a.position_angle(b), a.separation(b) * steps))
    edge = SkyCoord(np.concatenate([s.ra.deg for s in samples]) * u.deg,
                    np.concatenate([s.dec.deg for s in samples]) * u.deg)
    close = np.array([c.separation(edge).deg.min() for c in coords[np.abs(coords.dec.deg) > 88.0]])
    polar = np.abs(coords.dec.deg) > 88.0
    dist = np.full(len(coords), 99.0)
    dist[polar] = close
    step = 0.71 * 2 / 400  # longest edge / samples: sampling error bound
    truth = inside | (dist <= radius)
    undecided = near | (np.abs(dist - radius) < step)
    got = ids_of(engine, "SELECT orrery_id FROM orrery.sources WHERE "
                         f"1 = INTERSECTS(CIRCLE(ra, dec, {radius}), "
                         f"POLYGON({', '.join(f'{ra}, {dec}' for ra, dec in poly)}))")
    decided_truth = set(ids[truth & ~undecided].tolist())
    assert decided_truth and got - set(ids[undecided].tolist()) == decided_truth


@pytest.mark.parametrize("ra, dec", [(10.0, -30.0), (0.0, 0.0), (200.0, 87.0), (45.0, -89.0)])
def test_box_follows_stc_definition(ra, dec):
    # STC 1.30 Box (which ADQL 2.0's BOX defers to): arms along the coordinate axes, half the
    # width/height long, end on the midpoints of great-circle sides.  astropy makes the arms.
    width, height = 2.0, 1.0
    box = geometry.parse(geometry.make_box(ra, dec, width, height))
    centre = SkyCoord(ra * u.deg, dec * u.deg)
    for pa, half in ((0, height / 2), (90, width / 2), (180, height / 2), (270, width / 2)):
        for scale, expected in ((0.999, True), (1.001, False)):
            p = centre.directional_offset_by(pa * u.deg, half * scale * u.deg)
            assert geometry.contains_shapes(geometry.Point(p.ra.deg, p.dec.deg), box) is expected


def test_area_of_known_shapes():
    # octant of the sphere: 4*pi/8 sr = 41252.96/8 deg**2 (whole sky 41252.96 deg**2, from memory)
    octant = geometry.sql_area(geometry.make_polygon(0, 0, 90, 0, 0, 90))
    assert octant == pytest.approx(4 * math.pi / 8 * (180 / math.pi) ** 2, rel=1e-12)
    # cap of radius r: 2*pi*(1 - cos r) sr (spherical cap area, textbook formula)
    cap = geometry.sql_area(geometry.make_circle(12, 89, 10))
    assert cap == pytest.approx(2 * math.pi * (1 - math.cos(math.radians(10))) * (180 / math.pi) ** 2)
    assert geometry.sql_area(geometry.make_point(1, 2)) == 0.0


def test_geometry_columns_come_out_as_dali_arrays(engine):
    r = engine.execute("SELECT TOP 1 POINT('ICRS', 10, -30) AS p, CIRCLE(POINT(359.5, 89), 0.5) AS c, "
                       "POLYGON(1, 2, 3, 2, 2, 4) AS poly, COORD1(POINT(370, 10)) AS c1, "
                       "COORD2(POINT(10, -20)) AS c2 FROM orrery.sources", maxrec=None)
    cols = {c.name: c for c in r.columns}
    # DALI 1.1 §3.3.x: point, circle and polygon are double arrays with an xtype
    assert [(cols[n].datatype, cols[n].xtype) for n in ("p", "c", "poly")] == [
        ("double", "point"), ("double", "circle"), ("double", "polygon")]
    row = next(r.rows)
    assert row[0] == (10.0, -30.0)
    assert row[1] == (359.5, 89.0, 0.5)
    assert sorted(zip(row[2][::2], row[2][1::2])) == [(1.0, 2.0), (2.0, 4.0), (3.0, 2.0)]
    assert row[3] == pytest.approx(10.0) and row[4] == -20.0


def test_bad_geometry_is_refused_with_a_message(engine):
    with pytest.raises(AdqlError, match="latitude"):
        list(engine.execute("SELECT POINT(10, 95) FROM orrery.sources", maxrec=1).rows)
    with pytest.raises(AdqlError, match="radius"):
        engine.execute("SELECT orrery_id FROM orrery.sources WHERE "
                       "1 = CONTAINS(POINT(ra, dec), CIRCLE(10, 20, -1))", maxrec=1)
    with pytest.raises(AdqlError, match="hemisphere"):
        engine.execute("SELECT AREA(POLYGON(0, 0, 120, 0, 240, 0, 0, -10, 180, 30)) "
                       "FROM orrery.sources", maxrec=1)
    with pytest.raises(AdqlError, match="CENTROID of a POLYGON"):
        engine.execute("SELECT CENTROID(POLYGON(1, 2, 3, 2, 2, 4)) FROM orrery.sources", maxrec=1)
