"""AHA 17-segment labels on an oblique spheroidal shell (Cerqueira et al., Circulation 2002)."""

import warnings

import numpy as np
import pytest
import shells

from fibers import meshtools, segments
from fibers.config import Landmarks
from fibers.errors import InputError

INNER, OUTER = (20.0, 35.0), (30.0, 45.0)   # (equatorial radius, polar half-axis), mm
L = INNER[1]                                # cavity length: base plane to the endocardial apex
ROT = shells.random_rotation(7)
SHIFT = np.array([12.0, -30.0, 55.0])
PHI_ANT, PHI_INF = 100.0, -20.0             # local angles of the insertions, degrees
PHI_BIS = 40.0                              # their bisector

# Sector centres, degrees from the septal bisector, positive toward the inferior insertion:
# anterior, anteroseptal, inferoseptal, inferior, inferolateral, anterolateral in 60-degree
# sectors with the 2|3 boundary on the bisector; apical 13-16 in 90-degree sectors with the
# septal one (14) centred on it (Cerqueira et al. 2002).
RING_CENTRES = {1: -90, 2: -30, 3: 30, 4: 90, 5: 150, 6: -150}
APICAL_CENTRES = {13: -90, 14: 0, 15: 90, 16: 180}


def world(local):
    return np.asarray(local, float) @ ROT.T + SHIFT


def local(points):
    return (np.asarray(points, float) - SHIFT) @ ROT


def on_epi(phi_deg, z):
    r = OUTER[0] * np.sqrt(1 - z * z / OUTER[1] ** 2)
    t = np.radians(phi_deg)
    return world([r * np.cos(t), r * np.sin(t), z])


def marks(phi_ant=PHI_ANT, phi_inf=PHI_INF, z=-5.0, **kw):
    return Landmarks(kw.get("ant", on_epi(phi_ant, z)), kw.get("inf", on_epi(phi_inf, z)),
                     source="test")


def wrap(deg):
    return (np.asarray(deg) + 180.0) % 360.0 - 180.0


def expected_labels(points):
    """Labels from local coordinates by nearest sector centre (independent of the module)."""
    x, y, z = local(points).T
    a = wrap(PHI_BIS - np.degrees(np.arctan2(y, x)))   # inferior lies at smaller local angle
    h = -z

    def nearest(centres):
        keys = np.array(list(centres))
        dist = np.abs(wrap(a[:, None] - np.array(list(centres.values()))[None]))
        return keys[np.argmin(dist, axis=1)]

    six = nearest(RING_CENTRES)
    out = np.where(h < L / 3, six, np.where(h < 2 * L / 3, six + 6, nearest(APICAL_CENTRES)))
    return np.where(h >= L, 17, out)


@pytest.fixture(scope="module")
def mesh():
    return shells.spheroid_shell(INNER, OUTER, size=2.0, rotation=ROT, translation=SHIFT)


@pytest.fixture(scope="module")
def septum(mesh):
    with warnings.catch_warnings():
        warnings.simplefilter("error")     # anatomical handedness: no warning expected
        return segments.locate_septum(mesh, marks())


def test_septum_geometry(mesh, septum):
    # Closed form: the bisector of insertions at 100 and -20 degrees lies at 40 degrees, the
    # half arc is 60 degrees, and the inferior side is the side of decreasing local angle.
    t = np.radians(PHI_BIS)
    assert np.allclose(septum.bisector, ROT @ [np.cos(t), np.sin(t), 0], atol=1e-9)
    assert septum.half_angle == pytest.approx(60.0, abs=1e-9)
    assert np.allclose(septum.toward_inferior, ROT @ [np.sin(t), -np.cos(t), 0], atol=1e-9)


def test_labels_match_convention_everywhere(mesh, septum):
    # Every tetrahedron's label against the Cerqueira table evaluated from local coordinates.
    labels = segments.label_cells(mesh, septum)
    assert labels.dtype == np.int8
    expected = expected_labels(mesh.points[mesh.tets].mean(axis=1))
    assert np.array_equal(labels, expected)
    assert set(np.unique(labels)) == set(range(1, 18))


