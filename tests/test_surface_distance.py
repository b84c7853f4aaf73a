"""Distances to a triangulated surface: the search in the rings of the nearest vertices against brute force."""

from __future__ import annotations

import numpy as np
import pytest
import shells

from fibers.surface_distance import distance_to_surface, point_triangle_distance
from fibers.types import ENDO, EPI


def _brute_force(points, vertices, triangles):
    # Reference: the minimum over every triangle of the exact point-triangle distance, itself
    # checked against dense sampling in tests/test_fiber_rules.py.
    a, b, c = (vertices[triangles[:, i]] for i in range(3))
    best = np.full(len(points), np.inf)
    for k, p in enumerate(points):
        best[k] = point_triangle_distance(np.broadcast_to(p, a.shape), a, b, c).min()
    return best


@pytest.mark.parametrize("seed", [0, 1])
def test_ring_search_equals_brute_force_on_a_tilted_ellipsoidal_shell(seed):
    mesh = shells.spheroid_shell(inner=(18.0, 26.0), outer=(27.0, 35.0), size=2.5,
                                 rotation=shells.random_rotation(seed), translation=[4.0, -2.0, 9.0])
    rng = np.random.default_rng(seed)
    centre = mesh.points.mean(axis=0)
    nodes = mesh.points[rng.choice(len(mesh.points), 300, replace=False)]
    # points in the cavity, in the wall and just outside, and far away
    others = np.concatenate([centre + rng.normal(size=(200, 3)) * 15.0, centre + rng.normal(size=(50, 3)) * 200.0])
    for tag in (ENDO, EPI):
        triangles = mesh.faces[mesh.face_tags == tag]
        got = distance_to_surface(np.concatenate([nodes, others]), mesh.points, triangles, block=97)  # odd blocks
        ref = _brute_force(np.concatenate([nodes, others]), mesh.points, triangles)
        assert np.all(got >= ref - 1e-12)   # a candidate is a real triangle: never below
        # the wall's nodes, whose depth the build needs: exact
        np.testing.assert_array_equal(got[:len(nodes)], ref[:len(nodes)])
        # deep in a curved cavity the nearest vertices' rings can miss the closest triangle, by
        # little (measured with one ring: 1 of these 250 points, by 0.006 mm at 19 mm, 3e-4 of
        # the distance; with the default two, none)
        assert np.max(np.abs(got - ref) / np.maximum(ref, 1e-9)) < 1e-3
        assert np.mean(got != ref) < 0.01


def test_every_node_of_a_rigidly_moved_shell_is_exact():
    # The case one ring got wrong: a node of the 3 mm shell whose nearest epicardial vertex's
    # ring missed the closest triangle by 0.007 mm in one of the two copies only. The depth of
    # every node must equal brute force in both, so it is invariant under the rigid motion.
    for rotation, translation in ((None, None), (shells.random_rotation(11), [5.0, 6.0, -7.0])):
        mesh = shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=3.0,
                                     rotation=rotation, translation=translation)
        for tag in (ENDO, EPI):
            triangles = mesh.faces[mesh.face_tags == tag]
            np.testing.assert_array_equal(distance_to_surface(mesh.points, mesh.points, triangles),
                                          _brute_force(mesh.points, mesh.points, triangles))


def test_degenerate_inputs():
    tri = np.array([[0, 1, 2]])
    vertices = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0]])
    # one triangle: the distance of a point above its interior is its height (elementary geometry)
    assert distance_to_surface([[0.2, 0.2, 3.0]], vertices, tri)[0] == pytest.approx(3.0)
    assert distance_to_surface(np.zeros((0, 3)), vertices, tri).shape == (0,)
    assert np.all(np.isinf(distance_to_surface([[0.0, 0, 1]], vertices, np.zeros((0, 3), int))))
