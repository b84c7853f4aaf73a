"""The biventricular additions to the output folder.

``mesh.vtu`` gains point data ``septal_depth``, ``phi_lv``, ``phi_rv`` and cell data ``region``
(1 LV free wall, 2 septum, 3 RV free wall) and ``rv_region`` (1-3 basal / mid / apical right free
wall); ``mesh.msh`` names the physical group 4 ``rv_endo``; the manifest's conventions say what
the fields mean on both ventricles.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.biv.mesh import FACE_NAMES
from fibers.io import outputs

CONVENTIONS = {
    "ventricles": "biv: both ventricles in one mesh",
    "face_tags": {name: tag for tag, name in FACE_NAMES.items()},
    "region": "cell data: 1 LV free wall, 2 septum (inside the left epicardium where the right cavity lies beyond), 3 RV free wall",
    "rv_region": "cell data: 1 basal, 2 mid, 3 apical third of the right cavity's depth, on the RV free wall; 0 elsewhere",
    "transmural": "phi_epi: 0 on either endocardium, 1 on the epicardium",
    "septal_depth": "phi_rv / (phi_lv + phi_rv): 0 on the left endocardium, 1 on the right endocardium",
    "e_rad": "endocardium to epicardium in the free walls; left to right cavity in the septum",
    "helix_angle": "measured on the fiber in (e_circ, e_long); across the septum from +lv_helix_endo (left side) to -rv_helix_endo (right side, the right ventricle's own frame turned over)",
    "transverse_angle": "the sheet's turn about the fiber from e_rad (Bayer et al.'s sheet angle)",
    "aha_segment": "on the left ventricle and the septum; 0 on the RV free wall",
}


def write_extra(folder: Path, result) -> None:
    """Re-write mesh.vtu with the biventricular fields and mesh.msh with the group names."""
    import meshio

    wall = result.mesh
    pdata, cdata = outputs.point_data(result), outputs.cell_data(result)
    pdata.update({"septal_depth": result.fields.septal_depth, "phi_lv": result.fields.phi_lv,
                  "phi_rv": result.fields.phi_rv})
    cdata.update({"region": np.asarray(wall.region, np.int32), "rv_region": np.asarray(result.rv_region, np.int32)})
    meshio.Mesh(wall.points, [("tetra", wall.tets)], point_data=pdata,
                cell_data={k: [v] for k, v in cdata.items()}).write(Path(folder) / "mesh.vtu", compression=None)
    blocks = [("tetra", wall.tets), ("triangle", wall.faces)]
    phys = [np.full(len(wall.tets), outputs.WALL_TAG, np.int32), wall.face_tags.astype(np.int32)]
    msh = meshio.Mesh(wall.points, blocks, cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys})
    msh.field_data = {"wall": np.array([outputs.WALL_TAG, 3]),
                      **{name: np.array([tag, 2]) for tag, name in FACE_NAMES.items()}}
    meshio.write(Path(folder) / "mesh.msh", msh, file_format="gmsh22", binary=True)


def amend_manifest(manifest: dict, result) -> None:
    """Add the biventricular conventions to a manifest (the summary already has the numbers)."""
    manifest["conventions"] = dict(manifest["conventions"], biventricular=CONVENTIONS)
