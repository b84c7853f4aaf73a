"""The biventricular additions to the output folder.

The mesh files gain point data ``septal_depth``, ``phi_lv``, ``phi_rv`` and cell data ``region``
(1 LV free wall, 2 septum, 3 RV free wall) and ``rv_region`` (1-3 basal / mid / apical right free
wall), and name face tag 4 ``rv_endo`` (the result's ``extra_point_data``, ``extra_cell_data``
and ``face_names``, which :mod:`fibers.io.outputs` writes); here the manifest's conventions say
what the fields mean on both ventricles.
"""

from __future__ import annotations



from fibers.biv.mesh import FACE_NAMES

CONVENTIONS = {
    "ventricles": "biv: both ventricles in one mesh",
    "face_tags": {name: tag for tag, name in FACE_NAMES.items()},
    "region": "cell data: 1 LV free wall, 2 septum (inside the left epicardium where the right cavity lies beyond), 3 RV free wall",
    "rv_region": "cell data: 1 basal, 2 mid, 3 apical third of the right cavity's depth, on the RV free wall; 0 elsewhere",
    "transmural": "phi_epi: 0 on either endocardium, 1 on the epicardium",
    "septal_depth": "phi_rv / (phi_lv + phi_rv): 0 on the left endocardium, 1 on the right endocardium",
    "e_rad": "endocardium to epicardium in the free walls; left to right cavity in the septum",
    "helix_angle": "measured on the fiber in (e_circ, e_long); across the septum from +lv_helix_endo (left side) to -rv_helix_endo (right side, the right ventricle's own frame turned over)",
    "sheet_angle": "the sheet's turn about the fiber from e_rad (Bayer et al.'s sheet angle)",
    "aha_segment": "on the left ventricle and the septum; 0 on the RV free wall",
}


def amend_manifest(manifest: dict, result) -> None:
    """Add the biventricular conventions to a manifest (the summary already has the numbers)."""
    manifest["conventions"] = dict(manifest["conventions"], biventricular=CONVENTIONS)
