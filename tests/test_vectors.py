"""The component-first vector helpers against numpy's own row-wise forms (the reference)."""

from __future__ import annotations

import numpy as np

from fibers.vectors import columns, cross, cross_columns, dot_columns, norm_columns, rows


def test_component_first_helpers_match_numpy_rows():
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(2, 1000, 3))
    ca, cb = columns(a), columns(b)
    assert ca.shape == (3, 1000) and ca.flags.c_contiguous
    assert np.array_equal(rows(ca), a)
    # np.cross is the reference; the same multiply-then-subtract arithmetic gives the same bits
    assert np.array_equal(rows(cross_columns(ca, cb)), np.cross(a, b))
    assert np.array_equal(cross(a, b), np.cross(a, b))
    axis = np.array([0.0, 0.6, 0.8])
    assert np.array_equal(rows(cross_columns(axis, cb)), np.cross(axis, b))
    # dot products and lengths: within rounding of numpy's (the order of the three terms may differ)
    np.testing.assert_allclose(dot_columns(ca, cb), np.einsum("ij,ij->i", a, b), rtol=0, atol=1e-14)
    np.testing.assert_allclose(dot_columns(ca, axis), a @ axis, rtol=0, atol=1e-14)
    np.testing.assert_allclose(norm_columns(ca), np.linalg.norm(a, axis=1), rtol=1e-15)