def test_sector_centres(mesh, septum):
    # By symmetry of the shell about its axis, the volume-weighted circular mean angle of each
    # segment is the centre of its sector (Cerqueira et al. 2002 layout), to within 2 degrees.
    labels = segments.label_cells(mesh, septum)
    centroid = mesh.points[mesh.tets].mean(axis=1)
    vol = meshtools.signed_volumes(mesh.points, mesh.tets)
    x, y, _ = local(centroid).T
    a = np.radians(wrap(PHI_BIS - np.degrees(np.arctan2(y, x))))
    centres = {**RING_CENTRES, **{k + 6: v for k, v in RING_CENTRES.items()}, **APICAL_CENTRES}
    for seg, centre in centres.items():
        w = vol * (labels == seg)
        mean = np.degrees(np.arctan2((w * np.sin(a)).sum(), (w * np.cos(a)).sum()))
        assert abs(wrap(mean - centre)) < 2.0, seg


def ring_volume(z_lo, z_hi):
    """Shell volume between two heights: pi * integral (r_o^2 - r_i^2) dz (elementary calculus)."""
    def cap(b, a, lo, hi):
        lo, hi = max(lo, -a), min(hi, a)
        if hi <= lo:
            return 0.0
        return np.pi * b * b * ((hi - lo) - (hi**3 - lo**3) / (3 * a * a))
    return cap(*OUTER, z_lo, z_hi) - cap(*INNER, z_lo, z_hi)


def test_segment_volumes_equal_in_a_ring(mesh, septum):
    # Each ring's segments share its closed-form volume equally (6 or 4 sectors), within 4%;
    # segment 17 is the wall beyond the cavity apex.
    labels = segments.label_cells(mesh, septum)
    vol = np.bincount(labels, meshtools.signed_volumes(mesh.points, mesh.tets), minlength=18)
    rings = [(range(1, 7), -L / 3, 0.0), (range(7, 13), -2 * L / 3, -L / 3),
             (range(13, 17), -L, -2 * L / 3), (range(17, 18), -OUTER[1], -L)]
    for segs, lo, hi in rings:
        exact = ring_volume(lo, hi) / len(segs)
        for s in segs:
            assert vol[s] == pytest.approx(exact, rel=0.04), s


def test_ring_boundaries_at_thirds_and_apex(mesh, septum):
    # Rings end at L/3, 2L/3 and L below the base (README conventions); 17 beyond the cavity apex.
    phi = PHI_BIS - 30.0          # inside segment 3 / 9 / 14 (inferoseptal, septal)
    r = 0.5 * (INNER[0] + OUTER[0]) * 0.3
    zs = np.array([0.01, -0.01, -L / 3 + 1e-3, -L / 3 - 1e-3, -2 * L / 3 + 1e-3,
                   -2 * L / 3 - 1e-3, -L + 1e-3, -L - 1e-3, -44.0])
    t = np.radians(phi)
    pts = world(np.stack([np.full_like(zs, r * np.cos(t)), np.full_like(zs, r * np.sin(t)), zs], 1))
    got = segments.label_points(pts, mesh, septum)
    assert got.tolist() == [3, 3, 3, 9, 9, 14, 14, 17, 17]


def test_no_landmarks_gives_zero_labels(mesh):
    assert segments.locate_septum(mesh, Landmarks()) is None
    assert segments.locate_septum(mesh, None) is None
    labels = segments.label_cells(mesh, None)
    assert labels.shape == (len(mesh.tets),) and not labels.any()


def test_refuses_landmark_off_the_epicardium(mesh):
    far = world([60.0, 0.0, -5.0])     # 30 mm outside the epicardium
    with pytest.raises(InputError, match=r"rv_insertion_anterior .* mm from the epicardial surface"):
        segments.locate_septum(mesh, marks(ant=far))


def test_refuses_landmark_deep_below_base(mesh):
    with pytest.raises(InputError, match=r"rv_insertion_inferior .* below the base plane"):
        segments.locate_septum(mesh, marks(inf=on_epi(PHI_INF, -0.6 * L)))


