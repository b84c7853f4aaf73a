"""The mesh-size budget: the wall volume and tetrahedron estimate made before meshing."""

from __future__ import annotations

import numpy as np
import pytest

from fibers import budget, mesh as mesh_stage, pipeline, stack, surfaces
from fibers.demo import ventricle
from fibers.config import PoolSettings
from fibers.errors import InputError
from fibers.io.case import resolve_case


def _cap_mm3(b, a, c):
    # volume of the spheroid x^2/b^2 + y^2/b^2 + z^2/a^2 <= 1 below the plane z = c:
    # V = pi b^2 [(c + a) - (c^3 + a^3) / (3 a^2)] (elementary calculus; CRC Standard Mathematical Tables)
    return np.pi * b * b * ((c + a) - (c**3 + a**3) / (3 * a * a))


@pytest.fixture(scope="module")
def shell():
    lv = ventricle.spheroid_shell()  # exact coaxial spheroids, no noise, no shifts
    contours, _ = lv.sample_stack(spacing=8.0, noise=0.0, shift=0.0, seed=0)
    fitted = surfaces.fit_surfaces(stack.check_stack(contours, align_slices=False))
    base = float(lv.to_local(contours.points)[:, 2].max())  # the most basal slice's plane
    return lv, fitted, base


def test_wall_volume_matches_the_spheroid_caps(shell):
    lv, fitted, base = shell
    truth = _cap_mm3(*lv.epi, base) - _cap_mm3(*lv.endo, base)
    assert budget.wall_volume_mm3(fitted) == pytest.approx(truth, rel=0.02)


def test_thinnest_wall_of_the_shell(shell):
    _, fitted, _ = shell
    # the apical wall of the two spheroids is 65 - 57 = 8 mm (the surface fit and the normal
    # distance off the apex can make it a little less, never more)
    assert 6.5 < budget.thinnest_wall_mm(fitted) <= 8.2


@pytest.mark.parametrize("size", [3.0, 4.0])
def test_estimate_against_gmsh(shell, size):
    # gmsh (the meshing library from PyPI) is the reference: its count within 10 % of the estimate
    _, fitted, _ = shell
    wall = mesh_stage.build_mesh(fitted, size=size)
    estimate = budget.estimate_tets(budget.wall_volume_mm3(fitted), size)
    assert abs(estimate - len(wall.tets)) < 0.10 * len(wall.tets)


def test_size_for_fits_the_budget():
    volume = 122_000.0
    size = budget.size_for(volume, 5_000_000)
    assert budget.estimate_tets(volume, size) <= 5_000_000
    assert budget.estimate_tets(volume, size - 0.05) > 5_000_000  # the smallest 0.05 mm step that fits


def _case(size, **pools):
    return resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": size},
                         "pools": {"myocardium": 100, "cavity": 10, "background": 100, "endo": 10,
                                   "epi": 10, "base": 10, **pools}})


def test_too_small_a_size_is_refused_before_meshing(monkeypatch):
    def no_gmsh(*args, **kwargs):
        raise AssertionError("gmsh was called")

    monkeypatch.setattr(mesh_stage, "fill_volume", no_gmsh)
    contours, _ = ventricle.demo_subject().sample_stack(spacing=8.0, point_spacing=1.5, noise=0.4,
                                                        shift=2.0, seed=11)
    with pytest.raises(InputError) as err:
        pipeline.run(contours, _case(0.3))
    message = str(err.value)
    assert "max_tets = 5,000,000" in message and "--mesh-size 0.5" in message
    estimate = int(message.split("about ")[1].split(" tetrahedra")[0].replace(",", ""))
    assert 15_000_000 < estimate < 20_000_000  # 122 mL / 0.3^3 mm^3 x ~4 (the calibration above)


def test_thin_wall_warning_names_the_size_for_three_elements(shell):
    _, fitted, _ = shell
    with pytest.warns(UserWarning, match=r"fewer than 3 elements of 4 mm.*--mesh-size 2\.\d+ gives 3"):
        budget.check_mesh_size(fitted, 4.0)


def test_pool_counts_bounded_by_memory():
    settings = PoolSettings(myocardium=20_000_000, background=20_000_000)
    with pytest.raises(InputError, match="GB"):
        budget.check_pools(settings, memory_bytes=8 * 2**30)
    budget.check_pools(_case(4.0).pools, memory_bytes=8 * 2**30)  # the defaults fit easily
