"""A coarse biventricular case shared by the tests (built once per session)."""

from functools import lru_cache

from fibers import stack as stack_stage, surfaces as surface_stage
from fibers.biv import inputs, mesh as biv_mesh, surfaces as biv_surfaces
from fibers.demo import biventricle

SIZE = 3.0  # mm


@lru_cache(maxsize=None)
def exact_case(seed=3):
    """(shape, contours, stack, lv surfaces, right contours, right surfaces, mesh)."""
    shape = biventricle.exact_biventricle(seed=seed)
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    lv_rows, right = inputs.split_contours(contours)
    stack = stack_stage.check_stack(lv_rows)
    lv = surface_stage.fit_surfaces(stack)
    rs = biv_surfaces.fit_right(stack, lv, right)
    return shape, contours, stack, lv, right, rs, biv_mesh.build_mesh(lv, rs, size=SIZE)