@pytest.mark.parametrize("phi_inf", [PHI_ANT - 40.0, PHI_ANT - 178.0])
def test_refuses_implausible_arc(mesh, phi_inf):
    with pytest.raises(InputError, match=r"septal arc .* degrees, outside the plausible 60-175"):
        segments.locate_septum(mesh, marks(phi_inf=phi_inf))


def test_swapped_landmarks_warn(mesh):
    # Seen from the apex, anterior -> septum -> inferior runs counter-clockwise (Cerqueira et
    # al. 2002 bull's-eye; viewing side from memory); swapped points reverse that.
    with pytest.warns(UserWarning, match="swapped"):
        s = segments.locate_septum(mesh, marks(phi_ant=PHI_INF, phi_inf=PHI_ANT))
    # The labels still follow the points as given: the mirror of the usual layout.
    p = on_epi(PHI_BIS + 90.0, -5.0)      # anterior side in the usual layout, labelled inferior
    assert segments.label_points(p, mesh, s).tolist() == [4]


def test_circumferential_and_segment_angle_share_one_sense(mesh, septum):
    # Issue 14: circumferential (about the long axis, along e_circ) and the segment angle
    # increase the same way, so labelling by the circumferential coordinate reproduces the
    # labels; the Cerqueira sector table is evaluated independently in expected_labels.
    from fibers import coordinates
    coords = coordinates.compute(mesh, zero_direction=septum.bisector)
    centroid = mesh.points[mesh.tets].mean(axis=1)
    angle = segments.septal_angle(centroid, mesh.axis, septum)
    diff = wrap(angle - coords.cell_circumferential)
    assert np.abs(diff).max() < 1e-9
    depth = segments.depth_below_base(centroid, mesh.axis) / L
    reused = segments.labels_from_angles(coords.cell_circumferential, depth, septum)
    assert np.array_equal(reused, expected_labels(centroid))
    # Clockwise as seen from the apex = right-handed about the apex-to-base axis: the
    # anterior insertion (at +60 degrees from the bisector in the usual anatomy) is positive.
    assert segments.septal_angle(on_epi(PHI_ANT, -5.0), mesh.axis, septum)[0] == pytest.approx(60.0, abs=1e-6)


def test_septal_sectors_follow_the_insertions(mesh):
    # A 100-degree septal arc (insertions at 100 and 0 degrees, bisector at 50): with
    # sectors = "insertions", segments 2 and 3 fill the arc and the other four share the
    # remaining 260 degrees (65 each); "fixed" keeps 60-degree sectors. Volumes of sectors of
    # the axisymmetric shell are proportional to their angle (elementary calculus).
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fixed = segments.locate_septum(mesh, marks(phi_ant=100.0, phi_inf=0.0))
        moved = segments.locate_septum(mesh, marks(phi_ant=100.0, phi_inf=0.0), sectors="insertions")
    assert moved.half_angle == pytest.approx(50.0, abs=1e-9)
    p = on_epi(50.0 + 55.0, -5.0)        # 5 degrees beyond the anterior insertion
    assert segments.label_points(p, mesh, fixed).tolist() == [2]
    assert segments.label_points(p, mesh, moved).tolist() == [1]
    p = on_epi(50.0 - 45.0, -5.0)        # inside the arc, on the inferior side
    assert segments.label_points(p, mesh, moved).tolist() == [3]
    vol = meshtools.signed_volumes(mesh.points, mesh.tets)
    labels = segments.label_cells(mesh, moved)
    basal = np.isin(labels, range(1, 7))
    share = {k: vol[labels == k].sum() / vol[basal].sum() for k in range(1, 7)}
    assert share[2] + share[3] == pytest.approx(100.0 / 360.0, abs=0.02)
    assert share[1] == pytest.approx(65.0 / 360.0, abs=0.02)
    apical = np.isin(labels, range(13, 17))
    assert vol[labels == 14].sum() / vol[apical].sum() == pytest.approx(100.0 / 360.0, abs=0.03)
    with pytest.raises(InputError, match="septal_sectors"):
        segments.locate_septum(mesh, marks(), sectors="even")
